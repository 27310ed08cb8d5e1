"""Figures of power-series results (matplotlib, Agg-safe); each is written atomically.

* ``fit.png``: the data with the posterior median curve, its 68 % credible band and the 95 %
  posterior-predictive band (model plus the fitted noise) -- both sweeps for coherent drive,
  log-log intensity (plus blueshift and linewidth where fitted) for the reservoir model;
* ``residuals.png``: normalised residuals of every fitted observable against power;
* ``corner.png``: the sampled physics parameters (corner);
* ``traces.png``: the stored draws per walker.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from polkit.plotting import base as _mpl
from polkit.plotting.base import corner_data, posterior_matrix, trace_figure, write_figures
from polkit.plotting.base import pyplot as _plt

__all__ = ["power_figures", "fit_figure", "residual_figure", "corner_figure", "trace_figure",
           "predictive_draws", "SWEEP_COLOURS", "power_grid", "residual_points"]

#: colour of each sweep direction (``none``: a series without sweep labels)
SWEEP_COLOURS = {"up": "tab:blue", "down": "tab:red", "none": "tab:blue"}


def predictive_draws(problem, theta: np.ndarray, rng: np.random.Generator) -> dict:
    """Replicated observations at the data's powers, in fit space: ``{channel: (D, N)}``.

    Each draw adds Gaussian noise of its own noise parameter times the quoted errors to
    its model (NaN at unused points), so quantiles over draws give posterior-predictive
    bands.
    """
    model = problem.fit_space_model(theta)
    cols = {n: theta[:, i] for i, n in enumerate(problem.space.names)}
    out = {}
    for name, ch in problem.channels.items():
        k = cols[ch.noise_param][:, None]
        rep = model[name] + k * ch.sigma[None, :] * rng.standard_normal(model[name].shape)
        out[name] = np.where(ch.used[None, :], rep, np.nan)
    return out


def _to_display(problem, name: str, values: np.ndarray) -> np.ndarray:
    """Fit space -> plotted units: intensity, peak energy above e_ref in meV, linewidth in meV."""
    ch = problem.channels[name]
    return np.exp(values) if ch.log_space else values


def power_grid(problem, n: int = 160) -> tuple[np.ndarray, list[tuple[int, int, str]]]:
    """Fine power grid following each sweep run, and its runs ``(start, stop, label)``.

    Reservoir model: ``n`` log-spaced powers over the positive measured range, one run.
    Coherent model: ``n`` powers per sweep run from its first to its last power, so the
    curve of each run follows that run's history.
    """
    if problem.model == "reservoir":
        p = problem.power[problem.power > 0]
        grid = np.geomspace(p.min(), p.max(), n)
        return grid, [(0, n, "none")]
    parts, segs, offset = [], [], 0
    for start, stop, label in problem.segments:
        p = problem.power[start:stop]
        g = np.linspace(p[0], p[-1], n)
        parts.append(g)
        segs.append((offset, offset + n, label))
        offset += n
    return np.concatenate(parts), segs


def _curves(problem, theta, grid, segs) -> dict:
    model = problem.mean_model(theta, power=grid, segments=segs)
    if "peak_energy" in model:
        model["peak_energy"] = (model["peak_energy"] - problem.e_ref) * 1e3
    return model


def _observed(problem, name):
    ch = problem.channels[name]
    y = _to_display(problem, name, ch.values)
    err = ch.sigma * y if ch.log_space else ch.sigma
    return np.where(ch.used, y, np.nan), np.where(ch.used, err, np.nan)


_LABELS = {"intensity": "intensity [{units}]", "linewidth": "linewidth (FWHM) [meV]",
           "peak_energy": "peak energy - {e_ref:.5f} eV [meV]"}


def fit_figure(result, *, n_draws: int = 300):
    """Data with the median curve, 68 % credible band and 95 % posterior-predictive band."""
    plt = _plt()
    problem = result.problem()
    theta = posterior_matrix(result, n_draws)
    grid, segs = power_grid(problem)
    curves = _curves(problem, theta, grid, segs)
    rep = predictive_draws(problem, theta, np.random.default_rng(1))
    names = list(problem.channels)
    fig, axes = plt.subplots(1, len(names), figsize=(5.2 * len(names), 4.2), squeeze=False)
    for ax, name in zip(axes[0], names, strict=True):
        y, err = _observed(problem, name)
        pred = _to_display(problem, name, rep[name])
        for start, stop, label in problem.segments:
            colour = SWEEP_COLOURS.get(label, "tab:blue")
            sl = slice(start, stop)
            p = problem.power[sl]
            used = problem.channels[name].used[sl]
            order = np.argsort(p[used])
            lo, hi = np.percentile(pred[:, sl][:, used], [2.5, 97.5], axis=0)
            ax.fill_between(p[used][order], lo[order], hi[order], color=colour, alpha=0.12,
                            lw=0, label="95 % predictive" if start == 0 else None)
            ax.errorbar(p, y[sl], yerr=err[sl], fmt="o", ms=3, color=colour, lw=0.8,
                        label=f"data ({label})" if label != "none" else "data")
        for start, stop, label in segs:
            colour = SWEEP_COLOURS.get(label, "tab:blue")
            sl = slice(start, stop)
            lo, med, hi = np.percentile(curves[name][:, sl], [16, 50, 84], axis=0)
            ax.fill_between(grid[sl], lo, hi, color=colour, alpha=0.3, lw=0)
            ax.plot(grid[sl], med, "-", color=colour, lw=1.2,
                    label="median, 68 %" if start == 0 else None)
        _mark_thresholds(ax, result)
        ax.set_xlabel("pump power [mW]")
        ax.set_ylabel(_LABELS[name].format(units=problem.intensity_units, e_ref=problem.e_ref or 0))
        if problem.model == "reservoir":
            ax.set_xscale("log")
            if name == "intensity":
                ax.set_yscale("log")
        ax.legend(fontsize=7)
    title = "coherent drive: up and down sweeps" if problem.model == "coherent" else (
        "nonresonant drive: reservoir model")
    fig.suptitle(f"{title} ({'converged' if result.converged else 'NOT converged'})")
    fig.tight_layout()
    return fig


#: threshold draws marked on the fit figure, with their line style and label
_THRESHOLDS = (("power_up_threshold", "--", "up-sweep threshold"),
               ("power_down_threshold", ":", "down-sweep threshold"),
               ("threshold_power", "--", "condensation threshold"))


def _mark_thresholds(ax, result) -> None:
    """Vertical lines at the median thresholds, with their 68 % intervals shaded."""
    post = result.posterior
    for name, style, label in _THRESHOLDS:
        if name not in post:
            continue
        values = np.asarray(result.draws(name), dtype=float)
        values = values[np.isfinite(values)]
        if values.size == 0:
            continue
        lo, med, hi = np.percentile(values, [16, 50, 84])
        spot = " (spot centre)" if getattr(result, "spot", "point") == "gaussian" else ""
        ax.axvspan(lo, hi, color="0.5", alpha=0.15, lw=0)
        ax.axvline(med, color="0.2", ls=style, lw=1.0,
                   label=f"{label}{spot}: {med:.3g} mW (68 % band)")


def residual_points(ax, problem, r: np.ndarray, *, labelled: bool = False) -> float:
    """Draw normalised residuals ``r`` against power, one colour per sweep run.

    Adds the zero line and the +-2 sigma lines; ``labelled`` names the sweep runs for a
    legend.  Returns the rms of the finite residuals (NaN if none).
    """
    for start, stop, label in problem.segments:
        sl = slice(start, stop)
        ax.plot(problem.power[sl], r[sl], "o", ms=3, color=SWEEP_COLOURS.get(label, "tab:blue"),
                label=label if labelled and label != "none" else None)
    ax.axhline(0, color="0.3", lw=0.8)
    for s in (-2, 2):
        ax.axhline(s, color="0.6", lw=0.6, ls="--")
    return float(np.sqrt(np.nanmean(r**2))) if np.isfinite(r).any() else float("nan")


def residual_figure(result, *, n_draws: int = 300):
    """Normalised residuals ``(data - model) / (noise x error)`` of every fitted observable.

    The model is the per-point posterior median of the mean model and the noise the
    median of its noise parameter.
    """
    plt = _plt()
    problem = result.problem()
    theta = posterior_matrix(result, n_draws)
    model = problem.fit_space_model(theta)
    names = list(problem.channels)
    fig, axes = plt.subplots(len(names), 1, figsize=(6.4, 2.4 * len(names)), squeeze=False,
                             sharex=True)
    for ax, name in zip(axes[:, 0], names, strict=True):
        ch = problem.channels[name]
        k = float(np.median(result.draws(ch.noise_param)))
        r = ch.residuals(np.median(model[name], axis=0), k)
        rms = residual_points(ax, problem, r, labelled=True)
        ax.set_ylabel(f"{name}\n[sigma]", fontsize=8)
        ax.set_title(f"{name}: rms {rms:.2f} sigma (noise factor {k:.3g})", fontsize=8)
        if problem.model == "reservoir":
            ax.set_xscale("log")
        if any(lab != "none" for *_, lab in problem.segments):
            ax.legend(fontsize=7)
    axes[-1, 0].set_xlabel("pump power [mW]")
    fig.tight_layout()
    return fig


def corner_figure(result):
    """Corner plot (corner) of the sampled physics parameters (noise parameters left out)."""
    noise = {c.noise_param for c in result.problem().channels.values()}
    names = [n for n in result.space.names if n not in noise]
    return _mpl.corner_figure(*corner_data(result, names))


def power_figures(result, folder: str | os.PathLike) -> list[Path]:
    """Write ``fit.png``, ``residuals.png``, ``corner.png`` and ``traces.png`` into ``folder``."""
    return write_figures(result, folder, (("fit.png", fit_figure),
                                          ("residuals.png", residual_figure),
                                          ("corner.png", corner_figure),
                                          ("traces.png", trace_figure)))

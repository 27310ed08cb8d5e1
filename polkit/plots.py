"""Figures of results (matplotlib, Agg-safe). Each function writes its PNGs atomically.

Colours follow matplotlib's defaults and a perceptually uniform colour map for maps.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from . import io

__all__ = ["dispersion_figures", "fit_figure", "corner_figure", "trace_figure", "residual_figure"]

_BAND = (16.0, 84.0)


def _plt():
    import matplotlib

    if matplotlib.get_backend().lower() not in ("agg", "module://matplotlib_inline.backend_inline"):
        try:
            matplotlib.use("Agg", force=False)
        except Exception:  # noqa: BLE001 - a GUI backend already in use is fine
            pass
    import matplotlib.pyplot as plt

    return plt


def problem_from_result(result):
    """Rebuild the :class:`DispersionProblem` of a dispersion result (data, noise, space)."""
    from .workflows.dispersion_model import DispersionProblem, in_plane_axis

    obs = result.tree["observed_data"].to_dataset()
    da = obs["map"]
    axis = in_plane_axis(da)
    n_exc = int(result.tree.attrs.get("n_excitons", 1))
    return DispersionProblem(
        axis=axis,
        in_plane=da[axis].values.astype(float),
        energy=da["energy"].values.astype(float),
        y=np.asarray(da.values, dtype=float),
        inv_var=np.asarray(obs["inverse_variance"].values, dtype=float),
        space=result.space,
        n_excitons=n_exc,
        kind=result.kind,
    ), da


def _theta(result, max_draws: int | None = None, seed: int = 0) -> np.ndarray:
    names = result.space.names
    theta = np.stack([result.draws(n) for n in names], axis=-1)
    if max_draws is not None and theta.shape[0] > max_draws:
        idx = np.random.default_rng(seed).choice(theta.shape[0], max_draws, replace=False)
        theta = theta[np.sort(idx)]
    return theta


def fit_figure(result, *, ax=None, log_scale: bool = True, n_draws: int = 300):
    """The map with the fitted branches (median and 68 % band) and the bare modes."""
    plt = _plt()
    problem, da = problem_from_result(result)
    theta = _theta(result, n_draws)
    grid = np.linspace(problem.in_plane.min(), problem.in_plane.max(), 200)
    _, branches, cav, exs = problem.branch_curves(theta, grid)
    if ax is None:
        fig, ax = plt.subplots(figsize=(6.4, 4.8))
    else:
        fig = ax.figure
    z = np.asarray(da.values, dtype=float)
    if log_scale:
        floor = np.nanpercentile(z, 5)
        z = np.log10(np.clip(z - floor + 1.0, 1.0, None)) if result.kind == "emission" else z
    mesh = ax.pcolormesh(problem.in_plane, problem.energy, z.T, shading="nearest", cmap="magma")
    fig.colorbar(
        mesh,
        ax=ax,
        label=(
            "log10 counts above floor"
            if log_scale and result.kind == "emission"
            else da.attrs.get("units", "")
        ),
    )
    for b in range(branches.shape[-1]):
        lo, hi = np.percentile(branches[..., b], _BAND, axis=0)
        ax.fill_between(grid, lo, hi, color="tab:cyan", alpha=0.35, lw=0)
        ax.plot(
            grid,
            np.median(branches[..., b], axis=0),
            color="tab:cyan",
            lw=1.2,
            label="polariton branches (median, 68 %)" if b == 0 else None,
        )
    ax.plot(grid, np.median(cav, axis=0), "w--", lw=1, label="bare cavity")
    for i in range(exs.shape[-1]):
        ax.axhline(
            np.median(exs[:, i]), color="w", ls=":", lw=1, label="bare exciton" if i == 0 else None
        )
    ax.set_xlabel(f"{problem.axis} [{'degree' if problem.axis == 'angle' else '1/um'}]")
    ax.set_ylabel("energy [eV]")
    ax.set_ylim(problem.energy.min(), problem.energy.max())
    ax.legend(loc="upper center", fontsize=8, framealpha=0.6)
    ax.set_title(f"{result.model}, {result.kind}: fit of the map")
    return fig


def residual_figure(result):
    """Normalised residuals (data - model) / sigma of the posterior-median parameters."""
    plt = _plt()
    problem, da = problem_from_result(result)
    med = np.median(_theta(result), axis=0)
    sol = problem.model_map(med)
    model = np.asarray(sol.model).reshape(problem.y.shape)
    s = (
        med[problem.space.names.index("noise_scale")]
        if "noise_scale" in problem.space.names
        else 1.0
    )
    resid = (problem.y - model) * np.sqrt(problem.inv_var) / s
    fig, ax = plt.subplots(figsize=(6.4, 4.8))
    mesh = ax.pcolormesh(
        problem.in_plane, problem.energy, resid.T, shading="nearest", cmap="RdBu_r", vmin=-4, vmax=4
    )
    fig.colorbar(mesh, ax=ax, label="normalised residual [sigma]")
    ax.set_xlabel(problem.axis)
    ax.set_ylabel("energy [eV]")
    ax.set_title(f"residuals: rms {np.sqrt(np.nanmean(resid[problem.inv_var > 0] ** 2)):.2f} sigma")
    return fig


def corner_figure(result, names: list[str] | None = None):
    """Corner plot (corner) of the sampled parameters and the detuning."""
    import corner

    _plt()
    names = names or [n for n in result.space.names if n != "noise_scale"] + (
        ["detuning"] if "detuning" in result.posterior else []
    )
    data = np.stack([result.draws(n) for n in names], axis=-1)
    units = [result.posterior[n].attrs.get("units", "") for n in names]
    labels = [f"{n}\n[{u}]" if u and u != "1" else n for n, u in zip(names, units, strict=True)]
    fig = corner.corner(
        data,
        labels=labels,
        quantiles=[0.16, 0.5, 0.84],
        show_titles=False,
        label_kwargs={"fontsize": 8},
    )
    return fig


def trace_figure(result):
    """Traces of the stored draws per walker (thinned, after burn-in)."""
    plt = _plt()
    names = result.space.names
    fig, axes = plt.subplots(len(names), 1, figsize=(7, 1.3 * len(names)), sharex=True)
    axes = np.atleast_1d(axes)
    for ax, n in zip(axes, names, strict=True):
        v = result.posterior[n].values
        ax.plot(v.T, lw=0.4, alpha=0.5)
        ax.set_ylabel(n, fontsize=7)
    axes[-1].set_xlabel("stored draw (after burn-in and thinning)")
    return fig


def dispersion_figures(result, folder: str | os.PathLike) -> list[Path]:
    """Write fit.png, residuals.png, corner.png and traces.png into ``folder``."""
    plt = _plt()
    folder = Path(folder)
    written = []
    for name, make in (
        ("fit.png", fit_figure),
        ("residuals.png", residual_figure),
        ("corner.png", corner_figure),
        ("traces.png", trace_figure),
    ):
        fig = make(result)
        try:
            written.append(io.save_figure(folder / name, fig))
        finally:
            plt.close(fig)
    return written

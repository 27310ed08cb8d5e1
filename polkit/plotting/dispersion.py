"""Figures of results (matplotlib, Agg-safe). Each function writes its PNGs atomically.

Colours follow matplotlib's defaults and a perceptually uniform colour map for maps.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from polkit.plotting import base as _mpl
from polkit.plotting.base import corner_data, posterior_matrix, trace_figure, write_figures
from polkit.plotting.base import pyplot as _plt

__all__ = ["dispersion_figures", "fit_figure", "corner_figure", "trace_figure", "residual_figure",
           "normalised_residuals"]

_BAND = (16.0, 84.0)


def _patheffects():
    from matplotlib import patheffects

    return patheffects


def problem_from_result(result):
    """Rebuild the :class:`DispersionProblem` of a dispersion result (data, noise, space)."""
    from polkit.jobs.dispersion.problem import DispersionProblem, in_plane_axis

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
        background=str(result.tree.attrs.get("background", "constant")),
    ), da


def fit_figure(result, *, ax=None, log_scale: bool = True, n_draws: int = 300):
    """The map with the fitted branches (median and 68 % band) and the bare modes."""
    plt = _plt()
    problem, da = problem_from_result(result)
    theta = posterior_matrix(result, n_draws)
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
    units = str(da.attrs.get("units", "")) or "arbitrary units"
    fig.colorbar(
        mesh,
        ax=ax,
        label=(
            f"{result.kind} signal: log10(signal above its 5th percentile + 1) [{units}]"
            if log_scale and result.kind == "emission"
            else f"{result.kind} [{units}]"
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
    # bare modes drawn with a dark outline so they show on pale (reflectance) and dark maps
    halo = [_patheffects().withStroke(linewidth=2.4, foreground="0.1")]
    ax.plot(grid, np.median(cav, axis=0), "--", color="w", lw=1, label="bare cavity",
            path_effects=halo)
    for i in range(exs.shape[-1]):
        ax.axhline(
            np.median(exs[:, i]), color="w", ls=":", lw=1, label="bare exciton" if i == 0 else None,
            path_effects=halo,
        )
    ax.set_xlabel(f"{problem.axis} [{'degree' if problem.axis == 'angle' else '1/um'}]")
    ax.set_ylabel("energy [eV]")
    ax.set_ylim(problem.energy.min(), problem.energy.max())
    # the legend sits below the axes, outside the data
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=3, fontsize=7,
              frameon=False)
    route = {"whole_map": "whole-map fit", "peak_table": "peak-table fit"}.get(
        str(result.tree.attrs.get("fit_path", "")), "fit")
    ax.set_title(f"{result.model}, {result.kind}: {route} of the map", fontsize=9)
    fig.tight_layout()
    return fig


def normalised_residuals(problem, theta: np.ndarray) -> np.ndarray:
    """``(data - model) / (noise_scale sigma)`` per pixel of a dispersion problem at ``theta``.

    ``theta`` is one parameter vector; the model is the best linear fit of the map at it
    (amplitudes and backgrounds per angle), ``sigma`` from the problem's noise model.
    Masked pixels (inverse variance 0) give 0.
    """
    sol = problem.model_map(theta)
    model = np.asarray(sol.model).reshape(problem.y.shape)
    names = problem.space.names
    s = theta[names.index("noise_scale")] if "noise_scale" in names else 1.0
    return (problem.y - model) * np.sqrt(problem.inv_var) / s


def residual_figure(result):
    """Residuals (data - model) of the posterior-median parameters over the noise floor.

    The floor is estimated from the data alone (the detector model, or neighbour
    differences: :func:`polkit.jobs.dispersion.check.noise_floor`), not the noise model
    fitted to the residuals, so a misfit shows as structure and an rms above 1.  Pixels
    left out of the likelihood are blank.
    """
    from polkit.jobs.dispersion.check import noise_floor
    from polkit.jobs.dispersion.noise import detector_terms

    plt = _plt()
    problem, da = problem_from_result(result)
    theta = np.median(posterior_matrix(result), axis=0)
    model = np.asarray(problem.model_map(theta).model).reshape(problem.y.shape)
    ok = (problem.inv_var > 0) & np.isfinite(problem.y)
    var, how = noise_floor(problem.y, model, ok, detector_terms(da, problem.kind))
    resid = np.where(ok, (problem.y - model) / np.sqrt(np.maximum(var, 1e-300)), np.nan)
    fig, ax = plt.subplots(figsize=(6.4, 4.8))
    mesh = ax.pcolormesh(
        problem.in_plane, problem.energy, resid.T, shading="nearest", cmap="RdBu_r", vmin=-4, vmax=4
    )
    fig.colorbar(mesh, ax=ax, label="residual / noise floor")
    ax.set_xlabel(problem.axis)
    ax.set_ylabel("energy [eV]")
    rms = float(np.sqrt(np.nanmean(resid[ok] ** 2))) if ok.any() else float("nan")
    check = result.model_check
    verdict = "" if check is None else (" (check passed)" if check.get("passed")
                                        else " (check FAILED)")
    ax.set_title(f"residuals over the noise floor from {how}: rms {rms:.2f}{verdict}",
                 fontsize=9)
    return fig


def _corner_names(result) -> list[str]:
    """The corner plot's variables: the sampled parameters (not the noise scale), detuning."""
    return [n for n in result.space.names if n != "noise_scale"] + (
        ["detuning"] if "detuning" in result.posterior else []
    )


def corner_figure(result, names: list[str] | None = None):
    """Corner plot (corner) of the sampled parameters and the detuning."""
    return _mpl.corner_figure(*corner_data(result, names or _corner_names(result)))


def dispersion_figures(result, folder: str | os.PathLike, *,
                       corner_process=None) -> list[Path]:
    """Write fit.png, residuals.png, corner.png, traces.png and spectra.png into ``folder``.

    With ``corner_process`` (a :class:`polkit.plotting.corner_process.CornerProcess`), the corner
    plot is drawn there while the other figures are drawn here; where that fails it is
    drawn here.  The files are the same either way.
    """
    folder = Path(folder)
    in_process = corner_process is not None and corner_process.submit(
        folder / "corner.png", *corner_data(result, _corner_names(result)))
    from polkit.plotting.spectra import spectra_figure

    fit, residuals, traces, spectra = write_figures(
        result, folder, (("fit.png", fit_figure), ("residuals.png", residual_figure),
                         ("traces.png", trace_figure), ("spectra.png", spectra_figure)))
    corner = corner_process.result() if in_process else None
    if corner is None:
        corner = write_figures(result, folder, (("corner.png", corner_figure),))[0]
    return [fit, residuals, corner, traces, spectra]

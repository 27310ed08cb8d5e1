"""The spectra figure of a dispersion result: data and model at several angles.

The first thing a referee asks for beside a fitted map: do the line shapes follow the data?
Each panel is one spectrum (one angle or k) with the data, the model at the posterior median
and its 68 % band over posterior draws (amplitudes and backgrounds solved per draw, as the
fit does); masked pixels are shown as open markers.
"""

from __future__ import annotations

import numpy as np

from polkit.plotting.base import posterior_matrix
from polkit.plotting.base import pyplot as _plt

__all__ = ["spectra_figure", "pick_spectra"]

_ROUTE = {"whole_map": "whole-map fit", "peak_table": "peak-table fit"}


def pick_spectra(in_plane: np.ndarray, n: int = 6) -> np.ndarray:
    """Indices of ``n`` spectra spread evenly over the in-plane axis (ends included)."""
    n = int(min(n, in_plane.size))
    return np.unique(np.round(np.linspace(0, in_plane.size - 1, n)).astype(int))


def spectra_figure(result, *, n_spectra: int = 6, n_draws: int = 60):
    """Data and model (median and 68 % band) of ``n_spectra`` spectra across the map."""
    from polkit.plotting.dispersion import problem_from_result

    plt = _plt()
    problem, da = problem_from_result(result)
    theta = posterior_matrix(result, n_draws)
    models = np.stack([np.asarray(problem.model_map(t).model).reshape(problem.y.shape)
                       for t in theta])
    median = problem.model_map(np.median(theta, axis=0)).model
    median = np.asarray(median).reshape(problem.y.shape)
    lo, hi = np.percentile(models, (16.0, 84.0), axis=0)
    rows = pick_spectra(problem.in_plane, n_spectra)
    ncol = 3 if rows.size > 4 else rows.size
    nrow = int(np.ceil(rows.size / ncol))
    fig, axes = plt.subplots(nrow, ncol, figsize=(3.2 * ncol, 2.4 * nrow), squeeze=False,
                             sharex=True)
    energy = problem.energy
    units = da.attrs.get("units", "")
    axis_units = "degree" if problem.axis == "angle" else "1/um"
    for ax, i in zip(axes.flat, rows, strict=False):
        y = problem.y[i]
        used = problem.inv_var[i] > 0
        ax.plot(energy[used], y[used], ".", ms=2.0, color="0.25", label="data")
        if np.any(~used):
            ax.plot(energy[~used], np.where(np.isfinite(y[~used]), y[~used], np.nan), "o",
                    ms=3.0, mfc="none", color="tab:red", label="masked pixels")
        ax.fill_between(energy, lo[i], hi[i], color="tab:orange", alpha=0.4, lw=0)
        ax.plot(energy, median[i], color="tab:orange", lw=1.0, label="model (median, 68 %)")
        ax.set_title(f"{problem.axis} = {problem.in_plane[i]:.3g} {axis_units}", fontsize=8)
        ax.tick_params(labelsize=7)
    for ax in axes.flat[rows.size:]:
        ax.set_visible(False)
    for ax in axes[-1]:
        ax.set_xlabel("energy [eV]", fontsize=8)
    for ax in axes[:, 0]:
        ax.set_ylabel(f"signal [{units}]" if units else "signal", fontsize=8)
    handles, labels = axes.flat[0].get_legend_handles_labels()
    fig.legend(handles, labels, loc="lower center", ncol=len(labels), fontsize=7,
               frameon=False)
    route = _ROUTE.get(str(result.tree.attrs.get("fit_path", "")), "fit")
    fig.suptitle(f"spectra across the map: data and {result.model} model ({route})",
                 fontsize=9)
    fig.tight_layout(rect=(0, 0.06, 1, 0.95))
    return fig

"""Figures of a wafer survey (matplotlib, Agg-safe); each is written atomically.

* ``wafer_maps.png``: one panel per quantity across the wafer (detuning, Rabi splitting,
  cavity, exciton and lower-polariton linewidths, photon fraction at k = 0), positions
  coloured by the posterior median, with the zero-detuning line of the fitted surface;
* ``wafer_detuning.png``: the detuning at each position over the fitted smooth surface,
  the zero-detuning line, its band (where zero lies inside the pointwise interval of the
  surface) and the gradient.

Marker code in every panel: a filled square is a converged position; a square with a
thick orange edge did not pass its convergence gate (its value is shown but not used for
the surface); a grey cross failed (no value).
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from polkit import files
from polkit.plotting.base import pyplot

__all__ = ["survey_figures", "maps_figure", "detuning_figure", "wafer_map", "MAP_QUANTITIES"]

#: quantities drawn in ``wafer_maps.png`` (those present in the survey), with short titles
MAP_QUANTITIES: dict[str, str] = {
    "detuning": "detuning",
    "rabi_splitting": "Rabi splitting",
    "cavity_linewidth": "cavity linewidth",
    "exciton_linewidth": "exciton linewidth",
    "lp_linewidth_k0": "LP linewidth at k = 0",
    "photon_fraction_k0": "photon fraction at k = 0",
}


def _marker_size(n: int) -> float:
    return float(np.clip(2400.0 / max(n, 1), 12.0, 160.0))


def _limits(ds) -> tuple[float, float, float, float]:
    """Axis limits: the positions plus a margin so that edge markers are not clipped."""
    x = np.asarray(ds["x"].values, dtype=float)
    y = np.asarray(ds["y"].values, dtype=float)
    ok = np.isfinite(x) & np.isfinite(y)
    if not ok.any():
        return -1.0, 1.0, -1.0, 1.0
    x, y = x[ok], y[ok]
    pad = 0.08 * max(float(np.ptp(x)), float(np.ptp(y)), 1.0)
    # more room below: the values are printed under the markers
    return x.min() - pad, x.max() + pad, y.min() - 2.0 * pad, y.max() + pad


def _norm(name: str, values: np.ndarray, half: np.ndarray | None = None):
    """Colour scaling from the values; never narrower than 4 typical 68 % half-widths, so a
    map whose values differ by less than their uncertainty does not stretch noise over the
    whole colour map."""
    from matplotlib.colors import Normalize, TwoSlopeNorm

    finite = values[np.isfinite(values)]
    if finite.size == 0:
        return Normalize(0.0, 1.0), "viridis"
    lo, hi = float(finite.min()), float(finite.max())
    if half is not None and np.isfinite(half).any():
        need = 4.0 * float(np.nanmedian(half))
        if hi - lo < need:
            mid = 0.5 * (lo + hi)
            lo, hi = mid - 0.5 * need, mid + 0.5 * need
    if hi <= lo:
        lo, hi = lo - 0.5 * max(abs(lo), 1e-9), hi + 0.5 * max(abs(hi), 1e-9)
    if name == "detuning" and lo < 0.0 < hi:
        return TwoSlopeNorm(vcenter=0.0, vmin=lo, vmax=hi), "RdBu_r"
    return Normalize(lo, hi), "RdBu_r" if name == "detuning" else "viridis"


def wafer_map(ds, name: str, *, ax=None, statistic: str = "median", surface=None,
              norm=None, cmap=None, colorbar: bool = True, title: str | None = None):
    """Draw one quantity of a survey across the wafer.

    Parameters
    ----------
    ds
        The survey Dataset (:func:`polkit.jobs.survey.result.assemble_survey`).
    name
        A variable on ``(position, statistic)`` or ``position``.
    ax
        Axes to draw on (a new figure when ``None``).
    statistic
        Which summary value colours the markers.
    surface
        A :class:`~polkit.jobs.survey.surface.SurfaceFit` of the detuning: its zero line is
        drawn.
    norm, cmap
        Colour scaling (default: from the data; diverging about zero for detuning).
    colorbar
        Add a colour bar labelled with the units.
    title
        Panel title (default from :data:`MAP_QUANTITIES`).

    Returns
    -------
    matplotlib.axes.Axes
    """
    plt = pyplot()
    if ax is None:
        _, ax = plt.subplots(figsize=(5.0, 4.2))
    var = ds[name]
    values = np.asarray(var.sel(statistic=statistic).values if "statistic" in var.dims
                        else var.values, dtype=float)
    x = np.asarray(ds["x"].values, dtype=float)
    y = np.asarray(ds["y"].values, dtype=float)
    status = np.array([str(s) for s in ds["status"].values])
    size = _marker_size(len(x))
    half = None
    if "statistic" in var.dims and {"q16", "q84"} <= set(map(str, var["statistic"].values)):
        half = 0.5 * (np.asarray(var.sel(statistic="q84").values, dtype=float)
                      - np.asarray(var.sel(statistic="q16").values, dtype=float))
    auto_norm, auto_cmap = _norm(name, values, half)
    norm = norm or auto_norm
    cmap = cmap or auto_cmap
    shown = np.isfinite(values) & np.isfinite(x) & np.isfinite(y)
    ok = shown & (status == "ok")
    nc = shown & (status != "ok")
    art = ax.scatter(x[ok], y[ok], c=values[ok], s=size, marker="s", norm=norm, cmap=cmap,
                     edgecolors="k", linewidths=0.4, zorder=3)
    if nc.any():
        art = ax.scatter(x[nc], y[nc], c=values[nc], s=size, marker="s", norm=norm, cmap=cmap,
                         edgecolors="tab:orange", linewidths=2.0, zorder=3,
                         label="did not converge")
    if half is not None:  # hatch the positions whose interval spans a quarter of the colours
        span = float(norm.vmax - norm.vmin) if norm.vmax is not None else np.inf
        wide = shown & np.isfinite(half) & (2.0 * half > 0.25 * span)
        if wide.any():
            ax.scatter(x[wide], y[wide], s=size, marker="s", facecolors="none",
                       edgecolors="0.3", hatch="////", linewidths=0.0, zorder=4,
                       label="68 % interval > 1/4 of the colour range")
    bad = ~shown & np.isfinite(x) & np.isfinite(y)
    if bad.any():
        ax.scatter(x[bad], y[bad], marker="x", s=0.6 * size, c="0.5", zorder=3, label="failed")
    if np.count_nonzero(shown) <= 30:  # few positions: print the values under the markers
        errs = half[shown] if half is not None else np.full(np.count_nonzero(shown), np.nan)
        for xi, yi, vi, ei in zip(x[shown], y[shown], values[shown], errs, strict=True):
            text = f"{vi:.3g}" if not np.isfinite(ei) else f"{vi:.3g}\n±{ei:.2g}"
            ax.annotate(text, (xi, yi), xytext=(0, -0.9 * np.sqrt(size) - 2),
                        textcoords="offset points", ha="center", va="top", fontsize=6.5,
                        zorder=5)
    if surface is not None:
        _zero_line(ax, surface, band=False)
    if colorbar:
        units = var.attrs.get("units", "")
        label = MAP_QUANTITIES.get(name, var.attrs.get("long_name", name))
        cb = ax.figure.colorbar(art, ax=ax, shrink=0.9)
        cb.set_label(f"{label} [{units}]" if units and units != "1" else label)
    ax.set_title(title or MAP_QUANTITIES.get(name, name))
    ax.set_xlabel("x [mm]")
    ax.set_ylabel("y [mm]")
    x0, x1, y0, y1 = _limits(ds)
    ax.set_xlim(x0, x1)
    ax.set_ylim(y0, y1)
    ax.set_aspect("equal", adjustable="box")
    return ax


def _zero_line(ax, surface, *, band: bool) -> None:
    xx, yy, mean, se = surface.grid(161)
    if np.nanmin(mean) < 0.0 < np.nanmax(mean):
        ax.contour(xx, yy, mean, levels=[0.0], colors="k", linewidths=1.6, zorder=4)
    if band:
        inside = (np.abs(mean) <= surface.z * se).astype(float)
        if inside.any():
            ax.contourf(xx, yy, inside, levels=[0.5, 1.5], colors=["0.2"], alpha=0.25,
                        zorder=2)


def detuning_figure(ds, surface):
    """The detuning across the wafer over its fitted surface, with the zero line and band.

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = pyplot()
    fig, ax = plt.subplots(figsize=(6.4, 5.2))
    if "detuning" not in ds:
        ax.text(0.5, 0.5, "no detuning: every position failed", ha="center",
                transform=ax.transAxes)
        return fig
    values = ds["detuning"].sel(statistic="median").values
    norm, cmap = _norm("detuning", np.asarray(values, dtype=float))
    if surface is not None:
        x0, x1, y0, y1 = _limits(ds)
        xx, yy = np.meshgrid(np.linspace(x0, x1, 201), np.linspace(y0, y1, 201))
        mean, _ = surface.evaluate(xx, yy)
        both = np.concatenate([np.asarray(values, float)[np.isfinite(values)], mean.ravel()])
        norm, cmap = _norm("detuning", both)
        ax.imshow(mean, extent=(x0, x1, y0, y1), origin="lower", norm=norm, cmap=cmap,
                  alpha=0.45, zorder=1, interpolation="bilinear", aspect="auto")
        _zero_line(ax, surface, band=True)
    wafer_map(ds, "detuning", ax=ax, norm=norm, cmap=cmap, title="detuning across the wafer")
    if surface is not None:
        g = surface.gradient_summary()
        pct = int(round(100 * surface.confidence))
        text = (
            f"degree-{surface.degree} surface, {len(surface.values)} positions\n"
            f"gradient at ({g['at_mm'][0]:.1f}, {g['at_mm'][1]:.1f}) mm:\n"
            f"  d/dx = {g['x']['value']:.3g} +/- {g['x']['sigma']:.2g} {g['units']}\n"
            f"  d/dy = {g['y']['value']:.3g} +/- {g['y']['sigma']:.2g} {g['units']}\n"
            f"black line: zero detuning; shaded: {pct} % band"
        )
        ax.text(0.0, -0.14, text, transform=ax.transAxes, fontsize=7.5, va="top",
                family="monospace")
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(loc="upper right", fontsize=7)
    fig.tight_layout()
    return fig


def maps_figure(ds, surface=None):
    """One panel per quantity of :data:`MAP_QUANTITIES` present in the survey.

    Returns
    -------
    matplotlib.figure.Figure
    """
    plt = pyplot()
    names = [n for n in MAP_QUANTITIES if n in ds]
    if not names:
        fig, ax = plt.subplots(figsize=(5.0, 4.0))
        ax.text(0.5, 0.5, "no fitted position to map", ha="center", transform=ax.transAxes)
        ax.set_axis_off()
        return fig
    ncol = min(3, len(names))
    nrow = int(np.ceil(len(names) / ncol))
    fig, axes = plt.subplots(nrow, ncol, figsize=(4.6 * ncol, 3.9 * nrow), squeeze=False)
    for ax, name in zip(axes.ravel(), names, strict=False):
        wafer_map(ds, name, ax=ax, surface=surface)
    for ax in axes.ravel()[len(names):]:
        ax.set_axis_off()
    counts = {s: int((ds["status"] == s).sum()) for s in ("ok", "not_converged", "failed")}
    fig.suptitle(
        f"wafer survey: {counts['ok']} converged, {counts['not_converged']} not converged, "
        f"{counts['failed']} failed (posterior medians; black line: zero detuning)",
        fontsize=10,
    )
    fig.tight_layout()
    return fig


def survey_figures(ds, surface, folder: str | os.PathLike) -> list[Path]:
    """Write ``wafer_maps.png`` and ``wafer_detuning.png`` into ``folder`` (atomically).

    Returns
    -------
    list of Path
        The files written.
    """
    plt = pyplot()
    folder = Path(folder)
    written = []
    for name, make in (("wafer_maps.png", lambda: maps_figure(ds, surface)),
                       ("wafer_detuning.png", lambda: detuning_figure(ds, surface))):
        fig = make()
        try:
            written.append(files.save_figure(folder / name, fig))
        finally:
            plt.close(fig)
    return written

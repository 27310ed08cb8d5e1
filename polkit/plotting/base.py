"""matplotlib for polkit's figures: a headless-safe pyplot and pieces every figure shares.

* :func:`pyplot`: ``matplotlib.pyplot`` with a non-interactive backend unless the session
  already has one (a notebook's inline backend, or a GUI backend in use);
* :func:`posterior_matrix`: the draws of a result as a ``(draws, parameters)`` array,
  optionally a seeded subset;
* :func:`corner_data`: draws and unit-carrying labels for a corner plot;
* :func:`trace_figure`: the stored draws per walker;
* :func:`write_figures`: render a set of figures of a result and write them atomically.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Sequence
from pathlib import Path

import numpy as np

from polkit import files

__all__ = ["pyplot", "posterior_matrix", "corner_data", "trace_figure", "write_figures"]


def pyplot():
    """``matplotlib.pyplot``, switched to Agg unless Agg or the inline backend is active.

    A GUI backend already in use is left alone.
    """
    import matplotlib

    if matplotlib.get_backend().lower() not in ("agg", "module://matplotlib_inline.backend_inline"):
        try:
            matplotlib.use("Agg", force=False)
        except Exception:  # noqa: BLE001 - a GUI backend already in use is fine
            pass
    import matplotlib.pyplot as plt

    return plt


def posterior_matrix(result, max_draws: int | None = None, seed: int = 0) -> np.ndarray:
    """The posterior draws of every sampled parameter, shape ``(draws, parameters)``.

    With ``max_draws``, a subset of that many draws chosen without replacement by a
    generator seeded with ``seed`` (kept in draw order), so a figure is reproducible.
    """
    names = result.space.names
    theta = np.stack([result.draws(n) for n in names], axis=-1)
    if max_draws is not None and theta.shape[0] > max_draws:
        idx = np.random.default_rng(seed).choice(theta.shape[0], max_draws, replace=False)
        theta = theta[np.sort(idx)]
    return theta


def readable(result, name: str) -> tuple[np.ndarray, str]:
    """Draws of ``name`` for a figure axis, and the axis label.

    Levels in eV (exciton and cavity energies) are shown in meV as offsets from a stated
    reference (the median rounded to 0.1 meV), so tick labels read ``-0.2, 0, 0.2`` rather
    than ``1e-5 + 1.545``; the label names the reference.  Other quantities keep their
    units.  The label uses the variable's ``long_name`` when it has one.
    """
    var = result.posterior[name]
    values = np.asarray(result.draws(name), dtype=float)
    units = str(var.attrs.get("units", ""))
    long = str(var.attrs.get("long_name", name)) or name
    long = long if len(long) <= 34 else name.replace("_", " ")
    if units == "eV":
        finite = values[np.isfinite(values)]
        ref = round(float(np.median(finite)) * 1e4) / 10.0 if finite.size else 0.0  # meV
        return values * 1e3 - ref, f"{long}\n[meV, minus {ref:.1f} meV]"
    return values, f"{long}\n[{units}]" if units and units != "1" else long


def corner_data(result, names: Sequence[str]) -> tuple[np.ndarray, list[str]]:
    """Draws of ``names`` (shape ``(draws, len(names))``) and readable labels with units.

    Energies in eV are shown as meV offsets from a stated reference (:func:`readable`).
    """
    pairs = [readable(result, n) for n in names]
    return np.stack([v for v, _ in pairs], axis=-1), [lab for _, lab in pairs]


class _NoContourNotes(logging.Filter):
    """Drops corner's note that a 2-D panel has too few distinct points for contours."""

    def filter(self, record: logging.LogRecord) -> bool:
        return "Too few points to create valid contours" not in record.getMessage()


def corner_figure(data: np.ndarray, labels: Sequence[str]):
    """A corner plot (corner) with 16/50/84 % quantiles.

    corner logs a warning on the root logger for every panel of a parameter held at one
    value (e.g. pinned at a prior bound), which is not news in a plot that shows it; those
    notes are dropped while the plot is drawn.
    """
    from polkit._arviz import arviz

    arviz()  # corner imports ArviZ: the one polkit imported, without its numba kernels
    import corner

    pyplot()
    root = logging.getLogger()
    quiet = _NoContourNotes()
    root.addFilter(quiet)
    try:
        return corner.corner(data, labels=list(labels), quantiles=[0.16, 0.5, 0.84],
                             show_titles=False, label_kwargs={"fontsize": 8})
    finally:
        root.removeFilter(quiet)


def trace_figure(result):
    """Traces of the stored draws per walker (after burn-in and thinning)."""
    plt = pyplot()
    names = result.space.names
    fig, axes = plt.subplots(len(names), 1, figsize=(7, 1.3 * len(names)), sharex=True,
                             squeeze=False)
    for ax, n in zip(axes[:, 0], names, strict=True):
        values, label = readable(result, n)
        shaped = values.reshape(result.posterior[n].transpose("chain", "draw").shape)
        ax.plot(shaped.T, lw=0.4, alpha=0.5)
        ax.set_ylabel(label, fontsize=6)
    axes[-1, 0].set_xlabel("stored draw (after burn-in and thinning)")
    return fig


def write_figures(result, folder: str | os.PathLike,
                  makers: Sequence[tuple[str, Callable]]) -> list[Path]:
    """Render ``(file name, figure function)`` pairs of ``result`` and write each atomically.

    Each figure is closed after it is written, whatever happens.

    Returns
    -------
    list of Path
        The files written, in the order of ``makers``.
    """
    plt = pyplot()
    folder = Path(folder)
    written = []
    for name, make in makers:
        fig = make(result)
        try:
            written.append(files.save_figure(folder / name, fig))
        finally:
            plt.close(fig)
    return written

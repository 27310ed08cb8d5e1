"""Figures of an energy budget: what one activation is made of, and what drives its spread.

Both functions take a :class:`polkit.jobs.budget.result.BudgetResult` (anything with its
``draws``, ``counted`` and ``sensitivity`` members) and return a matplotlib
:class:`~matplotlib.figure.Figure` built outside pyplot;
:func:`budget_figures` writes them atomically with :func:`polkit.files.save_figure`.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from polkit import files

__all__ = ["breakdown_figure", "waterfall_figure", "sensitivity_figure", "budget_figures"]

# (budget line, label); the subtotal after the first three is energy_per_activation
_STEPS = (
    ("control_optical", "control pulses"),
    ("modulators", "input modulators"),
    ("detectors", "output detectors"),
    ("holding_optical", "holding beam"),
    ("laser_wallplug", "laser wall-plug loss"),
    ("cooling", "cooling"),
)


def _cumulative(result) -> tuple[list[str], np.ndarray, np.ndarray]:
    """Per-draw running sums of the lines, in fJ: (names, (steps, draws), line draws)."""
    lines = np.stack([np.asarray(result.draws(name), dtype=float) for name, _ in _STEPS])
    return [name for name, _ in _STEPS], np.cumsum(lines, axis=0), lines


def breakdown_figure(result, *, ax=None):
    """What one array activation costs, line by line, on a linear energy axis.

    Top panel: one bar per budget line whose length is the median contribution (fJ) on a
    linear axis, so bar lengths are proportional to contributions; black whiskers are 95 %
    intervals of each line; the label gives the median and its share of the median total.
    Bottom panel: the same medians stacked as shares of their sum (100 %).  Lines that are
    not counted are labelled so.
    """
    import matplotlib

    names, _, lines = _cumulative(result)
    counted = result.counted
    if ax is None:
        fig = _figure((8.0, 5.2))
        ax, share_ax = fig.subplots(2, 1, gridspec_kw={"height_ratios": [4, 1]})
    else:
        fig, share_ax = ax.figure, None
    colours = matplotlib.rcParams["axes.prop_cycle"].by_key()["color"]
    med = np.median(lines, axis=1)
    lo, hi = np.percentile(lines, [2.5, 97.5], axis=1)
    total = float(np.sum(med)) or 1.0
    labels = []
    for k, (name, label) in enumerate(_STEPS):
        not_counted = counted.get(name, "").startswith("not counted")
        ax.barh(k, med[k], color=colours[k % len(colours)], alpha=0.85)
        ax.plot([lo[k], hi[k]], [k, k], color="black", lw=1.0)
        text = ("not counted" if not_counted
                else f"{med[k]:.3g} fJ ({100.0 * med[k] / total:.3g} %)")
        ax.annotate(text, (max(med[k], hi[k]), k), xytext=(4, 0), textcoords="offset points",
                    va="center", fontsize=8)
        labels.append(label)
    ax.set_yticks(range(len(labels)), labels)
    ax.invert_yaxis()
    ax.set_xlim(0.0, 1.35 * max(float(hi.max()), float(med.max()), 1e-30))
    epa = float(np.median(np.asarray(result.draws("energy_per_activation"), dtype=float)))
    wall = float(np.median(np.asarray(result.draws("wall_energy_per_activation"), dtype=float)))
    ax.set_xlabel("contribution to one activation [fJ] (median; whiskers: 95 % interval)")
    ax.set_title(f"What one activation costs: {epa:.3g} fJ (control, modulators, detectors), "
                 f"{wall:.3g} fJ with every declared line", fontsize=9)
    if share_ax is not None:
        left = 0.0
        for k in range(len(_STEPS)):
            share = 100.0 * med[k] / total
            share_ax.barh(0, share, left=left, color=colours[k % len(colours)], alpha=0.85)
            if share >= 6.0:
                share_ax.annotate(f"{share:.0f} %", (left + share / 2, 0), ha="center",
                                  va="center", fontsize=7)
            left += share
        share_ax.set_xlim(0.0, 100.0)
        share_ax.set_yticks([])
        share_ax.set_xlabel("share of the sum of the medians [%]")
    fig.tight_layout()
    return fig


#: the former name of :func:`breakdown_figure` (kept for the 0.x series)
waterfall_figure = breakdown_figure


def sensitivity_figure(result):
    """Which input's uncertainty dominates: log-space variance shares and rank correlations.

    Left: variance share of ``ln(control_energy_per_node)`` per input (bars; they add up
    to 1) and first-order share ``Corr^2`` (dots).  Right: Spearman rank correlation of
    every uncertain input with ``wall_energy_per_activation``.
    """
    s = result.sensitivity()
    fig = _figure((10.0, 4.2))
    left, right = fig.subplots(1, 2)
    rows = s["factors"]
    names = [f"{r['input']} ({r['source']})" for r in rows]
    ypos = np.arange(len(rows))
    left.barh(ypos, [r["variance_share"] for r in rows], color="C0", label="variance share")
    left.plot([r["first_order_share"] for r in rows], ypos, "o", color="C3",
              label="first-order share (corr$^2$)")
    left.set_yticks(ypos, names, fontsize=8)
    left.invert_yaxis()
    left.axvline(0.0, color="0.5", lw=0.8)
    left.set_xlabel(f"share of Var ln E (sigma_log = {s['sigma_log_target']:.3g})")
    left.set_title(f"ln({s['target']})", fontsize=10)
    left.legend(fontsize=8, loc="lower right")
    ranks = s["rank_correlations"]
    rpos = np.arange(len(ranks))
    right.barh(rpos, [r["spearman"] for r in ranks], color="C2")
    right.set_yticks(rpos, [f"{r['input']} ({r['source']})" for r in ranks], fontsize=8)
    right.invert_yaxis()
    right.set_xlim(-1.0, 1.0)
    right.axvline(0.0, color="0.5", lw=0.8)
    right.set_xlabel("Spearman rank correlation")
    right.set_title(f"{s['rank_target']}", fontsize=10)
    fig.tight_layout()
    return fig


def budget_figures(result, folder: str | os.PathLike) -> list[Path]:
    """Write ``energy_per_activation_breakdown.png`` and ``budget_sensitivity.png``."""
    folder = Path(folder)
    return [files.save_figure(folder / name, make(result))
            for name, make in (("energy_per_activation_breakdown.png", breakdown_figure),
                               ("budget_sensitivity.png", sensitivity_figure))]


def _figure(size: tuple[float, float]):
    """A matplotlib Figure outside pyplot (no GUI backend, nothing to close)."""
    from matplotlib.figure import Figure

    return Figure(figsize=size)

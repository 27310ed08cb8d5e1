"""Figures of an energy budget: what one activation is made of, and what drives its spread.

Both functions take a :class:`polkit.workflows.budget.BudgetResult` (anything with its
``draws``, ``counted`` and ``sensitivity`` members) and return a matplotlib
:class:`~matplotlib.figure.Figure` built outside pyplot;
:func:`budget_figures` writes them atomically with :func:`polkit.io.save_figure`.
"""

from __future__ import annotations

import os
from pathlib import Path

import numpy as np

from . import io

__all__ = ["waterfall_figure", "sensitivity_figure", "budget_figures"]

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


def waterfall_figure(result, *, ax=None):
    """Waterfall of one array activation: each line added in turn, on a log energy axis.

    Bar ``k`` runs from the median of the running sum before line ``k`` to the median after
    it (per-draw running sums, so the last bar ends at the median of
    ``wall_energy_per_activation``); the black whiskers are 95 % intervals of the running
    sum.  Two summary bars show ``energy_per_activation`` (control + modulators +
    detectors) and the total with every declared line.  Lines that are not counted are
    labelled so.
    """
    import matplotlib

    names, cum, lines = _cumulative(result)
    counted = result.counted
    if ax is None:
        fig = _figure((8.0, 4.6))
        ax = fig.subplots()
    else:
        fig = ax.figure
    med = np.median(cum, axis=1)
    lo, hi = np.percentile(cum, [2.5, 97.5], axis=1)
    positive = med[med > 0]
    floor = 0.3 * positive.min() if positive.size else 1e-3
    labels, y = [], 0
    colours = matplotlib.rcParams["axes.prop_cycle"].by_key()["color"]
    start = floor
    for k, (name, label) in enumerate(_STEPS):
        end = max(med[k], floor)
        line_med = float(np.median(lines[k]))
        not_counted = counted.get(name, "").startswith("not counted")
        ax.barh(y, end - start, left=start, color=colours[k % len(colours)], alpha=0.85)
        ax.plot([lo[k], hi[k]], [y, y], color="black", lw=1.0)
        text = "not counted" if not_counted else f"+{line_med:.3g} fJ"
        ax.annotate(text, (max(end, hi[k]), y), xytext=(4, 0), textcoords="offset points",
                    va="center", fontsize=8)
        labels.append(label)
        start = end
        y += 1
        if name == "detectors":
            sub = np.asarray(result.draws("energy_per_activation"), dtype=float)
            m = float(np.median(sub))
            ax.barh(y, m - floor, left=floor, color="0.35")
            ax.annotate(f"{m:.3g} fJ", (m, y), xytext=(4, 0), textcoords="offset points",
                        va="center", fontsize=8)
            labels.append("= energy per activation")
            y += 1
    total = np.asarray(result.draws("wall_energy_per_activation"), dtype=float)
    m = float(np.median(total))
    ax.barh(y, m - floor, left=floor, color="0.15")
    ax.annotate(f"{m:.3g} fJ", (m, y), xytext=(4, 0), textcoords="offset points", va="center",
                fontsize=8)
    labels.append("= with every declared line")
    ax.set_xscale("log")
    ax.set_xlim(floor, 5 * max(hi.max(), m))
    ax.set_yticks(range(len(labels)), labels)
    ax.invert_yaxis()
    ax.set_xlabel("energy per activation (fJ), running sum; whiskers: 95 % interval")
    ax.set_title("What one activation costs (an estimate under stated assumptions)", fontsize=10)
    fig.tight_layout()
    return fig


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
    """Write ``budget_waterfall.png`` and ``budget_sensitivity.png`` into ``folder``."""
    folder = Path(folder)
    return [io.save_figure(folder / name, make(result))
            for name, make in (("budget_waterfall.png", waterfall_figure),
                               ("budget_sensitivity.png", sensitivity_figure))]


def _figure(size: tuple[float, float]):
    """A matplotlib Figure outside pyplot (no GUI backend, nothing to close)."""
    from matplotlib.figure import Figure

    return Figure(figsize=size)

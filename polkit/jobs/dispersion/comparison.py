"""The result of a dispersion model comparison: scores per model, ranking and verdict.

:func:`polkit.jobs.dispersion.compare.compare_models` builds a :class:`ModelComparison`
from one :class:`ModelScore` per fitted model (the criteria of
:mod:`polkit.jobs.dispersion.criteria`); it ranks the models, says which one the data
support and writes ``comparison.json`` with the caveats of the criterion.
"""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from polkit.files import json_safe, write_json, write_netcdf
from polkit.jobs.dispersion.criteria import PARETO_K_LIMIT, sum_and_se
from polkit.jobs.dispersion.run import DispersionFit

__all__ = [
    "CAVEATS",
    "COMPARISON_FILE",
    "POINTWISE_FILE",
    "MIN_DIFFERENCE_NATS",
    "MIN_DIFFERENCE_SE",
    "ModelScore",
    "ModelComparison",
]

#: the file a comparison writes beside one folder per model
COMPARISON_FILE = "comparison.json"
POINTWISE_FILE = "comparison_pointwise.nc"
#: a difference in elpd is taken as real when larger than this many nats and this many
#: standard errors (value from memory: Sivula, Magnusson and Vehtari, arXiv:2008.10296)
MIN_DIFFERENCE_NATS = 4.0
MIN_DIFFERENCE_SE = 2.0

CAVEATS = (
    "elpd estimated by PSIS-LOO over spectra (one angle or k left out at a time), in nats; "
    "WAIC reported as a cross-check.",
    "amplitudes and backgrounds are solved per spectrum, not sampled; their optimism is "
    "removed by one nat per active coefficient (Akaike correction, exact only for a "
    "linear-Gaussian model with known noise).",
    "the criteria rank predictive accuracy, not truth; a tie is broken in favour of the "
    "simpler model by convention.",
    f"PSIS-LOO is unreliable for spectra with Pareto k > {PARETO_K_LIMIT}; they are counted.",
    "one noise model, calibrated on the reference model's mode, is shared by all models.",
)
#: sampled parameters' complexity order, for breaking ties
_SIMPLICITY = {"weak": 0, "two": 1, "three": 2}


@dataclass
class ModelScore:
    """The information criteria of one fitted model (nats; see the module notes)."""

    model: str
    elpd_loo: float
    elpd_loo_se: float
    p_loo: float
    elpd_waic: float
    elpd_waic_se: float
    p_waic: float
    linear_per_spectrum: float
    n_parameters: int
    max_pareto_k: float
    n_high_k: int
    converged: bool
    elpd_i: np.ndarray = field(repr=False)
    pareto_k: np.ndarray = field(repr=False)
    #: False when the data do not identify what the model adds (it is then "not needed")
    identified: bool = True
    identification: str = ""


_UNITS = {"elpd_loo": "nat", "elpd_loo_se": "nat", "p_loo": "1", "elpd_waic": "nat",
          "elpd_waic_se": "nat", "p_waic": "1", "linear_per_spectrum": "1",
          "n_parameters": "1", "max_pareto_k": "1", "n_high_k": "1",
          "elpd_difference": "nat", "elpd_difference_se": "nat"}


@dataclass
class ModelComparison:
    """Ranked models of one map, their fits and the caveats of the criterion.

    Attributes
    ----------
    scores
        ``{model: ModelScore}`` in the order fitted.
    fits
        ``{model: DispersionFit}``.
    reference
        The model whose mode calibrated the shared noise model.
    noise_note
        How the shared noise model was set.
    axis, in_plane
        The in-plane axis name and values (one spectrum each).
    """

    scores: dict[str, ModelScore]
    fits: dict[str, DispersionFit]
    reference: str
    noise_note: str
    axis: str
    in_plane: np.ndarray
    source: str = ""

    @property
    def ranking(self) -> list[str]:
        """Models from the highest elpd (LOO) down."""
        return sorted(self.scores, key=lambda m: -self.scores[m].elpd_loo)

    @property
    def converged(self) -> bool:
        """Every identified model's fit converged.

        A model whose addition the data do not identify (a second exciton that cannot be
        told apart from none) is reported as not needed; its sampler may wander along the
        unidentified direction without converging, which does not make the comparison
        unreliable.
        """
        return all(s.converged for s in self.scores.values() if s.identified)

    def difference(self, model: str, other: str | None = None) -> tuple[float, float]:
        """``elpd(model) - elpd(other)`` and its standard error (paired over spectra).

        ``other`` defaults to the best model.  Source: Vehtari et al., Stat. Comput. 27,
        1413 (2017), eq. 24 (``se = sqrt(n var(d_i))``).
        """
        other = self.ranking[0] if other is None else other
        d = self.scores[model].elpd_i - self.scores[other].elpd_i
        return sum_and_se(d)

    def preferred(self) -> str:
        """The simplest model not clearly worse than the best (the verdict's model).

        A model is clearly worse when its elpd is lower by more than
        ``MIN_DIFFERENCE_NATS`` and by more than ``MIN_DIFFERENCE_SE`` standard errors.
        """
        best = self.ranking[0]
        ties = [m for m in self.scores if not self._clearly_worse(m, best)
                and self.scores[m].identified]
        if not ties:
            ties = [m for m in self.scores if self.scores[m].identified] or list(self.scores)
        return min(ties, key=lambda m: _SIMPLICITY.get(m, 9))

    def _clearly_worse(self, model: str, best: str) -> bool:
        if model == best:
            return False
        d, se = self.difference(model, best)
        return -d > MIN_DIFFERENCE_NATS and -d > MIN_DIFFERENCE_SE * se

    def verdict(self) -> str:
        """One sentence: which model the data support, and by how much."""
        pick = self.preferred()
        others = []
        for m in self.ranking:
            if m == pick:
                continue
            d, se = self.difference(m, pick)
            clear = -d > MIN_DIFFERENCE_NATS and -d > MIN_DIFFERENCE_SE * se
            word = "clearly worse" if clear else (
                "better, but not clearly" if d > 0 else "not distinguishable")
            if not self.scores[m].identified:
                word = f"not needed: {self.scores[m].identification}"
            others.append(f"{m}: {d:+.1f} +/- {se:.1f} nat ({word})")
        text = f"preferred: {pick}" + (f"; against it, {'; '.join(others)}" if others else "")
        flags = []
        if not self.converged:
            flags.append("not every fit converged")
        high = sum(s.n_high_k for s in self.scores.values())
        if high:
            flags.append(f"{high} spectra with Pareto k > {PARETO_K_LIMIT}")
        return text + (f" [caution: {', '.join(flags)}]" if flags else "")

    def summary(self) -> dict[str, Any]:
        """JSON-ready summary: per-model scores with units, the verdict and the caveats."""
        models = {}
        best = self.ranking[0]
        for m, s in self.scores.items():
            d, se = self.difference(m, best)
            row = {k: getattr(s, k) for k in _UNITS if hasattr(s, k)}
            row.update(elpd_difference=d, elpd_difference_se=se)
            models[m] = {
                **{k: {"value": v, "units": _UNITS[k]} for k, v in row.items()},
                "converged": s.converged,
                "identified": s.identified,
                "identification": s.identification,
                "fit_model": self.fits[m].model if m in self.fits else m,
            }
        return json_safe({
            "criterion": "PSIS-LOO over spectra (WAIC as a cross-check)",
            "ranking": self.ranking,
            "preferred": self.preferred(),
            "verdict": self.verdict(),
            "converged": self.converged,
            "reference_model": self.reference,
            "noise_model": self.noise_note,
            "in_plane_axis": self.axis,
            "n_spectra": int(self.in_plane.size),
            "source": self.source,
            "models": models,
            "caveats": list(CAVEATS),
        })

    def table(self) -> str:
        """The comparison as a text table with a units row."""
        head = ("model", "elpd_loo", "+/-", "d_elpd", "+/-", "p_loo", "lin/spec", "max_k",
                "k>0.7", "converged")
        units = ("", "nat", "nat", "nat", "nat", "1", "1", "1", "spectra", "")
        rows = [head, units]
        best = self.ranking[0]
        for m in self.ranking:
            s = self.scores[m]
            d, se = self.difference(m, best)
            rows.append((m, f"{s.elpd_loo:.1f}", f"{s.elpd_loo_se:.1f}", f"{d:.1f}", f"{se:.1f}",
                         f"{s.p_loo:.1f}", f"{s.linear_per_spectrum:.2f}",
                         f"{s.max_pareto_k:.2f}", str(s.n_high_k),
                         "yes" if s.converged else
                         ("no (not needed)" if not s.identified else "NO")))
        widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
        lines = ["  ".join(c.rjust(w) if i else c.ljust(w) for i, (c, w) in
                           enumerate(zip(r, widths, strict=True))) for r in rows]
        return "\n".join(lines + ["", self.verdict()])

    def __str__(self) -> str:
        return self.table()

    def _repr_html_(self) -> str:
        import html

        best = self.ranking[0]
        cells = []
        for m in self.ranking:
            s = self.scores[m]
            d, se = self.difference(m, best)
            cells.append(
                f"<tr><td>{html.escape(m)}</td><td>{s.elpd_loo:.1f} &plusmn; {s.elpd_loo_se:.1f}"
                f"</td><td>{d:.1f} &plusmn; {se:.1f}</td><td>{s.p_loo:.1f}</td>"
                f"<td>{s.max_pareto_k:.2f} ({s.n_high_k})</td>"
                f"<td>{_converged_cell(s)}</td></tr>")
        caveats = "".join(f"<li>{html.escape(c)}</li>" for c in CAVEATS)
        return (
            "<div><b>Dispersion model comparison</b> (PSIS-LOO over spectra, nat)"
            "<table><tr><th>model</th><th>elpd</th><th>&Delta; elpd to best</th>"
            "<th>p_loo</th><th>max Pareto k (&gt;0.7)</th><th>converged</th></tr>"
            f"{''.join(cells)}</table><p>{html.escape(self.verdict())}</p>"
            f"<details><summary>caveats</summary><ul>{caveats}</ul></details></div>")

    def pointwise(self) -> xr.Dataset:
        """Corrected pointwise elpd and Pareto k per model and spectrum."""
        models = list(self.scores)
        return xr.Dataset(
            {
                "elpd_i": (("model", self.axis), np.stack([self.scores[m].elpd_i for m in models]),
                           {"units": "nat", "long_name": "LOO elpd of each spectrum, corrected "
                            "for the solved coefficients"}),
                "pareto_k": (("model", self.axis),
                             np.stack([self.scores[m].pareto_k for m in models]),
                             {"units": "1", "long_name": "Pareto shape of PSIS"}),
            },
            coords={"model": models, self.axis: (self.axis, self.in_plane,
                                                 {"units": "degree" if self.axis == "angle"
                                                  else "1/um"})},
        )

    def save(self, folder: str | os.PathLike, *, figures: bool = False) -> Path:
        """Write ``comparison.json``, the pointwise table and each fit in ``folder/<model>``."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        for m, fit in self.fits.items():
            fit.save(folder / m)
            if figures:
                fit.figures(folder / m)
        write_netcdf(folder / POINTWISE_FILE, self.pointwise())
        write_json(folder / COMPARISON_FILE, self.summary())
        return folder


def _converged_cell(s: ModelScore) -> str:
    if s.converged:
        return "yes"
    return "no (not needed)" if not s.identified else "<b>no</b>"

"""The budget's result: joint draws with units, claims, sensitivity, context, files.

:class:`BudgetResult` wraps the dataset written by
:func:`polkit.jobs.budget.run.energy_budget` (one variable per quantity along dim ``draw``).

Sensitivity: ``ln E`` (``E`` = ``control_energy_per_node``) is a sum of logarithms of
the inputs, ``ln E = sum_i a_i ln x_i + const`` (``a_i`` = +1 for phase, linewidth, area
and LP energy, -1 for the interaction constant and the coupling efficiency).  Two
measures are reported per input:

* the *variance share* ``a_i Cov(ln x_i, ln E) / Var(ln E)``: the shares add up to 1
  exactly, and the covariance between two inputs (the dispersion fit's linewidth and
  energy are correlated) is split evenly between them; a share can be negative when an
  input's correlations offset its own variance;
* the *first-order share* ``Corr(ln x_i, ln E)^2``: the fraction of the variance the input
  explains alone (R^2 of a straight-line regression of ``ln E`` on ``ln x_i``).
  For independent inputs both equal ``a_i^2 Var(ln x_i) / Var(ln E)``.

Besides, the Spearman rank correlation of every uncertain input with
``wall_energy_per_activation`` (not a product, so no log decomposition) is listed.
"""

from __future__ import annotations

import html
import json
import logging
import math
import os
from collections.abc import Iterable, Sequence
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from scipy import stats

from polkit.errors import DataError
from polkit.files import write_json, write_netcdf
from polkit.jobs.budget.claims import parse_claim
from polkit.models.device_energy import ELECTRONIC_REFERENCE

__all__ = ["BudgetResult", "BUDGET_FILE", "SUMMARY_FILE", "LINES", "FJ_PER_J"]

log = logging.getLogger(__name__)

BUDGET_FILE = "budget.nc"
SUMMARY_FILE = "summary.json"
_QUANTILES = {"median": 0.5, "q16": 0.16, "q84": 0.84, "q2_5": 0.025, "q97_5": 0.975}
#: fJ per J
FJ_PER_J = 1e15

#: the lines of one activation, with what each counts
LINES = (
    ("control_optical", "control pulses at the sample (nodes x control energy per node)"),
    ("modulators", "input modulators (inputs x energy per modulation)"),
    ("detectors", "output detectors (outputs x energy per detection)"),
    ("holding_optical", "holding beam kept on for the activation window"),
    ("laser_wallplug", "electrical energy lost by the lasers making the optical energy"),
    ("cooling", "work to pump the optical energy dissipated at the cold stage to ambient"),
)


def _quantiles(values: np.ndarray) -> dict[str, float | None]:
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    return {k: (float(np.quantile(v, q)) if v.size else None) for k, q in _QUANTILES.items()}


def _g(x: float | None, digits: int = 3) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    return f"{x:.{digits}g}"


def _json_attr(key: str, doc: str) -> property:
    """A read-only property: the dataset attribute ``key``, decoded from JSON."""

    def get(self) -> Any:
        return json.loads(self._ds.attrs[key])

    return property(get, doc=doc)


def _draws_of(name: str, doc: str) -> property:
    """A read-only property: the draws of the quantity ``name``."""

    def get(self) -> np.ndarray:
        return self.draws(name)

    return property(get, doc=doc)


class BudgetResult:
    """The energy budget: joint draws with units, claims, sensitivity and context.

    Parameters
    ----------
    dataset
        Draws along dim ``draw`` (every variable has ``units``) with the attributes written
        by :func:`energy_budget`; claims recorded in ``attrs["claims"]`` are parsed here.
    """

    def __init__(self, dataset: xr.Dataset, *, path: str | os.PathLike | None = None):
        where = None if path is None else os.fspath(path)
        for key in ("model", "kind", "claims", "factors", "counted", "diagnostics",
                    "provenance", "n_nodes"):
            if key not in dataset.attrs:
                raise DataError(f"attribute {key!r} is missing: not a polkit budget",
                                path=where, field=key)
        for name, var in dataset.data_vars.items():
            if var.dims != ("draw",) or "units" not in var.attrs:
                raise DataError("expected dims ('draw',) and a 'units' attribute",
                                path=where, field=name)
        self._ds = dataset
        units = {name: str(v.attrs["units"]) for name, v in dataset.data_vars.items()
                 if v.attrs.get("polkit_role") != "index"}
        self._claims = [parse_claim(t, units) for t in json.loads(dataset.attrs["claims"])]

    # -- access ---------------------------------------------------------------------------
    @property
    def dataset(self) -> xr.Dataset:
        """All joint draws, dim ``draw``."""
        return self._ds

    provenance = _json_attr(
        "provenance", "Versions, seed, the two input results (hashes, samples) and the device.")
    diagnostics = _json_attr("diagnostics", "The inputs' convergence flags and the draw counts.")
    counted = _json_attr("counted", "What each line of the activation counts, in words.")

    def draws(self, name: str) -> np.ndarray:
        """Draws of ``name`` in its units (``dataset[name].attrs['units']``)."""
        if name not in self._ds.data_vars:
            raise DataError(f"no budget quantity {name!r}; known: {sorted(self._ds.data_vars)}",
                            field=name)
        return np.asarray(self._ds[name].values)

    energy_per_operation = _draws_of(
        "energy_per_operation", "Control-pulse energy for a 1-rad (one-linewidth) shift, fJ, "
        "per draw.")
    energy_per_pi_shift = _draws_of(
        "energy_per_pi_shift", "Control-pulse energy for a pi shift, fJ, per draw.")
    operation_rate = _draws_of(
        "operation_rate", "Operations per second per node, GHz, per draw.")
    power_per_node = _draws_of(
        "power_per_node", "Control power of one node at full rate, mW, per draw.")
    energy_per_activation = _draws_of(
        "energy_per_activation", "Control pulses + modulators + detectors per array activation, "
        "fJ, per draw.")

    # -- analysis -------------------------------------------------------------------------
    def claims(self) -> list[dict[str, Any]]:
        """``[{"text", "probability", "evidence"}]`` for the recorded claims."""
        out = []
        for c in self._claims:
            values = self.draws(c.quantity)
            q = _quantiles(values)
            out.append({
                "text": c.text,
                "probability": c.probability(values),
                "evidence": {
                    "quantity": c.quantity, "operator": c.op, "threshold": c.threshold,
                    "threshold_units": c.units, "threshold_in_quantity_units": c.threshold_native,
                    "units": c.native_units, "median": q["median"], "q2_5": q["q2_5"],
                    "q97_5": q["q97_5"], "n_draws": int(values.size),
                },
            })
        return out

    def sensitivity(self) -> dict[str, Any]:
        """Which input's uncertainty dominates the spread (method in the module docstring).

        Returns
        -------
        dict
            ``{"target", "method", "sigma_log_target", "shares_sum", "factors": [{"input",
            "exponent", "source", "sigma_log", "variance_share", "first_order_share"}],
            "rank_target", "rank_correlations": [{"input", "source", "spearman"}]}``.
        """
        y = np.log(self.draws("control_energy_per_node"))
        var_y = float(np.var(y))
        rows = []
        for name, power in json.loads(self._ds.attrs["factors"]):
            x = np.log(self.draws(name))
            var_x = float(np.var(x))
            cov = float(np.mean((x - x.mean()) * (y - y.mean())))
            ok = var_x > 0 and var_y > 0
            rows.append({
                "input": name, "exponent": power,
                "source": str(self._ds[name].attrs.get("source", "")),
                "sigma_log": math.sqrt(var_x),
                "variance_share": power * cov / var_y if ok else 0.0,
                "first_order_share": cov * cov / (var_x * var_y) if ok else 0.0,
            })
        rows.sort(key=lambda r: -abs(r["variance_share"]))
        target = self.draws("wall_energy_per_activation")
        ranks = []
        for name, var in self._ds.data_vars.items():
            if var.attrs.get("polkit_role") != "input" or var.attrs.get("source") == "derived":
                continue
            x = np.asarray(var.values, dtype=float)
            if np.ptp(x) == 0 or np.ptp(target) == 0:
                continue
            ranks.append({"input": name, "source": str(var.attrs.get("source", "")),
                          "spearman": float(stats.spearmanr(x, target).statistic)})
        ranks.sort(key=lambda r: -abs(r["spearman"]))
        return {
            "target": "control_energy_per_node",
            "method": "variance share a_i Cov(ln x_i, ln E) / Var(ln E) (sums to 1, covariances "
                      "split evenly); first-order share Corr(ln x_i, ln E)^2",
            "sigma_log_target": math.sqrt(var_y),
            "shares_sum": float(sum(r["variance_share"] for r in rows)),
            "factors": rows,
            "rank_target": "wall_energy_per_activation",
            "rank_correlations": ranks,
        }

    def comparison(self) -> list[dict[str, Any]]:
        """Electronic reference energies beside the budget's medians (context only).

        Order-of-magnitude context, not a benchmark: the references are single arithmetic
        operations in 45 nm CMOS; a polariton node's operation is not the same operation.
        """
        e_op = float(np.median(self.energy_per_operation))
        wall = float(np.median(self.draws("wall_energy_per_node")))
        return [{"operation": r.operation, "energy_fJ": r.energy_J * FJ_PER_J,
                 "source": r.source,
                 "energy_per_operation_over_reference": e_op / (r.energy_J * FJ_PER_J),
                 "wall_energy_per_node_over_reference": wall / (r.energy_J * FJ_PER_J)}
                for r in ELECTRONIC_REFERENCE]

    def notes(self) -> list[str]:
        """The estimate statement, the laser-safety note when it applies, input warnings."""
        out = [
            "This is an estimate under stated assumptions, not a measurement: the node "
            "linewidth is the lower-polariton linewidth at k = 0 of the dispersion fit; the "
            "blueshift is mean-field, g_LP n, uniform over the node area; each polariton is made "
            "from one incident photon at E_LP with the stated input coupling; the dispersion "
            "and power fits are independent (draws paired at random); one activation is one "
            "pass of the array; the lines counted are listed under 'counted'.",
        ]
        p = self.draws("array_optical_power")
        q = _quantiles(p)
        hold = (self.draws("holding_power") if "holding_power" in self._ds
                else np.zeros_like(p))
        control = p - hold
        if q["q97_5"] is not None:
            # no class limit is quoted: the accessible emission limits of IEC 60825-1 depend
            # on wavelength, exposure duration and beam geometry, so polkit defers to them
            out.append(
                f"Laser safety: the implied optical power on the sample is {_g(q['median'])} mW "
                f"(95 % interval {_g(q['q2_5'])} to {_g(q['q97_5'])} mW; control pulses of all "
                f"nodes at full rate {_g(float(np.median(control)))} mW, holding beam "
                f"{_g(float(np.median(hold)))} mW); the lasers that deliver it are usually far "
                "more powerful. Which laser class applies, and the eyewear, interlocks and "
                "enclosures it needs, follow the accessible emission limits of IEC 60825-1 "
                "(they depend on wavelength, exposure and beam geometry) and your local "
                "laser-safety officer, not this estimate."
            )
        d = self.diagnostics
        for role in ("dispersion", "power"):
            if not d.get(f"{role}_converged", True):
                out.append(f"The {role} result did not pass its convergence gate; its draws are "
                           "used as they are.")
        for role in d.get("model_check_failed", []):
            out.append(f"The {role} result failed its model check (its model does not describe "
                       "its data); the budget inherits numbers that may be biased.")
        return out

    def summary(self) -> dict[str, Any]:
        """The ``summary.json`` dict, in the layout of the fits plus the budget's sections.

        ``{"model", "kind", "parameters": {name: {median, q16, q84, q2_5, q97_5, units}},
        "claims": [{"text", "probability", "evidence"}], "counted", "sensitivity",
        "context": {"label", "rows"}, "notes", "diagnostics", "provenance"}``.
        """
        params = {}
        for name, var in self._ds.data_vars.items():
            if var.attrs.get("polkit_role") == "index":
                continue
            params[name] = {**_quantiles(var.values), "units": str(var.attrs["units"])}
        return {
            "model": str(self._ds.attrs["model"]),
            "kind": str(self._ds.attrs["kind"]),
            "parameters": params,
            "claims": self.claims(),
            "counted": self.counted,
            "sensitivity": self.sensitivity(),
            "context": {"label": "order-of-magnitude context, not a benchmark",
                        "rows": self.comparison()},
            "notes": self.notes(),
            "diagnostics": self.diagnostics,
            "provenance": self.provenance,
        }

    # -- presentation ---------------------------------------------------------------------
    def _main_rows(self) -> list[tuple[str, str, str, str]]:
        rows = []
        for name in ("energy_per_operation", "energy_per_pi_shift", "control_energy_per_node",
                     "polaritons_per_node", "operation_rate", "power_per_node",
                     "array_optical_power", "energy_per_activation",
                     "wall_energy_per_activation", "wall_energy_per_node"):
            q = _quantiles(self.draws(name))
            rows.append((name, str(self._ds[name].attrs["units"]), _g(q["median"]),
                         f"[{_g(q['q2_5'])}, {_g(q['q97_5'])}]"))
        return rows

    def _line_rows(self) -> list[tuple[str, str, str, str]]:
        wall = self.draws("wall_energy_per_activation")
        counted = self.counted
        rows = []
        for name, _ in LINES:
            v = self.draws(name)
            share = float(np.median(v / wall)) if np.all(wall > 0) else float("nan")
            status = "not counted" if counted[name].startswith("not counted") else "counted"
            rows.append((name, _g(float(np.median(v))), f"{100 * share:.3g} %", status))
        return rows

    def table(self) -> str:
        """A printed table with units: main figures, lines, claims, sensitivity, context."""
        n = self._ds.sizes["draw"]
        a = self._ds.attrs
        out = [f"Energy budget ({n} joint draws) -- an estimate under stated assumptions", ""]
        rows = [("quantity", "units", "median", "95% interval"), *self._main_rows()]
        out += _columns(rows)
        out += ["", f"One activation = {a['n_nodes']} node(s) switched, {a['n_inputs']} input(s) "
                    f"modulated, {a['n_outputs']} output(s) detected; lines in fJ:"]
        out += _columns([("line", "median fJ", "median share of wall", ""),
                         *self._line_rows()])
        out += ["", "What each line counts:"]
        out += [f"  {name}: {text}" for name, text in self.counted.items()]
        claims = self.claims()
        if claims:
            out += ["", "Claims (posterior probability that the claim holds):"]
            for c in claims:
                e = c["evidence"]
                out.append(f"  P({c['text']}) = {c['probability']:.3f}   [{e['quantity']} median "
                           f"{_g(e['median'])} {e['units']}, 95% {_g(e['q2_5'])} to "
                           f"{_g(e['q97_5'])} {e['units']}, {e['n_draws']} draws]")
        s = self.sensitivity()
        out += ["", f"Sensitivity of ln({s['target']}) (sigma_log {s['sigma_log_target']:.3g}):"]
        out += _columns([("input", "source", "sigma_log", "variance share", "first-order"),
                         *[(r["input"], r["source"], f"{r['sigma_log']:.3g}",
                            f"{r['variance_share']:.3f}", f"{r['first_order_share']:.3f}")
                           for r in s["factors"]]])
        out += ["", "Electronic reference energies -- order-of-magnitude context, not a benchmark:"]
        out += _columns([("operation", "energy fJ", "E_op / ref", "wall per node / ref", "source"),
                         *[(r["operation"], _g(r["energy_fJ"]),
                            _g(r["energy_per_operation_over_reference"]),
                            _g(r["wall_energy_per_node_over_reference"]), r["source"])
                           for r in self.comparison()]])
        out += ["", "Notes:"] + [f"  - {t}" for t in self.notes()]
        return "\n".join(out)

    def __str__(self) -> str:
        return self.table()

    def __repr__(self) -> str:
        q = _quantiles(self.energy_per_operation)
        return (f"<BudgetResult {self._ds.sizes['draw']} draws, energy_per_operation median "
                f"{_g(q['median'])} fJ, {len(self._claims)} claim(s)>")

    def _repr_html_(self) -> str:
        esc = html.escape

        def table(header, rows):
            head = "".join(f'<th style="text-align:left">{esc(h)}</th>' for h in header)
            body = "".join("<tr>" + "".join(f"<td>{esc(str(c))}</td>" for c in r) + "</tr>"
                           for r in rows)
            return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"

        parts = ["<div><p><b>Energy budget</b> &mdash; an estimate under stated assumptions "
                 f"({self._ds.sizes['draw']} joint draws)</p>",
                 table(("quantity", "units", "median", "95% interval"), self._main_rows()),
                 "<p>Lines of one activation (fJ):</p>",
                 table(("line", "median fJ", "median share of wall", "what is counted"),
                       [(*r[:3], self.counted[r[0]]) for r in self._line_rows()])]
        claims = self.claims()
        if claims:
            parts.append("<ul>" + "".join(
                f"<li>P({esc(c['text'])}) = {c['probability']:.3f}</li>" for c in claims) + "</ul>")
        s = self.sensitivity()
        parts.append(f"<p>Sensitivity of ln({esc(s['target'])}):</p>")
        parts.append(table(("input", "variance share", "first-order share"),
                           [(r["input"], f"{r['variance_share']:.3f}",
                             f"{r['first_order_share']:.3f}") for r in s["factors"]]))
        parts.append("<p>Electronic reference energies: order-of-magnitude context, not a "
                     "benchmark.</p>")
        parts.append(table(("operation", "energy fJ", "E_op / ref", "source"),
                           [(r["operation"], _g(r["energy_fJ"]),
                             _g(r["energy_per_operation_over_reference"]), r["source"])
                            for r in self.comparison()]))
        parts.append("<ul>" + "".join(f"<li>{esc(t)}</li>" for t in self.notes()) + "</ul></div>")
        return "".join(parts)

    # -- files ----------------------------------------------------------------------------
    def save(self, folder: str | os.PathLike, *, figures: bool = True) -> Path:
        """Write ``budget.nc``, ``summary.json`` and (by default) the figures into ``folder``."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        summary = self.summary()
        write_netcdf(folder / BUDGET_FILE, self._ds)
        write_json(folder / SUMMARY_FILE, summary)
        if figures:
            self.figures(folder)
        log.info("energy budget written to %s", folder)
        return folder

    def figures(self, folder: str | os.PathLike) -> list[Path]:
        """Write the breakdown and sensitivity figures (PNG) into ``folder``."""
        from polkit.plotting import budget as plots_budget

        return plots_budget.budget_figures(self, folder)

    @classmethod
    def load(cls, folder: str | os.PathLike) -> BudgetResult:
        """Read a budget written by :meth:`save`.

        Raises
        ------
        DataError
            If the folder or ``budget.nc`` is missing or not a polkit budget.
        """
        path = Path(folder) / BUDGET_FILE
        if not path.is_file():
            raise DataError(f"missing {BUDGET_FILE}: not a polkit budget folder", path=path)
        try:
            with xr.open_dataset(path, engine="h5netcdf") as opened:
                ds = opened.load()
        except (OSError, ValueError) as exc:
            raise DataError(f"cannot read the budget file ({exc})", path=path) from None
        return cls(ds, path=path)


def _columns(rows: Iterable[Sequence[str]]) -> list[str]:
    rows = [tuple(str(c) for c in r) for r in rows]
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = []
    for k, r in enumerate(rows):
        lines.append("  " + "  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip())
        if k == 0:
            lines.append("  " + "  ".join("-" * w for w in widths))
    return lines

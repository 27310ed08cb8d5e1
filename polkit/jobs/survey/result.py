"""The combined table of a survey (one row per position) and the result a survey returns."""

from __future__ import annotations

import csv
import io as _stdio
import json
import math
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from polkit.config.manifest import PositionSpec
from polkit.errors import DataError
from polkit.jobs.survey.layout import (
    DONE_FILE,
    POSITIONS_DIR,
    STATUSES,
    SUMMARY_FILE,
    SURFACE_JSON,
    SURVEY_NC,
    one_line,
    read_json,
)
from polkit.jobs.survey.surface import SurfaceFit

__all__ = ["assemble_survey", "survey_csv_text", "SurveyResult", "STATISTICS", "DIAGNOSTICS"]

#: quantile labels of the summary, in the order of the ``statistic`` dimension
STATISTICS = ("median", "q16", "q84", "q2_5", "q97_5")
#: diagnostics copied per position: name -> (units, long name)
DIAGNOSTICS: dict[str, tuple[str, str]] = {
    "converged": ("1", "convergence gate passed (1) or not (0)"),
    "steps": ("1", "MCMC steps per walker"),
    "walkers": ("1", "walkers per ensemble"),
    "max_autocorr_time": ("1", "largest integrated autocorrelation time, in steps"),
    "min_ess_bulk": ("1", "smallest bulk effective sample size"),
    "min_ess_tail": ("1", "smallest tail effective sample size"),
    "max_rhat": ("1", "largest rank R-hat over walkers (informational)"),
    "acceptance_fraction": ("1", "mean acceptance fraction"),
}


# ----------------------------------------------------------------------------------------
# assembling the survey
# ----------------------------------------------------------------------------------------
def assemble_survey(
    out: str | os.PathLike, specs: list[PositionSpec], *, attrs: dict[str, Any] | None = None
) -> xr.Dataset:
    """Collect the position folders of a survey into one Dataset over ``position``.

    Coordinates: ``position`` (result folder names), ``x`` and ``y`` [mm], ``file``,
    ``status`` (``ok`` | ``not_converged`` | ``failed``; ``pending`` where no done-file
    exists), ``reason``.  Variables: every summary parameter on ``(position, statistic)``
    with ``statistic`` = median, q16, q84, q2_5, q97_5 (units in attrs), every posterior
    probability and the convergence diagnostics on ``position``.  NaN where a position
    has no result.
    """
    status, reason, summaries = _outcomes(Path(out) / POSITIONS_DIR, specs)
    coords = {
        "position": ("position", [s.position_id for s in specs],
                     {"long_name": "result folder of the position"}),
        "statistic": ("statistic", list(STATISTICS),
                      {"long_name": "posterior median and quantiles (q16 = 16 % ...)"}),
        "x": ("position", np.array([s.x_mm for s in specs], dtype=float),
              {"units": "mm", "long_name": "position on the wafer, x"}),
        "y": ("position", np.array([s.y_mm for s in specs], dtype=float),
              {"units": "mm", "long_name": "position on the wafer, y"}),
        "file": ("position", [s.file_label for s in specs], {"long_name": "map file"}),
        "status": ("position", status,
                   {"long_name": "ok | not_converged | failed (pending: no result yet)"}),
        "reason": ("position", reason, {"long_name": "why a position failed or did not "
                                                     "converge"}),
    }
    data_vars = _summary_vars(summaries, len(specs))
    ds = xr.Dataset(data_vars, coords=coords)
    ds.attrs.update({"title": "polkit wafer survey", "Conventions": "CF-1.8"})
    ds.attrs.update({k: _attr(v) for k, v in (attrs or {}).items()})
    return ds


def _outcomes(folder: Path, specs: list[PositionSpec]):
    """Status, reason and summary (or ``None``) of every position, from its done-file."""
    status, reason, summaries = [], [], []
    for spec in specs:
        pos = folder / spec.position_id
        done = read_json(pos / DONE_FILE)
        summary = None
        if done is None:
            status.append("pending")
            reason.append("no result yet (interrupted or not run)")
        else:
            status.append(str(done.get("status", "failed")))
            reason.append(one_line(done.get("reason", "")))
            if status[-1] != "failed":
                summary = read_json(pos / SUMMARY_FILE)
                if summary is None:
                    status[-1] = "failed"
                    reason[-1] = "summary.json missing or unreadable"
        summaries.append(summary)
    return status, reason, summaries


def _summary_vars(summaries: list[dict | None], n: int) -> dict[str, tuple]:
    """Parameters (with their quantiles), probabilities and diagnostics over ``position``."""
    params: dict[str, str] = {}
    probs: dict[str, tuple[str, str]] = {}
    for s in summaries:
        if s is None:
            continue
        for name, e in s.get("parameters", {}).items():
            params.setdefault(name, str(e.get("units", "")))
        for name, e in s.get("probabilities", {}).items():
            probs.setdefault(name, (str(e.get("units", "1")), str(e.get("long_name", name))))
    data_vars = {}
    for name, units in params.items():
        arr = np.full((n, len(STATISTICS)), np.nan)
        for i, s in enumerate(summaries):
            e = (s or {}).get("parameters", {}).get(name)
            if e is None:
                continue
            arr[i] = [np.nan if e.get(k) is None else float(e[k]) for k in STATISTICS]
        data_vars[name] = (("position", "statistic"), arr,
                           {"units": units, "long_name": name.replace("_", " ")})
    for name, (units, long_name) in probs.items():
        arr = np.full(n, np.nan)
        for i, s in enumerate(summaries):
            e = (s or {}).get("probabilities", {}).get(name)
            if e is not None and e.get("value") is not None:
                arr[i] = float(e["value"])
        data_vars[name] = ("position", arr, {"units": units, "long_name": long_name})
    for name, (units, long_name) in DIAGNOSTICS.items():
        arr = np.full(n, np.nan)
        for i, s in enumerate(summaries):
            value = (s or {}).get("diagnostics", {}).get(name)
            if isinstance(value, (bool, int, float)) and value is not None:
                arr[i] = float(value)
        data_vars[f"diag_{name}"] = ("position", arr, {"units": units, "long_name": long_name})
    return data_vars


def _attr(value):
    if isinstance(value, (bool, np.bool_)):
        return int(value)
    if isinstance(value, (str, int, float, np.integer, np.floating)):
        return value
    return json.dumps(value)


def survey_csv_text(ds: xr.Dataset) -> str:
    """The combined table as CSV: one row per position, units in brackets in the header."""
    header = ["position", "file", "x [mm]", "y [mm]", "status", "reason"]
    cols = []
    for name, var in ds.data_vars.items():
        units = var.attrs.get("units", "1")
        if "statistic" in var.dims:
            for stat in STATISTICS:
                header.append(f"{name}_{stat} [{units}]")
                cols.append(var.sel(statistic=stat).values)
        else:
            header.append(f"{name} [{units}]")
            cols.append(var.values)
    buf = _stdio.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(header)
    for i in range(ds.sizes["position"]):
        row = [str(ds["position"].values[i]), str(ds["file"].values[i]),
               _num(ds["x"].values[i]), _num(ds["y"].values[i]),
               str(ds["status"].values[i]), str(ds["reason"].values[i])]
        row += [_num(c[i]) for c in cols]
        w.writerow(row)
    return buf.getvalue()


def _num(v) -> str:
    v = float(v)
    return "" if not math.isfinite(v) else repr(v)


# ----------------------------------------------------------------------------------------
# the result
# ----------------------------------------------------------------------------------------
@dataclass
class SurveyResult:
    """The outcome of a survey: the combined Dataset, the detuning surface and the books.

    Attributes
    ----------
    dataset
        One row per position (see :func:`assemble_survey`).
    surface
        The detuning surface (``None`` when too few positions succeeded; see
        ``surface_note``).
    out
        The output folder.
    fitted, reused
        Position ids fitted in this run and those taken from an earlier run.
    surface_note
        Why there is no surface, if there is none.
    files
        Paths written (combined table, surface, figures).
    """

    dataset: xr.Dataset
    surface: SurfaceFit | None
    out: Path
    fitted: list[str] = field(default_factory=list)
    reused: list[str] = field(default_factory=list)
    surface_note: str = ""
    files: list[Path] = field(default_factory=list)

    @property
    def counts(self) -> dict[str, int]:
        """Positions per status: ``ok``, ``not_converged``, ``failed`` (and ``pending``)."""
        status = [str(s) for s in self.dataset["status"].values]
        out = {s: status.count(s) for s in STATUSES}
        if "pending" in status:
            out["pending"] = status.count("pending")
        return out

    @property
    def all_ok(self) -> bool:
        """Whether every position converged."""
        c = self.counts
        return c["ok"] == self.dataset.sizes["position"]

    @property
    def seed_entropy(self) -> str:
        """Entropy of the root SeedSequence (text: it may exceed 64 bits)."""
        return str(self.dataset.attrs.get("seed_entropy", ""))

    def table(self) -> str:
        """Plain-text report: counts per status, the gradient, the failures with reasons."""
        ds = self.dataset
        c = self.counts
        lines = [
            f"wafer survey ({ds.attrs.get('mode', '?')} mode, {ds.attrs.get('model', '?')} "
            f"oscillators): {ds.sizes['position']} positions -> {self.out}",
            f"  {'succeeded':<16}{c['ok']:>5}",
            f"  {'did not converge':<16}{c['not_converged']:>5}",
            f"  {'failed':<16}{c['failed']:>5}",
        ]
        if c.get("pending"):
            lines.append(f"  {'pending':<16}{c['pending']:>5}")
        if self.fitted or self.reused:
            lines.append(f"  (fitted now: {len(self.fitted)}, reused from an earlier run: "
                         f"{len(self.reused)})")
        lines += self._surface_lines()
        bad = [i for i, s in enumerate(ds["status"].values) if str(s) != "ok"]
        if bad:
            lines.append("positions needing attention:")
            for i in bad:
                lines.append(
                    f"  {ds['position'].values[i]} (x = {_fmt_mm(ds['x'].values[i])}, "
                    f"y = {_fmt_mm(ds['y'].values[i])}): {ds['status'].values[i]} -- "
                    f"{ds['reason'].values[i]}"
                )
        return "\n".join(lines)

    def _surface_lines(self) -> list[str]:
        """The report lines on the detuning surface: gradient and zero-detuning line."""
        if self.surface is None:
            return [f"no detuning surface: {self.surface_note}"]
        g = self.surface.gradient_summary()
        lines = [
            f"detuning gradient at ({g['at_mm'][0]:.1f}, {g['at_mm'][1]:.1f}) mm: "
            f"d/dx = {g['x']['value']:.4g} +/- {g['x']['sigma']:.2g}, "
            f"d/dy = {g['y']['value']:.4g} +/- {g['y']['sigma']:.2g} {g['units']} "
            f"(degree-{self.surface.degree} surface, {len(self.surface.values)} positions, "
            f"chi2/dof = {self.surface.chi2:.3g}/{self.surface.dof})"
        ]
        line = self.surface.level_line(0.0)
        if line:
            pts = np.concatenate([np.asarray(s["sigma_mm"]) for s in line])
            lines.append(
                f"zero detuning crosses the measured area ({len(line)} segment(s)); "
                f"position uncertainty across the line {np.nanmin(pts):.2g}-"
                f"{np.nanmax(pts):.2g} mm (1 sigma)"
            )
        else:
            lines.append("zero detuning does not cross the measured area")
        return lines

    def __str__(self) -> str:
        return self.table()

    @classmethod
    def load(cls, out: str | os.PathLike) -> SurveyResult:
        """Read ``survey.nc`` and ``surface.json`` of a finished survey folder.

        Raises
        ------
        DataError
            If the folder holds no ``survey.nc``.
        """
        out = Path(out)
        path = out / SURVEY_NC
        if not path.is_file():
            raise DataError(
                f"expected {SURVEY_NC} written by run_survey; found none. Fix: run the survey "
                "(a rerun reuses finished positions)",
                path=path,
                field="file",
            )
        with xr.open_dataset(path, engine="h5netcdf") as opened:
            ds = opened.load()
        surf = read_json(out / SURFACE_JSON)
        surface = None
        note = ""
        if surf is not None and surf.get("degree") is not None:
            surface = SurfaceFit.from_dict(surf)
        elif surf is not None:
            note = str(surf.get("note", ""))
        return cls(dataset=ds, surface=surface, out=out, surface_note=note)


def _fmt_mm(v) -> str:
    v = float(v)
    return "?" if not math.isfinite(v) else f"{v:g} mm"


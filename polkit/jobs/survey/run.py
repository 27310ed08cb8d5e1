"""The wafer survey: fit every measured position of a wafer, in parallel and resumably, then
map detuning, Rabi splitting, linewidths and photon fraction across it.

A grown wafer has a thickness gradient, so the cavity energy and with it the detuning change
across it.  The grower measures a grid of positions and wants to know where the detuning
is zero, how the Rabi splitting and the linewidths vary, and which positions failed.

Steps
-----
1. Read the positions (:func:`read_manifest`): a CSV manifest with bracketed units, or a
   folder of map files whose attributes carry ``x``/``y``.
2. Spawn one :class:`numpy.random.SeedSequence` child per position from one root, in
   manifest order, so a position's result depends neither on the worker count nor on
   the order in which the positions finish.
3. One dask.distributed task per position (:func:`fit_position`): the dispersion job of
   :func:`polkit.jobs.dispersion.run.fit_dispersion` on that map (``quick``: the
   peak-table posterior; ``full``: the whole-map MCMC with its convergence gate).  Each
   task writes its own result folder (``posterior.nc`` and ``summary.json``, atomically)
   and, last, a small done-file; a failing position is recorded with its reason and the
   others go on.  A rerun skips positions whose done-file matches the input file,
   options and seed.
4. Assemble one :class:`xarray.Dataset` over positions (:func:`assemble_survey`) and fit a
   smooth low-order polynomial surface to the detuning (:func:`fit_surface`): gradient in
   meV/mm with its uncertainty and the zero-detuning line with a band.

Output folder::

    survey_state.json          mode, model and root seed of this survey (written first)
    positions/<id>/            posterior.nc, summary.json, done.json (written last);
                               started.json and, while a full-mode fit runs, chains.h5
    survey.nc, survey.csv      the combined table (netCDF with units; CSV, bracketed units)
    surface.json               the detuning surface, its gradient and the zero-detuning line
    wafer_maps.png, wafer_detuning.png

Scope: the fits are the dispersion job's; this module schedules them, keeps the books and
fits the surface.  Scheduling belongs to dask.distributed (no process pools inside tasks:
dask workers are daemonic processes).
"""

from __future__ import annotations

import contextlib
import csv
import io as _stdio
import json
import logging
import math
import os
import re
import time
import warnings
from dataclasses import dataclass, field
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from polkit.errors import ConfigError, DataError, PolkitError
from polkit.files import write_json, write_netcdf, write_text
from polkit.folder_lock import folder_lock
from polkit.inference.checkpoint import root_seed
from polkit.inference.identity import CheckpointMismatch
from polkit.jobs.dispersion.problem import COUPLED_MODELS as MODELS

__all__ = [
    "run_survey",
    "read_manifest",
    "fit_position",
    "assemble_survey",
    "fit_surface",
    "PositionSpec",
    "SurfaceFit",
    "SurveyResult",
    "STATUSES",
    "LENGTH_UNITS",
]

log = logging.getLogger(__name__)

#: position outcomes: converged fit, fit that did not pass its gate, no fit at all
STATUSES = ("ok", "not_converged", "failed")
MODES = ("quick", "full")
KINDS = ("emission", "reflectance", "transmission")
MEDIA = ("vacuum", "air")
#: length spellings accepted for wafer positions -> factor to mm
LENGTH_UNITS: dict[str, float] = {
    "mm": 1.0,
    "millimetre": 1.0,
    "millimeter": 1.0,
    "um": 1e-3,
    "µm": 1e-3,
    "μm": 1e-3,
    "micron": 1e-3,
    "cm": 10.0,
    "m": 1e3,
}
#: map files considered in folder mode
MAP_SUFFIXES = (".nc", ".nc4", ".h5", ".hdf5", ".npz", ".txt")

STATE_FILE = "survey_state.json"
DONE_FILE = "done.json"
STARTED_FILE = "started.json"
POSITIONS_DIR = "positions"
SURVEY_NC = "survey.nc"
SURVEY_CSV = "survey.csv"
SURFACE_JSON = "surface.json"
CHECKPOINT = "chains.h5"
_STATE_FORMAT = 1

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

# manifest columns: name -> (kind of value, unit table or None)
_TEXT, _LENGTH, _ENERGY = "text", "length", "energy"
_COLUMNS: dict[str, str] = {
    "file": _TEXT,
    "x": _LENGTH,
    "y": _LENGTH,
    "label": _TEXT,
    "comment": _TEXT,
    "kind": _TEXT,
    "model": _TEXT,
    "wavelength_medium": _TEXT,
    "priors": _TEXT,
    "energy_min": _ENERGY,
    "energy_max": _ENERGY,
}
_NUMBER_RE = re.compile(r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$")
_VALUE_WITH_UNITS_RE = re.compile(r"^\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*(\S*)\s*$")


# ----------------------------------------------------------------------------------------
# positions
# ----------------------------------------------------------------------------------------
@dataclass(frozen=True)
class PositionSpec:
    """One measured position of the wafer, as read from the manifest.

    Attributes
    ----------
    index
        Row order in the manifest (0-based); the seed child of this position.
    position_id
        Folder name of its result, ``"<index>_<label>"``.
    file
        The map file (absolute).
    file_label
        The file as written in the manifest (relative to the manifest's folder).
    x_mm, y_mm
        Position on the wafer in mm (NaN when a folder-mode file could not be read).
    kind, model, wavelength_medium
        Per-position options (``None``: the file's or the survey's default).
    energy_window
        ``(low, high)`` in eV, or ``None``.
    priors
        A priors file for this position, or ``None``.
    line
        Line of the manifest that defined it (``None`` in folder mode).
    """

    index: int
    position_id: str
    file: Path
    file_label: str
    x_mm: float
    y_mm: float
    kind: str | None = None
    model: str | None = None
    wavelength_medium: str | None = None
    energy_window: tuple[float, float] | None = None
    priors: Path | None = None
    line: int | None = None


def _safe_label(text: str) -> str:
    label = re.sub(r"[^A-Za-z0-9_.+-]+", "_", text).strip("_.")
    return label[:60] or "position"


def read_manifest(manifest: str | os.PathLike) -> list[PositionSpec]:
    """Read the positions of a survey from a CSV manifest or a folder of map files.

    Parameters
    ----------
    manifest
        A CSV file whose header carries units in brackets::

            # invented wafer W-0; positions in mm from the wafer centre
            file,x [mm],y [mm],kind,energy_min [eV],energy_max [eV]
            maps/a1.nc,-12.0,-12.0,emission,,
            maps/a2.nc,0.0,-12.0,emission,1.525,1.565

        Required columns: ``file`` (relative to the manifest's folder, or absolute),
        ``x`` and ``y`` (length units: mm, um, cm or m).  Optional per-position columns:
        ``label`` (names the result folder), ``kind`` (emission | reflectance |
        transmission), ``model`` (two | three), ``wavelength_medium`` (vacuum | air),
        ``energy_min`` and ``energy_max`` (energy units, a crop window), ``priors`` (a
        TOML file of priors, relative to the manifest), ``comment`` (ignored).  An empty
        cell means "not set".  ``#`` lines are comments.

        Or a folder: every map file in it (``.nc``, ``.nc4``, ``.h5``, ``.hdf5``,
        ``.npz``, ``.txt``; sorted by name) whose attributes carry ``x`` and ``y``,
        either as text with units (``"12.5 mm"``) or as numbers with a ``position_units``
        (or ``x_units``/``y_units``) attribute.

    Returns
    -------
    list of PositionSpec
        In manifest order (the order that fixes each position's seed).

    Raises
    ------
    DataError
        Naming the manifest (or map file), the row and the column: missing columns,
        unknown columns, units that are not a length (or energy), cells that are not
        numbers, unknown option values, empty windows, duplicated files, no rows.
    """
    path = Path(manifest)
    if path.is_dir():
        return _read_folder(path)
    if not path.is_file():
        raise DataError(
            "expected a manifest (CSV with columns file, x [mm], y [mm]) or a folder of map "
            "files; found nothing at this path. Fix: check the path",
            path=path,
            field="manifest",
        )
    return _read_csv_manifest(path)


def _read_csv_manifest(path: Path) -> list[PositionSpec]:
    from polkit.data.text import decode_text, parse_header_name, split_comments

    text = decode_text(path.read_bytes(), path=path)
    _, lines = split_comments(text)
    if not lines:
        raise DataError(
            "expected a header line (file, x [mm], y [mm], ...) and one row per position; "
            "found only comments or blank lines",
            path=path,
            field="header",
        )
    header_line, header = lines[0]
    delimiter = next((d for d in ("\t", ",", ";") if d in header), ",")
    cells = _split_row(header, delimiter, path, header_line)
    columns: list[tuple[str, str, str | None]] = []  # (name, header cell, units)
    seen: dict[str, str] = {}
    for cell in cells:
        name, units = parse_header_name(cell, path=path, field=cell.strip() or "header")
        if name not in _COLUMNS:
            raise DataError(
                f"header (line {header_line}): unknown column {cell.strip()!r}; expected "
                f"columns {', '.join(_header_example(n) for n in _COLUMNS)}. Fix: rename or "
                "remove the column",
                path=path,
                field=cell.strip(),
            )
        if name in seen:
            raise DataError(
                f"header (line {header_line}): column {name!r} appears twice "
                f"({seen[name]!r} and {cell.strip()!r}). Fix: keep one",
                path=path,
                field=cell.strip(),
            )
        seen[name] = cell.strip()
        columns.append((name, cell.strip(), units))
    for required in ("file", "x", "y"):
        if required not in seen:
            raise DataError(
                f"header (line {header_line}): expected a column {_header_example(required)!r}"
                f"; found columns {[c[1] for c in columns]}. Fix: add the column",
                path=path,
                field=_header_example(required),
            )
    factors = {}
    for name, cell, units in columns:
        kind = _COLUMNS[name]
        if kind == _TEXT:
            continue
        table = LENGTH_UNITS if kind == _LENGTH else _energy_units()
        what = "a length (wafer position)" if kind == _LENGTH else "a photon energy"
        if units is None or units not in table:
            found = "no units" if units is None else f"units {units!r}"
            raise DataError(
                f"header (line {header_line}): expected units of {what} in brackets, one of "
                f"{', '.join(repr(u) for u in table)}; found {found}. Fix: write e.g. "
                f"{_header_example(name)!r}",
                path=path,
                field=cell,
            )
        factors[name] = table[units]
    header_of = {name: h for name, h, _ in columns}

    specs: list[PositionSpec] = []
    files_seen: dict[str, tuple[int, int, str]] = {}
    for row, (line, text_line) in enumerate(lines[1:], start=1):
        values = _split_row(text_line, delimiter, path, line)
        if len(values) != len(columns):
            raise DataError(
                f"row {row} (line {line}): expected {len(columns)} cells like the header; "
                f"found {len(values)}. Fix: add empty cells or remove extra ones",
                path=path,
                field=f"row {row}",
            )
        cell = {name: v.strip() for (name, _, _), v in zip(columns, values, strict=True)}

        def where(name, row=row, line=line):
            return f"row {row} (line {line}), column {header_of[name]!r}"

        if not cell["file"]:
            raise DataError(
                f"{where('file')}: expected a map file name; found an empty cell. Fix: fill "
                "it in or delete the row",
                path=path,
                field="file",
            )
        file_path = Path(cell["file"])
        if not file_path.is_absolute():
            file_path = path.parent / file_path
        # the same map under two names (relative and absolute, a symbolic link, '..'):
        # compared after resolving every link
        key = os.path.realpath(file_path)
        if key in files_seen:
            first_row, first_line, first_name = files_seen[key]
            raise DataError(
                f"{where('file')}: {cell['file']!r} is the same map as {first_name!r} in row "
                f"{first_row} (line {first_line}) (both are {key}); each map is one "
                "position. Fix: remove one of the two rows",
                path=path,
                field="file",
            )
        files_seen[key] = (row, line, cell["file"])
        x = _cell_number(cell["x"], where("x"), path, header_of["x"], required=True)
        y = _cell_number(cell["y"], where("y"), path, header_of["y"], required=True)
        options: dict[str, Any] = {}
        for name, allowed in (("kind", KINDS), ("model", tuple(MODELS)),
                              ("wavelength_medium", MEDIA)):
            value = cell.get(name, "")
            if not value:
                continue
            if value.lower() not in allowed:
                raise DataError(
                    f"{where(name)}: expected one of {', '.join(allowed)} (or an empty cell); "
                    f"found {value!r}",
                    path=path,
                    field=header_of[name],
                )
            options[name] = value.lower()
        window = None
        lo = hi = math.nan
        if cell.get("energy_min"):
            lo = _cell_number(cell["energy_min"], where("energy_min"), path,
                              header_of["energy_min"], required=False)
        if cell.get("energy_max"):
            hi = _cell_number(cell["energy_max"], where("energy_max"), path,
                              header_of["energy_max"], required=False)
        if not (math.isnan(lo) and math.isnan(hi)):
            lo = lo * factors["energy_min"] if not math.isnan(lo) else 0.0
            hi = hi * factors["energy_max"] if not math.isnan(hi) else 1e6
            if not lo < hi:
                raise DataError(
                    f"row {row} (line {line}): expected energy_min < energy_max; found "
                    f"{lo:g} eV and {hi:g} eV. Fix: swap or correct the window",
                    path=path,
                    field=header_of.get("energy_max", header_of.get("energy_min")),
                )
            window = (lo, hi)
        priors = None
        if cell.get("priors"):
            priors = Path(cell["priors"])
            if not priors.is_absolute():
                priors = path.parent / priors
            if not priors.is_file():
                raise DataError(
                    f"{where('priors')}: expected a priors file; found nothing at "
                    f"{cell['priors']!r} (relative to the manifest's folder). Fix: correct "
                    "the path or empty the cell",
                    path=path,
                    field=header_of["priors"],
                )
        index = len(specs)
        label = cell.get("label") or Path(cell["file"]).stem
        specs.append(
            PositionSpec(
                index=index,
                position_id=f"{index:03d}_{_safe_label(label)}",
                file=file_path.resolve(),
                file_label=cell["file"],
                x_mm=x * factors["x"],
                y_mm=y * factors["y"],
                kind=options.get("kind"),
                model=options.get("model"),
                wavelength_medium=options.get("wavelength_medium"),
                energy_window=window,
                priors=None if priors is None else priors.resolve(),
                line=line,
            )
        )
    if not specs:
        raise DataError(
            f"expected one row per position after the header (line {header_line}); found "
            "none. Fix: add rows (file, x, y)",
            path=path,
            field="rows",
        )
    return specs


def _energy_units() -> dict[str, float]:
    from polkit.units import ENERGY_UNITS

    return ENERGY_UNITS


def _header_example(name: str) -> str:
    return {"x": "x [mm]", "y": "y [mm]", "energy_min": "energy_min [eV]",
            "energy_max": "energy_max [eV]"}.get(name, name)


def _split_row(line: str, delimiter: str, path: Path, number: int) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=delimiter, strict=True))
    except (csv.Error, StopIteration) as exc:
        raise DataError(
            f"line {number}: expected a delimited row; found unreadable text ({exc}). Fix: "
            "correct the quoting of that line",
            path=path,
            field=f"line {number}",
        ) from None


def _cell_number(text: str, where: str, path: Path, column, *, required: bool) -> float:
    if not text:
        if required:
            raise DataError(
                f"{where}: expected a number; found an empty cell. Fix: fill it in",
                path=path,
                field=column,
            )
        return math.nan
    if not _NUMBER_RE.match(text):
        hint = (" (a decimal comma?) Fix: write numbers with '.' as decimal separator"
                if re.match(r"^[+-]?\d+,\d+$", text) else " Fix: correct the cell")
        raise DataError(
            f"{where}: expected a number; found {text[:40]!r}.{hint}",
            path=path,
            field=column,
        )
    value = float(text)
    if not math.isfinite(value):
        raise DataError(f"{where}: expected a finite number; found {text!r}", path=path,
                        field=column)
    return value


def _read_folder(folder: Path) -> list[PositionSpec]:
    from polkit.data import read_raw

    files = sorted(p for p in folder.iterdir()
                   if p.is_file() and p.suffix.lower() in MAP_SUFFIXES)
    if not files:
        raise DataError(
            f"expected map files ({', '.join(MAP_SUFFIXES)}) carrying x and y attributes; "
            "found none in this folder. Fix: point to the folder of maps, or write a "
            "manifest (file, x [mm], y [mm])",
            path=folder,
            field="manifest",
        )
    specs = []
    for index, file in enumerate(files):
        try:
            raw, _ = read_raw(file)
        except (PolkitError, OSError) as exc:
            # an unreadable map stays a position: its fit fails with this reason and the
            # others go on; its place on the wafer is unknown
            log.warning("%s: cannot read its position (%s)", file, exc)
            x = y = math.nan
        else:
            attrs = dict(raw.attrs)
            for var in raw.data_vars.values():
                for k, v in var.attrs.items():
                    attrs.setdefault(k, v)
            x = _attr_position(attrs, "x", file)
            y = _attr_position(attrs, "y", file)
        specs.append(
            PositionSpec(
                index=index,
                position_id=f"{index:03d}_{_safe_label(file.stem)}",
                file=file.resolve(),
                file_label=file.name,
                x_mm=x,
                y_mm=y,
            )
        )
    return specs


def _attr_position(attrs: dict, name: str, file: Path) -> float:
    if name not in attrs:
        raise DataError(
            f"expected a '{name}' attribute with the position on the wafer (e.g. "
            f"{name} = '12.5 mm'); found attributes {sorted(attrs)}. Fix: add it, or list "
            "the files in a manifest (file, x [mm], y [mm])",
            path=file,
            field=name,
        )
    value = attrs[name]
    if isinstance(value, bytes):
        value = value.decode("utf-8", "replace")
    if isinstance(value, str):
        m = _VALUE_WITH_UNITS_RE.match(value)
        if not m:
            raise DataError(
                f"expected a number with length units (e.g. '12.5 mm'); found {value!r}",
                path=file,
                field=name,
            )
        number, units = float(m.group(1)), m.group(2) or None
    else:
        arr = np.asarray(value, dtype=float).ravel()
        if arr.size != 1:
            raise DataError(f"expected one number; found {arr.size} values", path=file,
                            field=name)
        number, units = float(arr[0]), None
    if units is None:
        units = attrs.get(f"{name}_units", attrs.get("position_units"))
        if isinstance(units, bytes):
            units = units.decode("utf-8", "replace")
    if units is None or str(units).strip() not in LENGTH_UNITS:
        found = "no units" if units is None else f"units {units!r}"
        raise DataError(
            f"expected the position in length units ({', '.join(LENGTH_UNITS)}); found "
            f"{found}. Fix: write {name} = '{number:g} mm', or add position_units = 'mm'",
            path=file,
            field=name,
        )
    if not math.isfinite(number):
        raise DataError(f"expected a finite position; found {value!r}", path=file, field=name)
    return number * LENGTH_UNITS[str(units).strip()]


# ----------------------------------------------------------------------------------------
# one position (runs on a dask worker)
# ----------------------------------------------------------------------------------------
def _one_line(text: str) -> str:
    return " ".join(str(text).split())


def _reason(exc: BaseException) -> str:
    if isinstance(exc, PolkitError):
        return _one_line(str(exc))
    return _one_line(f"{type(exc).__name__}: {exc}")


def fit_position(task: dict[str, Any]) -> dict[str, Any]:
    """Fit one position and write its result folder; never raises for a bad position.

    This is the dask task of :func:`run_survey` (importable by the workers).  It removes
    any old done-file, fits the map with
    :func:`~polkit.jobs.dispersion.run.fit_dispersion` (quick: ``peaks_only=True``),
    writes ``posterior.nc`` and ``summary.json`` atomically, and last ``done.json``
    (atomically) with the status (``ok``, ``not_converged`` or ``failed``), the reason,
    the warnings raised during the fit and the task's key.  A full-mode fit interrupted
    earlier with the same key resumes from its ``chains.h5`` checkpoint; the checkpoint is
    removed once the position is done.

    Parameters
    ----------
    task
        ``position_id``, ``folder``, ``file``, ``mode``, ``model``, ``kind``,
        ``energy_window``, ``wavelength_medium``, ``priors``, ``seed`` (a
        SeedSequence), ``max_steps`` and ``key`` (the JSON-able identity of the fit).

    Returns
    -------
    dict
        The content of ``done.json``.
    """
    from polkit.jobs.dispersion.run import fit_dispersion

    folder = Path(task["folder"])
    folder.mkdir(parents=True, exist_ok=True)
    (folder / DONE_FILE).unlink(missing_ok=True)
    checkpoint = folder / CHECKPOINT
    started = _read_json(folder / STARTED_FILE)
    resume = (task["mode"] == "full" and checkpoint.is_file() and started is not None
              and started.get("key") == task["key"])
    if not resume:
        checkpoint.unlink(missing_ok=True)
    write_json(folder / STARTED_FILE, {"key": task["key"]})
    seed = task["seed"]
    record: dict[str, Any] = {
        "position": task["position_id"],
        "file": str(task["file"]),
        "key": task["key"],
        "seed_entropy": str(seed.entropy),
        "seed_spawn_key": [int(k) for k in seed.spawn_key],
    }
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught, _serial_dask():
        warnings.simplefilter("always")
        try:
            options = dict(
                model=task["model"],
                kind=task["kind"],
                peaks_only=task["mode"] == "quick",
                priors=task["priors"],
                seed=seed,
                max_steps=task["max_steps"],
                progress=False,
                wavelength_medium=task["wavelength_medium"],
                energy_window=task["energy_window"],
                figures=False,
            )
            if task["mode"] == "full":
                try:
                    result = fit_dispersion(task["file"], out=folder, resume=resume, **options)
                except (ConfigError, CheckpointMismatch):
                    if not resume:
                        raise
                    log.warning("%s: checkpoint not resumable; starting afresh",
                                task["position_id"])
                    result = fit_dispersion(task["file"], out=folder, resume=False, **options)
            else:
                result = fit_dispersion(task["file"], out=None, **options)
                result.save(folder)
        except Exception as exc:  # noqa: BLE001 - a bad position is recorded, the rest go on
            record["status"] = "failed"
            record["reason"] = _reason(exc)
            log.info("%s failed: %s", task["position_id"], record["reason"])
        else:
            if result.converged:
                record["status"], record["reason"] = "ok", ""
            else:
                reasons = result.diagnostics.get("reasons") or ["convergence gate not passed"]
                record["status"] = "not_converged"
                record["reason"] = _one_line("; ".join(reasons))
    messages = []
    for w in caught:
        text = _one_line(f"{w.category.__name__}: {w.message}")
        if text not in messages:
            messages.append(text)
    record["warnings"] = messages
    record["seconds"] = round(time.perf_counter() - t0, 3)
    record["finished"] = datetime.now(UTC).isoformat(timespec="seconds")
    write_json(folder / DONE_FILE, record)
    with contextlib.suppress(OSError):
        checkpoint.unlink(missing_ok=True)
    return record


@contextlib.contextmanager
def _serial_dask():
    """Inside a task, let libraries that consult dask (xarray's netCDF writer picks its
    file locks from the active scheduler) work serially, as in a plain process: a task is
    one whole fit, and the worker's cluster-wide locks are not meant for its files."""
    try:
        import dask
    except ImportError:  # pragma: no cover - dask is a dependency
        yield
        return
    with dask.config.set(scheduler="synchronous"):
        yield


def _read_json(path: Path) -> dict | None:
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return value if isinstance(value, dict) else None


# ----------------------------------------------------------------------------------------
# the smooth surface
# ----------------------------------------------------------------------------------------
_TERMS = {1: ("1", "x", "y"), 2: ("1", "x", "y", "x^2", "x*y", "y^2")}


def _design(x: np.ndarray, y: np.ndarray, degree: int) -> np.ndarray:
    cols = [np.ones_like(x), x, y]
    if degree == 2:
        cols += [x * x, x * y, y * y]
    return np.stack(cols, axis=-1)


@dataclass
class SurfaceFit:
    """A low-order polynomial surface ``v(x, y)`` fitted by weighted least squares.

    ``v = c0 + c1 u + c2 w [+ c3 u^2 + c4 u w + c5 w^2]`` with ``u = x - x0``,
    ``w = y - y0`` (mm) about the centroid ``(x0, y0)`` of the positions used, so ``c1``
    and ``c2`` are the gradient at the centroid for either degree.

    Attributes
    ----------
    degree
        1 (plane) or 2 (quadric).
    terms
        Names of the coefficients (``"1"``, ``"x"``, ``"y"``, ``"x^2"``, ``"x*y"``,
        ``"y^2"``).
    coefficients, covariance
        Fitted coefficients and their covariance (scaled, see ``scale_factor``).
    centre_mm
        ``(x0, y0)``.
    units, length_units
        Units of ``v`` (e.g. ``"meV"``) and of positions (``"mm"``).
    chi2, dof
        Weighted residual sum of squares and degrees of freedom.
    scale_factor
        ``max(1, sqrt(chi2 / dof))``; the covariance of the weights alone is multiplied
        by its square, so scatter beyond the per-position intervals (the wafer is not
        exactly a polynomial) widens the intervals instead of being ignored.
    x_mm, y_mm, values, sigmas, positions
        The points fitted.
    confidence
        Level of the reported intervals and of the zero-line band.
    quantity
        Name of the fitted quantity.
    """

    degree: int
    terms: tuple[str, ...]
    coefficients: np.ndarray
    covariance: np.ndarray
    centre_mm: tuple[float, float]
    units: str
    length_units: str
    chi2: float
    dof: int
    scale_factor: float
    x_mm: np.ndarray
    y_mm: np.ndarray
    values: np.ndarray
    sigmas: np.ndarray
    positions: list[str] = field(default_factory=list)
    confidence: float = 0.95
    quantity: str = "detuning"

    @property
    def z(self) -> float:
        """Two-sided normal quantile of ``confidence`` (1.96 for 95 %)."""
        from scipy.stats import norm

        return float(norm.ppf(0.5 + 0.5 * self.confidence))

    def evaluate(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Surface mean and its standard error at positions ``x``, ``y`` (mm).

        The standard error is ``sqrt(a^T C a)`` with ``a`` the row of the design matrix
        (linear propagation of the coefficient covariance).
        """
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        a = _design(x - self.centre_mm[0], y - self.centre_mm[1], self.degree)
        mean = a @ self.coefficients
        var = np.einsum("...i,ij,...j->...", a, self.covariance, a)
        return mean, np.sqrt(np.clip(var, 0.0, None))

    def gradient(self, x=None, y=None) -> tuple[np.ndarray, np.ndarray]:
        """Gradient ``(dv/dx, dv/dy)`` in units per mm and its 2 x 2 covariance.

        At the centroid by default (where it is ``(c1, c2)`` for either degree).
        """
        u = 0.0 if x is None else float(x) - self.centre_mm[0]
        w = 0.0 if y is None else float(y) - self.centre_mm[1]
        jac = np.zeros((2, len(self.terms)))
        jac[0, 1] = jac[1, 2] = 1.0
        if self.degree == 2:
            jac[0, 3], jac[0, 4] = 2.0 * u, w
            jac[1, 4], jac[1, 5] = u, 2.0 * w
        return jac @ self.coefficients, jac @ self.covariance @ jac.T

    def gradient_summary(self) -> dict[str, Any]:
        """Gradient at the centroid: components, magnitude and direction with uncertainties.

        Magnitude and direction (degree, counter-clockwise from +x, pointing to increasing
        values) are propagated linearly from the component covariance.
        """
        g, cov = self.gradient()
        mag = float(np.hypot(*g))
        unit = f"{self.units}/{self.length_units}"
        out: dict[str, Any] = {"at_mm": list(self.centre_mm), "units": unit,
                               "confidence": self.confidence}
        sx, sy = np.sqrt(np.clip(np.diag(cov), 0.0, None))
        out["x"] = {"value": float(g[0]), "sigma": float(sx), "units": unit}
        out["y"] = {"value": float(g[1]), "sigma": float(sy), "units": unit}
        if mag > 0:
            j_mag = g / mag
            j_dir = np.array([-g[1], g[0]]) / mag**2
            s_mag = float(np.sqrt(max(j_mag @ cov @ j_mag, 0.0)))
            s_dir = float(np.degrees(np.sqrt(max(j_dir @ cov @ j_dir, 0.0))))
        else:
            s_mag, s_dir = float(np.sqrt(np.trace(cov))), 180.0
        out["magnitude"] = {"value": mag, "sigma": s_mag, "units": unit}
        out["direction"] = {"value": float(np.degrees(np.arctan2(g[1], g[0]))),
                            "sigma": s_dir, "units": "degree"}
        for key in ("x", "y", "magnitude", "direction"):
            e = out[key]
            e["low"], e["high"] = e["value"] - self.z * e["sigma"], e["value"] + self.z * e["sigma"]
        return out

    def bounds(self, pad: float = 0.0) -> tuple[float, float, float, float]:
        """``(xmin, xmax, ymin, ymax)`` of the fitted positions, widened by ``pad`` mm."""
        return (float(self.x_mm.min()) - pad, float(self.x_mm.max()) + pad,
                float(self.y_mm.min()) - pad, float(self.y_mm.max()) + pad)

    def grid(self, n: int = 121, pad: float = 0.0):
        """Mean and standard error on an ``n x n`` grid over :meth:`bounds`: ``(X, Y, M, S)``."""
        x0, x1, y0, y1 = self.bounds(pad)
        if x1 <= x0:
            x0, x1 = x0 - 1.0, x1 + 1.0
        if y1 <= y0:
            y0, y1 = y0 - 1.0, y1 + 1.0
        xx, yy = np.meshgrid(np.linspace(x0, x1, n), np.linspace(y0, y1, n))
        mean, se = self.evaluate(xx, yy)
        return xx, yy, mean, se

    def level_line(self, level: float = 0.0, *, n: int = 121) -> list[dict[str, list[float]]]:
        """Where the surface equals ``level`` inside the measured area, with a band.

        Each segment holds points ``x``, ``y`` (mm) of the fitted line, the standard error
        of its position across the line ``sigma_mm = SE(v) / |grad v|`` (delta method),
        and the band edges ``x_low``/``y_low`` and ``x_high``/``y_high`` at
        ``confidence`` (``z * sigma_mm`` on either side, along the local gradient).
        """
        import contourpy

        xx, yy, mean, _ = self.grid(n)
        gen = contourpy.contour_generator(xx, yy, mean, line_type=contourpy.LineType.Separate)
        out = []
        for seg in gen.lines(level):
            if len(seg) < 2:
                continue
            px, py = seg[:, 0], seg[:, 1]
            _, se = self.evaluate(px, py)
            grads = np.array([self.gradient(a, b)[0] for a, b in zip(px, py, strict=True)])
            norm = np.hypot(grads[:, 0], grads[:, 1])
            with np.errstate(divide="ignore", invalid="ignore"):
                sigma = np.where(norm > 0, se / norm, np.inf)
                nx, ny = grads[:, 0] / norm, grads[:, 1] / norm
            out.append({
                "x": px.tolist(), "y": py.tolist(), "sigma_mm": sigma.tolist(),
                "x_low": (px - self.z * sigma * nx).tolist(),
                "y_low": (py - self.z * sigma * ny).tolist(),
                "x_high": (px + self.z * sigma * nx).tolist(),
                "y_high": (py + self.z * sigma * ny).tolist(),
            })
        return out

    def contains_level(self, x, y, level: float = 0.0) -> np.ndarray:
        """Whether ``level`` lies inside the pointwise ``confidence`` interval at ``(x, y)``.

        The zero-detuning band is the set of positions where this holds for ``level = 0``.
        """
        mean, se = self.evaluate(x, y)
        return np.abs(mean - level) <= self.z * se

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready description with units (written to ``surface.json``)."""
        coef_units = [self.units if t == "1" else
                      f"{self.units}/{self.length_units}" if t in ("x", "y") else
                      f"{self.units}/{self.length_units}^2" for t in self.terms]
        return {
            "quantity": self.quantity,
            "model": f"polynomial of degree {self.degree} in x, y about the centroid",
            "degree": self.degree,
            "units": self.units,
            "length_units": self.length_units,
            "centre_mm": list(self.centre_mm),
            "coefficients": [
                {"term": t, "value": float(c), "sigma": float(math.sqrt(max(v, 0.0))),
                 "units": u}
                for t, c, v, u in zip(self.terms, self.coefficients,
                                      np.diag(self.covariance), coef_units, strict=True)
            ],
            "covariance": self.covariance.tolist(),
            "chi2": self.chi2,
            "dof": self.dof,
            "scale_factor": self.scale_factor,
            "confidence": self.confidence,
            "n_positions": len(self.values),
            "positions": list(self.positions),
            "points": {"x_mm": self.x_mm.tolist(), "y_mm": self.y_mm.tolist(),
                       "values": self.values.tolist(), "sigmas": self.sigmas.tolist()},
            "gradient": self.gradient_summary(),
            "zero_line": self.level_line(0.0),
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> SurfaceFit:
        """Rebuild from :meth:`to_dict`."""
        pts = d["points"]
        return cls(
            degree=int(d["degree"]),
            terms=tuple(c["term"] for c in d["coefficients"]),
            coefficients=np.array([c["value"] for c in d["coefficients"]], dtype=float),
            covariance=np.array(d["covariance"], dtype=float),
            centre_mm=tuple(d["centre_mm"]),
            units=d["units"],
            length_units=d["length_units"],
            chi2=float(d["chi2"]),
            dof=int(d["dof"]),
            scale_factor=float(d["scale_factor"]),
            x_mm=np.array(pts["x_mm"], dtype=float),
            y_mm=np.array(pts["y_mm"], dtype=float),
            values=np.array(pts["values"], dtype=float),
            sigmas=np.array(pts["sigmas"], dtype=float),
            positions=list(d.get("positions", [])),
            confidence=float(d.get("confidence", 0.95)),
            quantity=str(d.get("quantity", "detuning")),
        )


def fit_surface(
    x_mm,
    y_mm,
    values,
    sigmas,
    *,
    degree: int = 1,
    units: str = "meV",
    confidence: float = 0.95,
    positions: list[str] | None = None,
    quantity: str = "detuning",
) -> SurfaceFit:
    """Weighted least-squares fit of a polynomial surface of degree 1 or 2 in ``x``, ``y``.

    Weights are ``1 / sigma^2``.  The coefficient covariance is ``(A^T W A)^-1``, multiplied
    by ``chi2 / dof`` when that exceeds one (the scale-factor practice of the Particle
    Data Group's averages, value from memory), so an imperfect polynomial does not
    produce overconfident intervals.

    Parameters
    ----------
    x_mm, y_mm
        Positions (mm).
    values, sigmas
        Values and their standard uncertainties (e.g. half the 68 % interval).
    degree
        1 (plane, 3 coefficients) or 2 (quadric, 6 coefficients).
    units
        Units of ``values``.
    confidence
        Level of intervals and bands.
    positions
        Names of the points (kept for the record).
    quantity
        What is fitted (kept for the record).

    Returns
    -------
    SurfaceFit

    Raises
    ------
    FitError
        Too few points, positive uncertainties missing, or positions that do not span
        the surface (all on one line for degree 1).
    ConfigError
        A degree other than 1 or 2.
    """
    from polkit.errors import FitError

    if degree not in _TERMS:
        raise ConfigError(f"expected a surface degree of 1 or 2; found {degree!r}",
                          key="surface_degree")
    x = np.asarray(x_mm, dtype=float).ravel()
    y = np.asarray(y_mm, dtype=float).ravel()
    v = np.asarray(values, dtype=float).ravel()
    s = np.asarray(sigmas, dtype=float).ravel()
    if not (x.size == y.size == v.size == s.size):
        raise FitError(f"x, y, values and sigmas differ in length ({x.size}, {y.size}, "
                       f"{v.size}, {s.size})")
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(v) & np.isfinite(s) & (s > 0)
    n_terms = len(_TERMS[degree])
    if ok.sum() < n_terms:
        raise FitError(
            f"a degree-{degree} surface needs at least {n_terms} positions with a finite value "
            f"and a positive uncertainty; found {int(ok.sum())}"
        )
    names = [p for p, k in zip(positions, ok, strict=True) if k] if positions else []
    x, y, v, s = x[ok], y[ok], v[ok], s[ok]
    centre = (float(x.mean()), float(y.mean()))
    a = _design(x - centre[0], y - centre[1], degree)
    aw = a / s[:, None]
    vw = v / s
    if np.linalg.matrix_rank(aw) < n_terms:
        raise FitError(
            f"the {x.size} positions do not determine a degree-{degree} surface (they lie "
            "on a line or a conic); measure positions off that line or lower the degree"
        )
    coef, *_ = np.linalg.lstsq(aw, vw, rcond=None)
    cov = np.linalg.inv(aw.T @ aw)
    resid = vw - aw @ coef
    chi2 = float(resid @ resid)
    dof = int(x.size - n_terms)
    scale = math.sqrt(chi2 / dof) if dof > 0 and chi2 > dof else 1.0
    return SurfaceFit(
        degree=degree,
        terms=_TERMS[degree],
        coefficients=coef,
        covariance=cov * scale**2,
        centre_mm=centre,
        units=units,
        length_units="mm",
        chi2=chi2,
        dof=dof,
        scale_factor=scale,
        x_mm=x,
        y_mm=y,
        values=v,
        sigmas=s,
        positions=names,
        confidence=confidence,
        quantity=quantity,
    )


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
    folder = Path(out) / POSITIONS_DIR
    n = len(specs)
    status, reason, summaries = [], [], []
    for spec in specs:
        pos = folder / spec.position_id
        done = _read_json(pos / DONE_FILE)
        summary = None
        if done is None:
            status.append("pending")
            reason.append("no result yet (interrupted or not run)")
        else:
            status.append(str(done.get("status", "failed")))
            reason.append(_one_line(done.get("reason", "")))
            if status[-1] != "failed":
                summary = _read_json(pos / "summary.json")
                if summary is None:
                    status[-1] = "failed"
                    reason[-1] = "summary.json missing or unreadable"
        summaries.append(summary)

    params: dict[str, str] = {}
    probs: dict[str, tuple[str, str]] = {}
    for s in summaries:
        if s is None:
            continue
        for name, e in s.get("parameters", {}).items():
            params.setdefault(name, str(e.get("units", "")))
        for name, e in s.get("probabilities", {}).items():
            probs.setdefault(name, (str(e.get("units", "1")), str(e.get("long_name", name))))

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
    ds = xr.Dataset(data_vars, coords=coords)
    ds.attrs.update({"title": "polkit wafer survey", "Conventions": "CF-1.8"})
    ds.attrs.update({k: _attr(v) for k, v in (attrs or {}).items()})
    return ds


def _attr(value):
    if isinstance(value, (bool, np.bool_)):
        return int(value)
    if isinstance(value, (str, int, float, np.integer, np.floating)):
        return value
    return json.dumps(value)


def _surface_from(ds: xr.Dataset, degree: int) -> tuple[SurfaceFit | None, str]:
    if "detuning" not in ds:
        return None, "no detuning in any result"
    ok = (ds["status"] == "ok").values
    q = ds["detuning"]
    median = q.sel(statistic="median").values
    sigma = 0.5 * (q.sel(statistic="q84").values - q.sel(statistic="q16").values)
    use = ok & np.isfinite(median) & np.isfinite(sigma) & np.isfinite(ds["x"].values)
    from polkit.errors import FitError

    try:
        surf = fit_surface(
            ds["x"].values[use], ds["y"].values[use], median[use], sigma[use], degree=degree,
            units=str(q.attrs.get("units", "meV")),
            positions=[str(p) for p in ds["position"].values[use]],
        )
    except FitError as exc:
        return None, str(exc)
    return surf, ""


def _csv_text(ds: xr.Dataset) -> str:
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
        if self.surface is not None:
            g = self.surface.gradient_summary()
            lines.append(
                f"detuning gradient at ({g['at_mm'][0]:.1f}, {g['at_mm'][1]:.1f}) mm: "
                f"d/dx = {g['x']['value']:.4g} +/- {g['x']['sigma']:.2g}, "
                f"d/dy = {g['y']['value']:.4g} +/- {g['y']['sigma']:.2g} {g['units']} "
                f"(degree-{self.surface.degree} surface, {len(self.surface.values)} positions, "
                f"chi2/dof = {self.surface.chi2:.3g}/{self.surface.dof})"
            )
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
        else:
            lines.append(f"no detuning surface: {self.surface_note}")
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
        surf = _read_json(out / SURFACE_JSON)
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


# ----------------------------------------------------------------------------------------
# driver
# ----------------------------------------------------------------------------------------
def _state(out: Path, mode: str, model: str, seed, priors_key) -> np.random.SeedSequence:
    """Open or create ``survey_state.json``; returns the root seed of this survey."""
    path = out / STATE_FILE
    old = _read_json(path) if path.exists() else None
    if path.exists() and old is None:
        raise ConfigError(
            f"{STATE_FILE} is unreadable; expected the JSON written by run_survey. Fix: "
            "choose a new output folder, or delete the file to start the survey afresh",
            path=path,
            key=STATE_FILE,
        )
    if old is not None:
        for key, value in (("mode", mode), ("model", model)):
            if old.get(key) != value:
                raise ConfigError(
                    f"this folder holds a survey with {key} = {old.get(key)!r}; asked for "
                    f"{value!r}. Fix: use another output folder for a different {key}",
                    path=path,
                    key=key,
                )
        entropy = int(old["seed_entropy"])
        spawn_key = tuple(int(k) for k in old.get("seed_spawn_key", []))
        if seed is not None:
            asked = root_seed(seed)
            if (int(asked.entropy), tuple(asked.spawn_key)) != (entropy, spawn_key):
                raise ConfigError(
                    f"this folder holds a survey seeded with entropy {entropy}; asked for "
                    f"{asked.entropy}. Fix: pass seed=None (or the original seed) to continue "
                    "it, or use another output folder",
                    path=path,
                    key="seed",
                )
        if old.get("priors") != priors_key:
            log.info("survey priors changed since the last run; positions will be refitted")
        state = dict(old, priors=priors_key)
        write_json(path, state)
        return np.random.SeedSequence(entropy, spawn_key=spawn_key)
    root = root_seed(seed)
    write_json(path, {
        "format": _STATE_FORMAT,
        "mode": mode,
        "model": model,
        "seed_entropy": str(int(root.entropy)),
        "seed_spawn_key": [int(k) for k in root.spawn_key],
        "priors": priors_key,
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
    })
    return root


def _sha_or_none(path: Path) -> str | None:
    from polkit.files import file_sha256

    try:
        return file_sha256(path)
    except OSError:
        return None


def _priors_key(priors) -> Any:
    if priors is None:
        return None
    if isinstance(priors, dict):
        return json.loads(json.dumps(priors, sort_keys=True, default=str))
    p = Path(priors)
    if not p.is_file():
        raise ConfigError("expected a priors file (TOML); found nothing at this path",
                          path=p, key="priors")
    return {"file": str(p.resolve()), "sha256": _sha_or_none(p)}


def _task(spec: PositionSpec, child: np.random.SeedSequence, out: Path, mode: str, model: str,
          priors, priors_key, max_steps) -> dict[str, Any]:
    pos_priors = spec.priors if spec.priors is not None else priors
    key = {
        "file_sha256": _sha_or_none(spec.file),
        "file": str(spec.file),
        "mode": mode,
        "model": spec.model or model,
        "kind": spec.kind,
        "energy_window": list(spec.energy_window) if spec.energy_window else None,
        "wavelength_medium": spec.wavelength_medium,
        "priors": ({"file": str(spec.priors), "sha256": _sha_or_none(spec.priors)}
                   if spec.priors is not None else priors_key),
        "seed_entropy": str(int(child.entropy)),
        "seed_spawn_key": [int(k) for k in child.spawn_key],
    }
    return {
        "position_id": spec.position_id,
        "folder": str(out / POSITIONS_DIR / spec.position_id),
        "file": str(spec.file),
        "mode": mode,
        "model": spec.model or model,
        "kind": spec.kind,
        "energy_window": spec.energy_window,
        "wavelength_medium": spec.wavelength_medium,
        "priors": str(pos_priors) if isinstance(pos_priors, Path) else pos_priors,
        "seed": child,
        "max_steps": max_steps,
        "key": key,
    }


def _finished(task: dict[str, Any], retry_failed: bool) -> bool:
    folder = Path(task["folder"])
    done = _read_json(folder / DONE_FILE)
    if done is None or done.get("key") != task["key"]:
        return False
    status = done.get("status")
    if status not in STATUSES:
        return False
    if status != "failed" and not (folder / "summary.json").is_file():
        return False
    return not (retry_failed and status != "ok")


def _default_workers() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:
        return max(1, os.cpu_count() or 1)


def _local_cluster_options() -> dict[str, Any]:
    """Where the embedded cluster listens and keeps its scratch files.

    The scheduler and the workers listen on the loopback interface only (127.0.0.1) and
    the dask dashboard is off: nothing of a survey is reachable from the network.  Worker
    scratch space (spilled data, worker files) goes to dask's ``temporary-directory``
    setting when it is set, else to the system's temporary folder
    (:func:`tempfile.gettempdir`, e.g. ``/tmp``, or ``$TMPDIR`` when set), in a
    ``dask-scratch-space`` folder that dask removes when the workers close.
    """
    import tempfile

    import dask

    scratch = dask.config.get("temporary-directory", default=None) or tempfile.gettempdir()
    log.info("survey: dask scratch space in %s", scratch)
    return {"host": "127.0.0.1", "dashboard_address": None, "local_directory": scratch}


@contextlib.contextmanager
def _client(scheduler, workers: int | None):
    """A dask client: an embedded LocalCluster, or one on an existing scheduler."""
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - a declared dependency
        raise ConfigError(
            "the survey runs on dask.distributed, which is not installed. Fix: pip install "
            "'dask[distributed]'",
            key="scheduler",
        ) from None
    if scheduler is not None:
        if isinstance(scheduler, Client):
            yield scheduler
            return
        address = getattr(scheduler, "scheduler_address", scheduler)  # a cluster object
        try:
            client = Client(str(address), timeout="30s")
        except (OSError, TimeoutError) as exc:
            raise ConfigError(
                f"cannot reach the dask scheduler at {scheduler!r} ({exc}). Fix: check the "
                "address (tcp://host:port) and that the scheduler is running",
                key="scheduler",
            ) from None
        try:
            yield client
        finally:
            client.close()
        return
    n = workers or _default_workers()
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           **_local_cluster_options(), silence_logs=_scheduler_log_level())
    try:
        client = Client(cluster)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


def _scheduler_log_level() -> int:
    """The embedded cluster's own log level: errors only, unless polkit logs at INFO or below
    (``polkit --verbose`` / ``--debug``), so its lines do not reach the terminal by default."""
    return logging.INFO if logging.getLogger().isEnabledFor(logging.INFO) else logging.ERROR


def run_survey(
    manifest: str | os.PathLike,
    *,
    mode: str = "quick",
    workers: int | None = None,
    scheduler=None,
    out: str | os.PathLike,
    seed: int | np.random.SeedSequence | None = None,
    progress: bool = True,
    model: str = "two",
    max_steps: int | None = None,
    retry_failed: bool = False,
    priors: str | os.PathLike | dict | None = None,
    surface_degree: int = 1,
    figures: bool = True,
) -> SurveyResult:
    """Fit every position of a wafer on dask.distributed and map the results across it.

    Parameters
    ----------
    manifest
        CSV manifest or folder of map files (see :func:`read_manifest`).
    mode
        ``"quick"``: the peak-table posterior of each map (fast); ``"full"``: the
        whole-map MCMC with its convergence gate.
    workers
        Worker processes of the embedded cluster (one thread each); default: the cores
        available to this process.  Not allowed together with ``scheduler``.
    scheduler
        Address of an existing dask scheduler (``"tcp://host:8786"``), a cluster object
        with a ``scheduler_address`` (e.g. dask-jobqueue's ``SLURMCluster``) or a
        :class:`dask.distributed.Client`; the workers must import the same polkit, run one
        thread each, and see the map files and ``out`` at the same paths.  Default: an embedded
        ``LocalCluster(processes=True, threads_per_worker=1)``, closed at the end.
    out
        Output folder (see the module docstring).  A rerun into the same folder skips
        finished positions.
    seed
        Root seed; one child per position is spawned in manifest order.  ``None``: fresh
        entropy on the first run, the recorded one on reruns.  The root entropy is stored
        in ``survey_state.json`` and ``survey.nc``.
    progress
        One ``tqdm.auto`` bar over completed positions.
    model
        ``"two"`` or ``"three"`` oscillators (a manifest ``model`` column overrides it).
    max_steps
        MCMC step limit per position (default: the dispersion job's).
    retry_failed
        Also refit positions recorded as failed or not converged.
    priors
        TOML file or dict of priors for every position (a manifest ``priors`` column
        overrides it).
    surface_degree
        1 (plane) or 2 (quadric) for the detuning surface.
    figures
        Write ``wafer_maps.png`` and ``wafer_detuning.png``.

    Returns
    -------
    SurveyResult
        ``counts`` gives how many positions succeeded, failed and did not converge;
        ``table()`` the printable report.

    Raises
    ------
    DataError
        A bad manifest (naming the file, row and column).
    ConfigError
        Bad options, an unreachable scheduler, or an output folder holding a survey with
        another mode, model or seed.
    """
    if mode not in MODES:
        raise ConfigError(f"expected mode 'quick' or 'full'; found {mode!r}", key="mode")
    if model not in MODELS:
        raise ConfigError(f"expected model 'two' or 'three'; found {model!r}", key="model")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int)
                                or workers < 1):
        raise ConfigError(f"expected workers >= 1 (an int); found {workers!r}", key="workers")
    if workers is not None and scheduler is not None:
        raise ConfigError(
            "workers sets the size of the embedded cluster; with scheduler= the existing "
            "cluster decides. Fix: pass one of them",
            key="workers",
        )
    if max_steps is not None and (isinstance(max_steps, bool) or int(max_steps) < 1):
        raise ConfigError(f"expected max_steps >= 1; found {max_steps!r}", key="max_steps")
    if surface_degree not in _TERMS:
        raise ConfigError(f"expected surface_degree 1 or 2; found {surface_degree!r}",
                          key="surface_degree")

    specs = read_manifest(manifest)
    out = Path(out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    with folder_lock(out):  # one survey per output folder, after the manifest is read
        priors_key = _priors_key(priors)
        priors_arg = (str(Path(priors).resolve()) if isinstance(priors, (str, os.PathLike))
                      else priors)
        root = _state(out, mode, model, seed, priors_key)
        children = root.spawn(len(specs))
        tasks = [_task(s, c, out, mode, model, priors_arg, priors_key, max_steps)
                 for s, c in zip(specs, children, strict=True)]
        todo = [t for t in tasks if not _finished(t, retry_failed)]
        todo_ids = {t["position_id"] for t in todo}
        reused = [t["position_id"] for t in tasks if t["position_id"] not in todo_ids]
        log.info("survey of %d positions: %d to fit, %d finished earlier", len(tasks), len(todo),
                 len(reused))
        fitted: list[str] = []
        if todo:
            fitted = _run_tasks(todo, scheduler, workers, progress)

        attrs = {
            "mode": mode,
            "model": model,
            "seed_entropy": str(int(root.entropy)),
            "seed_spawn_key": json.dumps([int(k) for k in root.spawn_key]),
            "manifest": str(Path(manifest)),
            "polkit_version": _polkit_version(),
            "created": datetime.now(UTC).isoformat(timespec="seconds"),
            "comment": "per-position results in positions/<position>/ (posterior.nc, "
                       "summary.json, done.json)",
        }
        ds = assemble_survey(out, specs, attrs=attrs)
        surface, note = _surface_from(ds, surface_degree)
        surf_dict = surface.to_dict() if surface is not None else {"degree": None, "note": note}
        ds.attrs["detuning_surface"] = json.dumps(_json_ready(surf_dict))
        files = [
            write_netcdf(out / SURVEY_NC, ds),
            write_text(out / SURVEY_CSV, _csv_text(ds)),
            write_json(out / SURFACE_JSON, surf_dict),
        ]
        result = SurveyResult(dataset=ds, surface=surface, out=out, fitted=fitted, reused=reused,
                              surface_note=note, files=files)
        if figures:
            from polkit.plotting import survey as plots_survey

            result.files.extend(plots_survey.survey_figures(ds, surface, out))
        log.info("%s", result.table())
        return result


def _json_ready(obj):
    from polkit.files import json_safe

    return json_safe(obj)


def _polkit_version() -> str:
    from polkit import __version__

    return __version__


def _run_tasks(todo: list[dict], scheduler, workers, progress: bool) -> list[str]:
    """Submit one task per position; collect as they complete; returns the ids fitted."""
    from dask.distributed import as_completed
    from tqdm.auto import tqdm

    fitted: list[str] = []
    with _client(scheduler, workers) as client:
        futures = {}
        for task in todo:
            fut = client.submit(fit_position, task, pure=False,
                                key=f"polkit-survey-{task['position_id']}-{os.urandom(4).hex()}")
            futures[fut.key] = (fut, task)
        bar = tqdm(total=len(todo), disable=not progress, desc="survey", unit="position",
                   dynamic_ncols=True)
        try:
            for fut in as_completed([f for f, _ in futures.values()]):
                task = futures[fut.key][1]
                try:
                    record = fut.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker fails one position
                    record = _lost(task, exc)
                fitted.append(task["position_id"])
                bar.set_postfix_str(f"{task['position_id']}: {record['status']}", refresh=False)
                bar.update(1)
        except BaseException:
            client.cancel([f for f, _ in futures.values()])
            raise
        finally:
            bar.close()
    return fitted


def _lost(task: dict[str, Any], exc: BaseException) -> dict[str, Any]:
    """Record a position whose task died with its worker (the task itself never raises)."""
    record = {
        "position": task["position_id"],
        "file": task["file"],
        "key": task["key"],
        "status": "failed",
        "reason": _one_line(f"the worker running it was lost ({type(exc).__name__}: {exc})"),
        "warnings": [],
        "finished": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    try:
        write_json(Path(task["folder"]) / DONE_FILE, record)
    except OSError as err:
        log.warning("%s: cannot record the failure (%s)", task["position_id"], err)
    return record

"""Reading the manifest of a wafer survey: which map was measured where, with which options.

A manifest is a CSV file whose header carries units in brackets (one row per measured
position), or a folder of map files whose attributes carry ``x`` and ``y``
(:mod:`polkit.jobs.survey.folders`).  Every position becomes a :class:`PositionSpec`;
anything wrong stops with a :class:`~polkit.errors.DataError` naming the file, the row and
the column.
"""

from __future__ import annotations

import csv
import math
import os
import re
from dataclasses import dataclass
from pathlib import Path
from typing import Any

from polkit.errors import DataError
from polkit.units import ENERGY_UNITS, WAFER_LENGTH_UNITS

__all__ = [
    "read_manifest",
    "PositionSpec",
    "LENGTH_UNITS",
    "safe_label",
]

#: length spellings accepted for wafer positions -> factor to mm (see polkit.units)
LENGTH_UNITS: dict[str, float] = WAFER_LENGTH_UNITS

# manifest columns: name -> kind of value (text, or a number in length or energy units)
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


def safe_label(text: str) -> str:
    """``text`` made fit for a folder name (at most 60 characters, never empty)."""
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
        # a folder of maps is read with the map readers of polkit.data
        from polkit.jobs.survey.folders import read_folder

        return read_folder(path)
    if not path.is_file():
        raise DataError(
            "expected a manifest (CSV with columns file, x [mm], y [mm]) or a folder of map "
            "files; found nothing at this path. Fix: check the path",
            path=path,
            field="manifest",
        )
    return _read_csv_manifest(path)


# ----------------------------------------------------------------------------------------
# the CSV manifest
# ----------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Header:
    """The header of a CSV manifest, checked: its columns, units and where it stands."""

    path: Path
    line: int
    delimiter: str
    columns: list[tuple[str, str, str | None]]  # (name, header cell, units)
    factors: dict[str, float]  # numeric column -> factor to mm or eV

    @property
    def cells(self) -> dict[str, str]:
        """Column name -> its header cell as written."""
        return {name: cell for name, cell, _ in self.columns}


@dataclass(frozen=True)
class _Row:
    """One row of a CSV manifest: its cells by column name and where it stands."""

    header: _Header
    row: int
    line: int
    cell: dict[str, str]

    def where(self, name: str) -> str:
        return f"row {self.row} (line {self.line}), column {self.header.cells[name]!r}"

    def number(self, name: str, *, required: bool) -> float:
        return _cell_number(self.cell[name], self.where(name), self.header.path,
                            self.header.cells[name], required=required)


def _read_csv_manifest(path: Path) -> list[PositionSpec]:
    from polkit.data.text import decode_text, split_comments

    text = decode_text(path.read_bytes(), path=path)
    _, lines = split_comments(text)
    if not lines:
        raise DataError(
            "expected a header line (file, x [mm], y [mm], ...) and one row per position; "
            "found only comments or blank lines",
            path=path,
            field="header",
        )
    header = _read_header(path, *lines[0])
    specs: list[PositionSpec] = []
    files_seen: dict[str, tuple[int, int, str]] = {}
    for row, (line, text_line) in enumerate(lines[1:], start=1):
        specs.append(_position(_split_cells(header, row, line, text_line), len(specs),
                               files_seen))
    if not specs:
        raise DataError(
            f"expected one row per position after the header (line {header.line}); found "
            "none. Fix: add rows (file, x, y)",
            path=path,
            field="rows",
        )
    return specs


def _read_header(path: Path, header_line: int, text: str) -> _Header:
    """The header line: known columns, each once, the required ones, units where numeric."""
    from polkit.data.text import parse_header_name

    delimiter = next((d for d in ("\t", ",", ";") if d in text), ",")
    columns: list[tuple[str, str, str | None]] = []
    seen: dict[str, str] = {}
    for cell in _split_row(text, delimiter, path, header_line):
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
    return _Header(path, header_line, delimiter, columns,
                   _unit_factors(path, header_line, columns))


def _unit_factors(path: Path, header_line: int,
                  columns: list[tuple[str, str, str | None]]) -> dict[str, float]:
    """Factor to mm (positions) or eV (energy window) of every numeric column."""
    factors = {}
    for name, cell, units in columns:
        kind = _COLUMNS[name]
        if kind == _TEXT:
            continue
        table = LENGTH_UNITS if kind == _LENGTH else ENERGY_UNITS
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
    return factors


def _split_cells(header: _Header, row: int, line: int, text: str) -> _Row:
    values = _split_row(text, header.delimiter, header.path, line)
    if len(values) != len(header.columns):
        raise DataError(
            f"row {row} (line {line}): expected {len(header.columns)} cells like the header; "
            f"found {len(values)}. Fix: add empty cells or remove extra ones",
            path=header.path,
            field=f"row {row}",
        )
    cell = {name: v.strip() for (name, _, _), v in zip(header.columns, values, strict=True)}
    return _Row(header, row, line, cell)


def _position(r: _Row, index: int, files_seen: dict[str, tuple[int, int, str]]) -> PositionSpec:
    """The position of one row (``files_seen`` collects the maps of the rows before)."""
    file_path = _row_file(r, files_seen)
    x = r.number("x", required=True)
    y = r.number("y", required=True)
    options = _row_options(r)
    window = _row_window(r)
    priors = _row_priors(r)
    label = r.cell.get("label") or Path(r.cell["file"]).stem
    return PositionSpec(
        index=index,
        position_id=f"{index:03d}_{safe_label(label)}",
        file=file_path.resolve(),
        file_label=r.cell["file"],
        x_mm=x * r.header.factors["x"],
        y_mm=y * r.header.factors["y"],
        kind=options.get("kind"),
        model=options.get("model"),
        wavelength_medium=options.get("wavelength_medium"),
        energy_window=window,
        priors=None if priors is None else priors.resolve(),
        line=r.line,
    )


def _row_file(r: _Row, files_seen: dict[str, tuple[int, int, str]]) -> Path:
    path = r.header.path
    if not r.cell["file"]:
        raise DataError(
            f"{r.where('file')}: expected a map file name; found an empty cell. Fix: fill "
            "it in or delete the row",
            path=path,
            field="file",
        )
    file_path = Path(r.cell["file"])
    if not file_path.is_absolute():
        file_path = path.parent / file_path
    # the same map under two names (relative and absolute, a symbolic link, '..'):
    # compared after resolving every link
    key = os.path.realpath(file_path)
    if key in files_seen:
        first_row, first_line, first_name = files_seen[key]
        raise DataError(
            f"{r.where('file')}: {r.cell['file']!r} is the same map as {first_name!r} in row "
            f"{first_row} (line {first_line}) (both are {key}); each map is one "
            "position. Fix: remove one of the two rows",
            path=path,
            field="file",
        )
    files_seen[key] = (r.row, r.line, r.cell["file"])
    return file_path


def _row_options(r: _Row) -> dict[str, Any]:
    # the kinds and media of polkit's maps; the oscillator models of the dispersion job
    from polkit.data.schema import KINDS, MEDIA
    from polkit.jobs.dispersion.problem import COUPLED_MODELS

    options: dict[str, Any] = {}
    for name, allowed in (("kind", KINDS), ("model", tuple(COUPLED_MODELS)),
                          ("wavelength_medium", MEDIA)):
        value = r.cell.get(name, "")
        if not value:
            continue
        if value.lower() not in allowed:
            raise DataError(
                f"{r.where(name)}: expected one of {', '.join(allowed)} (or an empty cell); "
                f"found {value!r}",
                path=r.header.path,
                field=r.header.cells[name],
            )
        options[name] = value.lower()
    return options


def _row_window(r: _Row) -> tuple[float, float] | None:
    lo = hi = math.nan
    if r.cell.get("energy_min"):
        lo = r.number("energy_min", required=False)
    if r.cell.get("energy_max"):
        hi = r.number("energy_max", required=False)
    if math.isnan(lo) and math.isnan(hi):
        return None
    lo = lo * r.header.factors["energy_min"] if not math.isnan(lo) else 0.0
    hi = hi * r.header.factors["energy_max"] if not math.isnan(hi) else 1e6
    if not lo < hi:
        raise DataError(
            f"row {r.row} (line {r.line}): expected energy_min < energy_max; found "
            f"{lo:g} eV and {hi:g} eV. Fix: swap or correct the window",
            path=r.header.path,
            field=r.header.cells.get("energy_max", r.header.cells.get("energy_min")),
        )
    return (lo, hi)


def _row_priors(r: _Row) -> Path | None:
    if not r.cell.get("priors"):
        return None
    priors = Path(r.cell["priors"])
    if not priors.is_absolute():
        priors = r.header.path.parent / priors
    if not priors.is_file():
        raise DataError(
            f"{r.where('priors')}: expected a priors file; found nothing at "
            f"{r.cell['priors']!r} (relative to the manifest's folder). Fix: correct "
            "the path or empty the cell",
            path=r.header.path,
            field=r.header.cells["priors"],
        )
    return priors


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

"""CSV tables whose header cells carry units in brackets.

Example (an invented up/down sweep)::

    # sample: invented demo cavity; temperature: 10
    power [mW],intensity [counts],peak_energy [eV],linewidth [meV],sweep
    0.5,120,1.4521,0.31,up
    1.0,260,1.4523,0.32,up

The first non-comment line is the header; ``#`` lines anywhere are comments (and may
carry ``key: value`` metadata).  A UTF-8 byte-order mark and CRLF line ends are fine.
The delimiter is a tab, comma or semicolon, decided from the header line.  The column
``sweep`` holds text; every cell of a column with units, or of a column polkit uses
(power, intensity, peak energy, linewidth, their errors), must be a number with a
decimal point (an empty cell is a missing value).  Other columns without units may
hold free text; they are dropped with a warning when the series is built.  Decimal
commas and unparsable cells are refused with the line and column named.

The reader returns a raw table (dim ``row``); :mod:`polkit.data.assemble` turns it
into the canonical series.
"""

from __future__ import annotations

import csv
import logging
from pathlib import Path

import numpy as np
import xarray as xr

from polkit.data.roles import is_series_column
from polkit.data.text import (
    decode_text,
    parse_header_name,
    parse_metadata,
    parse_number,
    text_lines,
)
from polkit.errors import DataError

__all__ = ["read", "TEXT_COLUMNS"]

logger = logging.getLogger(__name__)

#: columns that hold text rather than numbers
TEXT_COLUMNS = ("sweep",)


def _delimiter(header: str) -> str:
    for d in ("\t", ",", ";"):
        if d in header:
            return d
    return ","


def _cells(line: str, delimiter: str, *, path, number: int) -> list[str]:
    try:
        return next(csv.reader([line], delimiter=delimiter, strict=False))
    except (csv.Error, StopIteration) as exc:
        raise DataError(
            f"expected a delimited row at line {number}; found unreadable text ({exc}). "
            "Fix: correct the quoting of that line",
            path=path,
            field="file",
        ) from None


def read(path, *, delimiter: str | None = None) -> xr.Dataset:
    """Read a CSV table into a raw table on dim ``row``.

    Parameters
    ----------
    path
        The file.
    delimiter
        Force a delimiter instead of detecting it from the header line.

    Returns
    -------
    xarray.Dataset
        One variable per column (``units`` attribute from the brackets), the comment
        metadata as attributes.

    Raises
    ------
    DataError
        For empty files, bad headers, ragged rows, decimal commas and bad cells.
    """
    data = Path(path).read_bytes()
    text = decode_text(data, path=path)
    comments, lines = text_lines(text, expected="a header line and data rows", path=path)
    delim, names, units = _header(lines[0], delimiter, path=path)
    rows = lines[1:]
    if not rows:
        raise DataError(
            "expected data rows below the header; found none. Fix: check the export",
            path=path,
            field="file",
        )
    columns = _columns(rows, len(names), delim, path=path)
    variables = {}
    for name, unit, cells in zip(names, units, columns, strict=True):
        values = _column_values(name, unit, cells, rows, path=path)
        attrs = {"units": unit} if unit else {}
        variables[name] = xr.Variable(("row",), values, attrs)
    meta = parse_metadata(comments)
    logger.debug("read %d rows x %d columns from %s", len(rows), len(names), path)
    return xr.Dataset(variables, attrs=meta)


def _header(header_line: tuple[int, str], delimiter, *, path):
    """The delimiter, and the column names and units of the header line."""
    header_number, header_line = header_line
    delim = delimiter or _delimiter(header_line)
    header = _cells(header_line, delim, path=path, number=header_number)
    while header and not header[-1].strip():
        header.pop()
    if not header:
        raise DataError(
            f"expected column names on line {header_number}; found an empty header. "
            "Fix: add a header such as 'power [mW],intensity [counts]'",
            path=path,
            field="header",
        )
    names: list[str] = []
    units: list[str | None] = []
    for cell in header:
        name, unit = parse_header_name(cell, path=path, field=cell.strip() or "header")
        if name in names:
            raise DataError(
                f"expected distinct column names; found {name!r} twice. Fix: rename one column",
                path=path,
                field=name,
            )
        names.append(name)
        units.append(unit)
    return delim, names, units


def _columns(rows, n_names: int, delim: str, *, path) -> list[list[str]]:
    """The cells of the data rows, column by column (one cell per header column)."""
    columns: list[list[str]] = [[] for _ in range(n_names)]
    for number, line in rows:
        cells = _cells(line, delim, path=path, number=number)
        while len(cells) > n_names and not cells[-1].strip():
            cells.pop()
        if len(cells) != n_names:
            hint = (
                " (decimal commas split numbers into extra cells: export with '.' as "
                "decimal separator)"
                if len(cells) > n_names and delim == ","
                else ""
            )
            raise DataError(
                f"expected {n_names} cells at line {number} (one per header column); "
                f"found {len(cells)}.{hint} Fix: make every row match the header",
                path=path,
                field="row",
            )
        for i, cell in enumerate(cells):
            columns[i].append(cell)
    return columns


def _column_values(name: str, unit, cells: list[str], rows, *, path) -> np.ndarray:
    """Numbers of a column, or its text (``sweep``, free-text columns polkit does not use)."""
    if name in TEXT_COLUMNS:
        return np.array([c.strip() for c in cells], dtype=str)
    try:
        return np.array(
            [
                parse_number(c, path=path, line=line_number, column=name)
                for c, (line_number, _) in zip(cells, rows, strict=True)
            ],
            dtype=float,
        )
    except DataError:
        if unit or is_series_column(name):
            raise
        # a free-text column (notes, file names) that polkit does not use
        return np.array([c.strip() for c in cells], dtype=str)

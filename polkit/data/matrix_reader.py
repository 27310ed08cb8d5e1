"""Plain-text matrices with the axes in the first row and the first column.

Example (invented numbers)::

    # rows: wavelength [nm]; columns: angle [degree]; signal: intensity [counts]
    0      -20.0  -19.5  ...
    845.0  101.0  99.0   ...
    845.1  103.0  98.0   ...

The first data row holds the column axis (its first cell is a corner that is ignored,
and may be left out); every further row starts with its row-axis value.  Which axis is
which, and their units, come from the header comment keys ``rows`` and ``columns``
(``name [units]``), or from the ``rows=``/``columns=`` options.  Without either, rows
are taken as the spectral axis named ``energy`` and columns as ``angle``, with units
left open for the caller (``energy_units=``, ``angle_units=``): no units are guessed.
Cells are separated by a tab, semicolon, comma or white space (decided from the first
data row); decimal commas are refused with the line and column named.
"""

from __future__ import annotations

import logging
import re
from pathlib import Path

import numpy as np
import xarray as xr

from polkit.data.text import (
    decode_text,
    parse_header_name,
    parse_metadata,
    parse_number,
    split_comments,
)
from polkit.errors import DataError

__all__ = ["read", "looks_like_matrix"]

logger = logging.getLogger(__name__)

_DEFAULT_ROWS = ("energy", None)
# cells made only of characters a strict number can hold (digits, sign, point, exponent,
# nan/inf); numpy accepts more (underscores, non-ASCII digits), which this excludes
_PLAIN_CELL = re.compile(r"^[0-9.eE+\-]+$")
_DEFAULT_COLUMNS = ("angle", None)


def _delimiter(line: str) -> str | None:
    for d in ("\t", ";", ","):
        if d in line:
            return d
    return None


def _split(line: str, delimiter: str | None) -> list[str]:
    cells = line.split() if delimiter is None else [c.strip() for c in line.split(delimiter)]
    while cells and not cells[-1]:
        cells.pop()
    return cells


def looks_like_matrix(first_line: str) -> bool:
    """True when a first data line holds only numbers (a matrix axis row), not names."""
    cells = _split(first_line, _delimiter(first_line))
    cells = [c for c in cells if c]
    if not cells:
        return False
    numeric = re.compile(r"^[+-]?(?:\d+[.,]?\d*|\.\d+)(?:[eE][+-]?\d+)?$|^[+-]?(?:nan|inf)$", re.I)
    return all(numeric.match(c) for c in cells[1:]) and len(cells) > 1


def _axis_spec(spec, default, *, path, field) -> tuple[str, str | None]:
    if spec is None:
        return default
    name, units = parse_header_name(str(spec), path=path, field=field)
    return name, units


def read(path, *, rows=None, columns=None) -> xr.Dataset:
    """Read a text matrix into a raw 2-D signal with its two axes.

    Parameters
    ----------
    path
        The file.
    rows, columns
        ``"name [units]"`` of the row and column axes (override the header comment).

    Returns
    -------
    xarray.Dataset
        Variable ``signal`` with dims (row axis, column axis); header metadata as
        attributes.

    Raises
    ------
    DataError
        For empty files, ragged rows, decimal commas and unparsable cells.
    """
    text = decode_text(Path(path).read_bytes(), path=path)
    comments, lines = split_comments(text)
    meta = parse_metadata(comments)
    axis_cells, body = _matrix_cells(lines, path=path)
    rname, runits = _axis_spec(
        rows or meta.pop("rows", None), _DEFAULT_ROWS, path=path, field="rows"
    )
    cname, cunits = _axis_spec(
        columns or meta.pop("columns", None), _DEFAULT_COLUMNS, path=path, field="columns"
    )
    meta.pop("rows", None)
    meta.pop("columns", None)
    if rname == cname:
        raise DataError(
            f"expected two different axes; found both named {rname!r}. Fix: correct the header",
            path=path,
            field="columns",
        )
    col_axis = np.array(
        [parse_number(c, path=path, line=lines[0][0], column=cname) for c in axis_cells]
    )
    row_axis, signal = _parse_body(body, rname, cname, path=path)
    sig_name, sig_units = _signal_name(meta.pop("signal", None), rname, cname, path=path)
    sig_attrs = {"units": sig_units} if sig_units else {}
    coords = {
        rname: (rname, row_axis, {"units": runits} if runits else {}),
        cname: (cname, col_axis, {"units": cunits} if cunits else {}),
    }
    logger.debug("read a %d x %d matrix from %s", *signal.shape, path)
    ds = xr.Dataset({sig_name: ((rname, cname), signal, sig_attrs)}, coords=coords, attrs=meta)
    return ds


def _matrix_cells(lines, *, path):
    """The column-axis cells (corner dropped) and the split data rows, checked for shape."""
    if len(lines) < 2:
        raise DataError(
            f"expected an axis row and at least one data row; found {len(lines)} data line(s). "
            "Fix: check the export",
            path=path,
            field="file",
        )
    delim = _delimiter(lines[0][1])
    axis_cells = _split(lines[0][1], delim)
    body = [(n, _split(line, delim)) for n, line in lines[1:]]
    width = len(body[0][1])
    for number, cells in body:
        if len(cells) != width:
            raise DataError(
                f"expected {width} cells at line {number} (like the first data row); found "
                f"{len(cells)}. Fix: make every row the same length",
                path=path,
                field="row",
            )
    if width < 2:
        raise DataError(
            f"expected a row-axis value followed by signal values at line {body[0][0]}; found "
            f"{width} cell(s). Fix: check the delimiter",
            path=path,
            field="row",
        )
    if len(axis_cells) == width:
        axis_cells = axis_cells[1:]  # drop the corner cell
    elif len(axis_cells) != width - 1:
        raise DataError(
            f"expected {width - 1} column-axis values on line {lines[0][0]} (one per signal "
            f"column); found {len(axis_cells)}. Fix: make the axis row match the data rows",
            path=path,
            field="columns",
        )
    return axis_cells, body


def _parse_body(body, rname: str, cname: str, *, path) -> tuple[np.ndarray, np.ndarray]:
    """The row-axis values and the signal matrix of the data rows."""
    width = len(body[0][1])
    row_axis = np.empty(len(body))
    signal = np.empty((len(body), width - 1))
    for i, (number, cells) in enumerate(body):
        row_axis[i] = parse_number(cells[0], path=path, line=number, column=rname)
        if all(_PLAIN_CELL.match(c) for c in cells[1:]):
            # fast path: plain ASCII numbers, which numpy parses exactly as parse_number
            try:
                signal[i] = np.array(cells[1:], dtype=float)
                continue
            except ValueError:
                pass
        for j, cell in enumerate(cells[1:]):
            signal[i, j] = parse_number(cell, path=path, line=number, column=f"{cname} #{j + 1}")
    return row_axis, signal


def _signal_name(spec, rname: str, cname: str, *, path) -> tuple[str, str | None]:
    """Name and units of the signal from the header key ``signal`` (default ``signal``)."""
    sig_name, sig_units = "signal", None
    if spec:
        if spec.strip().startswith("["):
            spec = "signal " + spec
        name, units = parse_header_name(spec, path=path, field="signal")
        sig_name = name
        if units is None and " " not in name:
            # "signal: counts" gives the units alone
            sig_name, units = "signal", spec.strip()
        sig_units = units
        if sig_name in (rname, cname):
            sig_name = "signal"
    return sig_name, sig_units

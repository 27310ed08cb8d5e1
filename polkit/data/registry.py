"""Choose a reader for a file from its content (and suffix), or by name.

Binary files are recognised by their first bytes: HDF5/netCDF-4 and classic netCDF
go to the ``netcdf`` reader, zip archives to the ``npz`` reader.  A text file whose
first non-comment line holds names is a ``csv`` table; one whose first line holds
only numbers is a ``matrix``.  A suffix that promises a binary format the content
does not have is refused rather than parsed as text.
"""

from __future__ import annotations

import inspect
import os
import re
from collections.abc import Callable
from pathlib import Path

import xarray as xr

from polkit.data import csv_reader, matrix_reader, netcdf_reader, npz_reader
from polkit.data.text import decode_text, text_lines
from polkit.errors import ConfigError, DataError

__all__ = ["READERS", "choose_reader", "read_raw"]

#: reader name -> function(path, **options) -> raw xarray.Dataset
READERS: dict[str, Callable[..., xr.Dataset]] = {
    "netcdf": netcdf_reader.read,
    "csv": csv_reader.read,
    "matrix": matrix_reader.read,
    "npz": npz_reader.read,
}

_NETCDF_SUFFIXES = {".nc", ".nc4", ".cdf", ".h5", ".hdf5", ".hdf", ".he5"}
_ZIP_MAGIC = b"PK\x03\x04"


def choose_reader(path, reader: str | None = None) -> str:
    """Name of the reader for ``path``.

    Raises
    ------
    DataError
        For missing or empty files, unknown reader names, and suffixes that
        contradict the content.
    """
    p = Path(path)
    if reader is not None:
        if reader not in READERS:
            raise DataError(
                f"expected reader one of {sorted(READERS)}; found {reader!r}",
                path=path,
                field="reader",
            )
    if not p.is_file():
        raise DataError(
            "expected an existing file; found "
            + ("a folder" if p.is_dir() else "nothing at this path")
            + ". Fix: check the path",
            path=path,
            field="file",
        )
    if os.path.getsize(p) == 0:
        raise DataError(
            "expected data; found an empty file (0 bytes). Fix: check the export",
            path=path,
            field="file",
        )
    if reader is not None:
        return reader
    with open(p, "rb") as fh:
        head = fh.read(8)
    suffix = p.suffix.lower()
    if head == netcdf_reader.HDF5_MAGIC or head.startswith(netcdf_reader.CDF_MAGICS):
        return "netcdf"
    if head.startswith(_ZIP_MAGIC):
        return "npz"
    if suffix in _NETCDF_SUFFIXES or suffix == ".npz":
        kind = "netCDF/HDF5" if suffix != ".npz" else ".npz (zip)"
        raise DataError(
            f"expected a {kind} file as its suffix says; found content starting with {head!r}. "
            "Fix: check the file, or pass reader= to read it as another format",
            path=path,
            field="file",
        )
    text = decode_text(p.read_bytes(), path=path)
    _refuse_settings_file(p, text)
    _, lines = text_lines(text, expected="data lines", found="only comments or blank lines",
                          path=path)
    return "matrix" if matrix_reader.looks_like_matrix(lines[0][1]) else "csv"


#: settings-file suffixes and what polkit reads them as
_SETTINGS = {".toml": "TOML", ".json": "JSON", ".yaml": "YAML", ".yml": "YAML", ".ini": "INI"}
_TOML_LINE = re.compile(r"^\s*(\[[A-Za-z_][\w.\-]*\]|[A-Za-z_][\w\-]*\s*=\s*\S)")


def _refuse_settings_file(p: Path, text: str) -> None:
    """Refuse a settings file (TOML, JSON, YAML) or a survey manifest given as data."""
    suffix = p.suffix.lower()
    stripped = text.lstrip("\ufeff \t\r\n")
    kind = _SETTINGS.get(suffix)
    if kind is None and stripped and stripped[0] in "{[":
        first = stripped.splitlines()[0]
        kind = "TOML" if _TOML_LINE.match(first) else "JSON"
    if kind is None:
        body = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
        if body and all(_TOML_LINE.match(ln) for ln in body[:3]):
            kind = "TOML"
    if kind is not None:
        raise DataError(
            f"this looks like a settings file ({kind}), not data. polkit reads settings as "
            "--priors, --calibration or --device (TOML); data files are maps or power series "
            "(netCDF/HDF5, CSV, plain-text matrix, .npz)",
            path=p, field="file")
    header = [ln for ln in text.splitlines() if ln.strip() and not ln.lstrip().startswith("#")]
    if header:
        names = [c.strip().split(" ")[0].strip().lower() for c in header[0].split(",")]
        if "file" in names and "x" in names and "y" in names:
            raise DataError(
                "this is a survey manifest (columns file, x, y), not a data file. Fix: run "
                f"'polkit survey {p.name}', or inspect one of the maps it lists",
                path=p, field="file")


def read_raw(path, reader: str | None = None, **options) -> tuple[xr.Dataset, str]:
    """Read ``path`` with the chosen reader; return the raw dataset and the reader's name.

    Raises
    ------
    ConfigError
        For options the chosen reader does not take.
    """
    name = choose_reader(path, reader)
    func = READERS[name]
    accepted = [
        p.name for p in inspect.signature(func).parameters.values() if p.kind is p.KEYWORD_ONLY
    ]
    unknown = sorted(set(options) - set(accepted))
    if unknown:
        raise ConfigError(
            f"expected options of the {name} reader ({', '.join(accepted) or 'none'}); found "
            f"{', '.join(unknown)}. Fix: drop them or choose another reader=",
            path=path,
            key=unknown[0],
        )
    return func(path, **options), name

"""Positions of a survey from a folder of map files whose attributes carry ``x`` and ``y``."""

from __future__ import annotations

import logging
import math
import re
from pathlib import Path

import numpy as np

from polkit.config.manifest import LENGTH_UNITS, PositionSpec, safe_label
from polkit.errors import DataError, PolkitError

__all__ = ["read_folder", "MAP_SUFFIXES"]

log = logging.getLogger(__name__)

#: map files considered in folder mode
MAP_SUFFIXES = (".nc", ".nc4", ".h5", ".hdf5", ".npz", ".txt")
_VALUE_WITH_UNITS_RE = re.compile(r"^\s*([+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)\s*(\S*)\s*$")


def read_folder(folder: Path) -> list[PositionSpec]:
    """One position per map file of ``folder`` (sorted by name), placed by its attributes.

    A map that cannot be read stays a position with an unknown place (NaN): its fit fails
    with the reason and the others go on.  See :func:`polkit.config.manifest.read_manifest`.
    """
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
                position_id=f"{index:03d}_{safe_label(file.stem)}",
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

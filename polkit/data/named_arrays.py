"""Turn a bag of named arrays (``.npz`` members, plain HDF5 datasets) into a raw dataset.

Conventions shared by the ``.npz`` and plain-HDF5 readers:

- ``units_<name>``: a string giving the units of array ``<name>`` (``units`` alone is
  the units of the signal).  In HDF5 the dataset's own ``units`` attribute does this.
- ``dims_<name>``: optional string array naming the axes of an N-D array in order,
  e.g. ``dims_signal = ["wavelength", "angle"]``.  Without it the axes are matched by
  length, preferring the conventional order (power, angle/k, spectral); a square
  signal is therefore read as (angle, spectral).
- Other 0-d arrays (numbers or strings) become attributes (``kind``, ``sample``,
  ``temperature``, ``na`` ...).
- Without any N-D array the file is a table: every 1-D array becomes a column on
  dim ``row`` and all must have the same length.
"""

from __future__ import annotations

import itertools

import numpy as np
import xarray as xr

from polkit.data.roles import ROLE_RANK, SIGNAL_NAMES, axis_role
from polkit.errors import DataError

__all__ = ["arrays_to_raw"]


def _text(value, *, path, field) -> str:
    arr = np.asarray(value)
    if arr.dtype.kind in "SU" and arr.size == 1:
        item = arr.reshape(()).item()
        return item.decode("utf-8", "replace") if isinstance(item, bytes) else str(item)
    raise DataError(
        f"expected a single string; found an array of dtype {arr.dtype} and shape {arr.shape}. "
        f"Fix: store {field} as a string such as 'nm'",
        path=path,
        field=field,
    )


def _attr_value(value):
    arr = np.asarray(value)
    item = arr.reshape(()).item()
    if isinstance(item, bytes):
        return item.decode("utf-8", "replace")
    if isinstance(item, (bool, np.bool_)):
        return int(item)
    return item


def arrays_to_raw(
    arrays: dict[str, np.ndarray],
    *,
    units: dict[str, str] | None = None,
    attrs: dict | None = None,
    path=None,
) -> xr.Dataset:
    """Build a raw dataset from named arrays.

    Parameters
    ----------
    arrays
        Name -> array (``units_*`` and ``dims_*`` entries included).
    units
        Name -> units found elsewhere (HDF5 attributes); ``units_*`` entries win.
    attrs
        File-level attributes.
    path
        For messages.

    Returns
    -------
    xarray.Dataset
        Raw dataset for :mod:`polkit.data.assemble`.
    """
    units, out_attrs, dims_of, data = _sort_arrays(arrays, units, attrs, path=path)

    def attrs_for(name):
        return {"units": units[name]} if units.get(name) else {}

    multi = {n: a for n, a in data.items() if a.ndim >= 2}
    one = {n: a for n, a in data.items() if a.ndim == 1}
    if not multi:
        return _table_dataset(one, attrs_for, out_attrs, path=path)
    axes = {n: a for n, a in one.items() if axis_role(n, units.get(n)) is not None}
    variables = {}
    coords = {n: (n, a, attrs_for(n)) for n, a in axes.items()}
    for name, arr in multi.items():
        if name in dims_of:
            dims = _named_dims(name, arr, dims_of[name], one, path=path)
            for d in dims:
                coords.setdefault(d, (d, one[d], attrs_for(d)))
        else:
            dims = _match_dims(name, arr.shape, axes, units, path=path)
        variables[name] = xr.Variable(tuple(dims), arr, attrs_for(name))
    for n, a in one.items():
        if n not in coords:
            coords[n] = (n, a, attrs_for(n))
    try:
        return xr.Dataset(variables, coords=coords, attrs=out_attrs)
    except ValueError as exc:
        raise DataError(
            f"expected arrays whose lengths match their axes; found {exc}. Fix: check the shapes",
            path=path,
            field="file",
        ) from None


def _sort_arrays(arrays: dict, units, attrs, *, path):
    """Units, file attributes, declared axis names and data arrays, from the named arrays."""
    units = dict(units or {})
    out_attrs = dict(attrs or {})
    dims_of: dict[str, list[str]] = {}
    data: dict[str, np.ndarray] = {}
    for name, value in arrays.items():
        if name.startswith("units_"):
            units[name[len("units_") :]] = _text(value, path=path, field=name)
        elif name == "units":
            units.setdefault("signal", _text(value, path=path, field=name))
        elif name.startswith("dims_"):
            dims_of[name[len("dims_") :]] = _axis_names(value, path=path, field=name)
        else:
            arr = np.asarray(value)
            if arr.ndim == 0:
                out_attrs[name] = _attr_value(arr)
            elif arr.dtype.kind not in "biufSU":
                raise DataError(
                    f"expected numbers or strings; found dtype {arr.dtype}. "
                    "Fix: store plain numeric arrays",
                    path=path,
                    field=name,
                )
            else:
                data[name] = arr
    if "signal" in units:
        # 'units' alone names the units of whichever array is the signal
        for cand in SIGNAL_NAMES:
            if cand in data and cand not in units:
                units[cand] = units["signal"]
                break
    if not data:
        raise DataError(
            "expected named arrays (a signal and its axes, or table columns); found none. "
            "Fix: check the file",
            path=path,
            field="file",
        )
    return units, out_attrs, dims_of, data


def _axis_names(value, *, path, field) -> list[str]:
    arr = np.asarray(value)
    if arr.dtype.kind not in "SU" or arr.ndim != 1:
        raise DataError(
            f"expected a 1-D string array of axis names; found dtype {arr.dtype}, shape "
            f"{arr.shape}. Fix: store e.g. np.array(['angle', 'wavelength'])",
            path=path,
            field=field,
        )
    return [(v.decode("utf-8", "replace") if isinstance(v, bytes) else str(v)) for v in arr]


def _table_dataset(one: dict, attrs_for, out_attrs: dict, *, path) -> xr.Dataset:
    """Without an N-D array the file is a table: 1-D columns of equal length on dim ``row``."""
    lengths = {n: a.size for n, a in one.items()}
    if len(set(lengths.values())) > 1:
        raise DataError(
            "expected table columns of equal length; found lengths "
            + ", ".join(f"{n}={v}" for n, v in lengths.items())
            + ". Fix: give one value per row in every column",
            path=path,
            field="file",
        )
    variables = {n: xr.Variable(("row",), a, attrs_for(n)) for n, a in one.items()}
    return xr.Dataset(variables, attrs=out_attrs)


def _named_dims(name: str, arr: np.ndarray, dims: list[str], one: dict, *, path) -> list[str]:
    """The axis names ``dims_<name>`` declares, checked against the 1-D arrays."""
    missing = [d for d in dims if d not in one]
    if len(dims) != arr.ndim or missing:
        raise DataError(
            f"expected {arr.ndim} axis names that are 1-D arrays in the file; found "
            f"{dims} (missing: {missing}). Fix: correct dims_{name}",
            path=path,
            field=f"dims_{name}",
        )
    return dims


def _match_dims(name, shape, axes, units, *, path) -> list[str]:
    roles = {n: axis_role(n, units.get(n)) for n in axes}
    best = None
    for combo in itertools.permutations(axes, len(shape)):
        if any(axes[n].size != s for n, s in zip(combo, shape, strict=True)):
            continue
        combo_roles = [roles[n] for n in combo]
        if len({ROLE_RANK[r] for r in combo_roles}) != len(combo_roles):
            continue
        ranks = [ROLE_RANK[r] for r in combo_roles]
        score = (ranks != sorted(ranks),)
        if best is None or score < best[0]:
            best = (score, list(combo))
    if best is None:
        raise DataError(
            f"expected 1-D axis arrays matching the signal's shape {shape}; found axes "
            + (", ".join(f"{n}[{a.size}]" for n, a in axes.items()) or "none")
            + ". Fix: store the axes (angle/k/pixel, energy/wavelength/wavenumber, power) with "
            f"lengths matching the signal, or name them in dims_{name}",
            path=path,
            field=name,
        )
    return best[1]

"""The named checks every validation is made of (see :mod:`polkit.data.validate`).

Each check refuses one kind of fault with a :class:`~polkit.errors.DataError` worded as
expected / found / fix, naming the file and the field, or warns with a
:class:`~polkit.errors.DataWarning` for issues that do not stop an analysis.
"""

from __future__ import annotations

import math
import warnings
from numbers import Integral, Real

import numpy as np
import xarray as xr

from polkit.data.schema import ENERGY_DIM, MAP_NUMBER_ATTRS
from polkit.errors import DataError, DataWarning

__all__ = [
    "fail",
    "warn",
    "as_float",
    "check_signal_shape",
    "check_axis_values",
    "estimate_noise",
    "netcdf_safe",
    "check_attrs_safe",
    "check_number_attrs",
    "check_signal_units",
    "check_values",
    "check_negative",
    "check_masked_flag",
    "check_type",
    "checked_jacobian",
    "NEGATIVE_SIGMA",
    "PLAUSIBLE_ENERGY_EV",
]

#: emission below -NEGATIVE_SIGMA noise sigma counts as negative beyond noise
NEGATIVE_SIGMA = 5.0
#: photon energies outside this range (eV) draw a warning about the axis units
PLAUSIBLE_ENERGY_EV = (0.3, 10.0)
_MAD_TO_SIGMA = 1.4826


def fail(expected: str, found: str, fix: str, *, path=None, field=None) -> None:
    """Raise a :class:`DataError` worded as expected / found / fix."""
    raise DataError(f"expected {expected}; found {found}. Fix: {fix}", path=path, field=field)


def require_units(got, want: str, where: str, fix: str, *, path=None, field=None,
                  missing: str = "none") -> None:
    """Refuse units ``got`` that are not ``want`` (``missing``: the word for no units)."""
    if got != want:
        fail(f"units {want!r} {where}", missing if got is None else repr(got), fix, path=path,
             field=field)


def warn(message: str, *, path=None, field=None, stacklevel: int = 3) -> None:
    """Warn with a :class:`DataWarning` naming the file and the field."""
    where = ": ".join(
        p for p in (None if path is None else str(path), field and f"field '{field}'") if p
    )
    warnings.warn(f"{where}: {message}" if where else message, DataWarning, stacklevel=stacklevel)


def as_float(values, *, path, field, what) -> np.ndarray:
    arr = np.asarray(values)
    if arr.dtype.kind not in "biuf":
        fail(
            f"numeric {what}",
            f"values of dtype {arr.dtype}",
            "store plain numbers (no text, complex or date values)",
            path=path,
            field=field,
        )
    return arr.astype(np.float64, copy=False)


def check_signal_shape(signal_shape, axis_lengths: dict[str, int], *, path=None, field="signal"):
    """Refuse a signal whose shape does not match the lengths of its axes.

    Parameters
    ----------
    signal_shape
        ``signal.shape``.
    axis_lengths
        Axis name -> length, in the signal's axis order.
    """
    expected = tuple(axis_lengths.values())
    if tuple(signal_shape) != expected:
        names = " x ".join(f"{k}[{v}]" for k, v in axis_lengths.items())
        transposed = tuple(signal_shape) == expected[::-1] and len(expected) == 2
        fix = (
            "the signal is transposed: swap its axes (signal.T) or the axis names"
            if transposed
            else "give axes whose lengths match the signal's shape"
        )
        fail(
            f"a signal of shape {expected} ({names})",
            f"shape {tuple(signal_shape)}",
            fix,
            path=path,
            field=field,
        )


def check_axis_values(values, name: str, *, path=None, units: str = "") -> np.ndarray:
    """Refuse non-finite, duplicate or non-ascending axis values; return float64 values."""
    v = as_float(values, path=path, field=name, what="axis values")
    if v.ndim != 1:
        fail(
            "a 1-D axis", f"{v.ndim} dimensions", "give the axis as a vector", path=path, field=name
        )
    if not np.all(np.isfinite(v)):
        bad = int(np.count_nonzero(~np.isfinite(v)))
        fail(
            "finite axis values",
            f"{bad} NaN/Inf value(s)",
            "remove or fix the missing axis values",
            path=path,
            field=name,
        )
    if v.size > 1:
        d = np.diff(v)
        if np.any(d == 0):
            i = int(np.flatnonzero(d == 0)[0])
            fail(
                "distinct axis values",
                f"the value {v[i]:g} {units} repeated at positions {i} and {i + 1}".replace(
                    "  ", " "
                ),
                "remove the duplicated row/column or average the repeated spectra",
                path=path,
                field=name,
            )
        if np.any(d < 0):
            i = int(np.flatnonzero(d < 0)[0])
            fail(
                "a monotonic axis (strictly ascending in the canonical object)",
                f"{v[i]:g} followed by {v[i + 1]:g} at positions {i}-{i + 1}",
                "sort the axis together with the signal, or check for a stitched/garbled axis",
                path=path,
                field=name,
            )
    return v


def estimate_noise(signal: np.ndarray, axis: int = -1) -> float:
    """Robust noise sigma from pixel-to-pixel differences along ``axis``.

    sigma = 1.4826 MAD(diff) / sqrt(2); smooth structure hardly contributes to the
    differences, so this measures the white noise.  NaNs are ignored.
    """
    x = np.asarray(signal, dtype=float)
    if x.shape[axis] < 2:
        return 0.0
    d = np.diff(x, axis=axis).ravel()
    d = d[np.isfinite(d)]
    if d.size == 0:
        return 0.0
    mad = np.median(np.abs(d - np.median(d)))
    return float(_MAD_TO_SIGMA * mad / math.sqrt(2.0))


def netcdf_safe(value) -> bool:
    if isinstance(value, (str, bytes)) or (
        isinstance(value, (Real, Integral, np.number)) and not isinstance(value, (bool, np.bool_))
    ):
        return True
    if isinstance(value, (list, tuple, np.ndarray)):
        arr = np.asarray(value)
        return arr.ndim == 1 and arr.dtype.kind in "iuf"
    return False


def check_attrs_safe(attrs: dict, *, path) -> None:
    for key, value in attrs.items():
        if not netcdf_safe(value):
            fail(
                "attributes netCDF can store (text, numbers or 1-D numeric arrays)",
                f"{type(value).__name__} {value!r}",
                "store flags as int and structured metadata as JSON text",
                path=path,
                field=key,
            )


def check_number_attrs(attrs: dict, *, path) -> dict:
    out = dict(attrs)
    for key, (units, lower, inclusive) in MAP_NUMBER_ATTRS.items():
        if key not in attrs:
            continue
        value = attrs[key]
        try:
            number = float(value)
        except (TypeError, ValueError):
            number = float("nan")
        ok = math.isfinite(number) and (number >= lower if inclusive else number > lower)
        if not ok:
            bound = f">= {lower:g}" if inclusive else f"> {lower:g}"
            fail(
                f"a finite number {bound} ({units})",
                repr(value),
                f"set attribute '{key}' to a number in {units}, or remove it",
                path=path,
                field=key,
            )
        out[key] = number
    return out


def check_signal_units(units, *, path, field) -> str:
    if not isinstance(units, str) or not units.strip():
        fail(
            "the units of the signal (e.g. 'counts', 'counts/s', '1' for a reflectance)",
            "none" if units in (None, "") else repr(units),
            "add a 'units' attribute to the signal, or pass signal_units=...",
            path=path,
            field=field,
        )
    return units.strip()


def check_values(
    values: np.ndarray, masked: int, *, path, field, allow_nan: bool = False
) -> np.ndarray:
    if np.isinf(values).any():
        n = int(np.isinf(values).sum())
        fail(
            "finite values",
            f"{n} infinite value(s)",
            "load with mask_nonfinite=True to mask them, or fix the data",
            path=path,
            field=field,
        )
    nan = np.isnan(values)
    if nan.any():
        if not (masked or allow_nan):
            fail(
                "finite values (NaN only where attrs masked=1)",
                f"{int(nan.sum())} NaN value(s)",
                "load with mask_nonfinite=True to mask them, or fix the data",
                path=path,
                field=field,
            )
        if nan.all():
            fail(
                "some unmasked values",
                "every value is NaN",
                "check the file; nothing is left to analyse",
                path=path,
                field=field,
            )
    return values


def check_negative(values: np.ndarray, attrs: dict, *, path, field) -> None:
    if "read_noise" in attrs:
        sigma = float(attrs["read_noise"])
        how = "read_noise attribute"
    else:
        sigma = estimate_noise(values, axis=-1)
        how = "robust noise estimate"
    finite = values[np.isfinite(values)]
    scale = float(np.max(np.abs(finite))) if finite.size else 0.0
    sigma = max(sigma, 1e-9 * scale, np.finfo(float).tiny)
    low = finite < -NEGATIVE_SIGMA * sigma
    n_low = int(np.count_nonzero(low))
    if n_low == 0:
        return
    limit = max(3, int(1e-4 * finite.size))
    found = (
        f"{n_low} pixel(s) below -{NEGATIVE_SIGMA:g} sigma (sigma = {sigma:.4g} "
        f"{attrs.get('units', '')} from the {how}; minimum {finite.min():.4g})"
    )
    if n_low > limit:
        fail(
            "emission counts that are not negative beyond the noise",
            found,
            "check the dark/background subtraction (or set kind='reflectance' if it is one)",
            path=path,
            field=field,
        )
    warn(f"{found}; a few such pixels can be defects", path=path, field=field)


def checked_jacobian(da: xr.DataArray, *, path) -> dict:
    """The map's ``jacobian`` coordinate, checked (1-D along energy, finite, > 0, units)."""
    if "jacobian" not in da.coords:
        return {}
    c = da.coords["jacobian"]
    values = np.asarray(c.values, dtype=float) if c.dtype.kind in "iuf" else None
    if c.dims != (ENERGY_DIM,) or values is None or not np.all(np.isfinite(values)) or np.any(
        values <= 0
    ) or not c.attrs.get("units"):
        fail(
            "a 1-D coordinate 'jacobian' along energy with finite positive values and units",
            f"dims {c.dims}, units {c.attrs.get('units')!r}",
            "let polkit's loaders apply the wavelength Jacobian, or drop the coordinate",
            path=path,
            field="jacobian",
        )
    return {"jacobian": (ENERGY_DIM, values, dict(c.attrs))}


def check_masked_flag(attrs: dict, *, path) -> int:
    """The ``masked`` flag of ``attrs`` (default 0), refused unless it is the int 0 or 1."""
    masked = attrs.get("masked", 0)
    if masked not in (0, 1) or isinstance(masked, (bool, np.bool_)):
        fail(
            "masked = 0 or 1 (int)",
            repr(masked),
            "store the flag as int",
            path=path,
            field="masked",
        )
    return masked


def check_type(obj, cls: type, expected: str, *, maker: str, path, field: str):
    """Refuse ``obj`` unless it is a ``cls`` (a map or a series built by ``maker``).

    Returns a copy of its attributes and the path for messages (default: its ``source``).
    """
    if not isinstance(obj, cls):
        fail(
            expected,
            type(obj).__name__,
            f"build the {field} with polkit.data.{maker}",
            path=path,
            field=field,
        )
    attrs = dict(obj.attrs)
    return attrs, attrs.get("source") if path is None else path

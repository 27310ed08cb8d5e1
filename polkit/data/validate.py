"""All validation of canonical maps and series, in one place.

Every reader calls :func:`validate_map` or :func:`validate_series` after it has built
the canonical object, and so does every preprocessing step; both can be called on
in-memory objects too.  A refusal is a :class:`~polkit.errors.DataError` whose message
names the file, the field, what was expected, what was found and the fix.  Issues that
do not stop an analysis are :class:`~polkit.errors.DataWarning`.

Negative emission
    A background-subtracted emission map fluctuates around zero, but counts far below
    zero mean an over-subtracted background or a wrong offset.  The noise is the
    ``read_noise`` attribute when present, else a robust estimate from the
    pixel-to-pixel differences along energy (1.4826 MAD / sqrt 2).  A Jacobian-scaled
    map is judged in raw counts (signal / ``jacobian``), where ``read_noise`` applies.  More than
    ``max(3, 1e-4 N)`` pixels below -5 sigma is an error; fewer is a warning.
"""

from __future__ import annotations

import logging
import math
import warnings
from numbers import Integral, Real

import numpy as np
import xarray as xr

from polkit.data.schema import (
    ANGLE_DIMS,
    COORD_ATTRS,
    ENERGY_DIM,
    KINDS,
    MAP_NUMBER_ATTRS,
    MEDIA,
    MIN_ANGLES,
    MIN_ENERGIES,
    MIN_POWERS,
    POINT_DIM,
    POWER_DIM,
    SERIES_VARIABLES,
    SWEEPS,
)
from polkit.errors import DataError, DataWarning

__all__ = [
    "fail",
    "validate_map",
    "validate_series",
    "check_axis_values",
    "check_signal_shape",
    "estimate_noise",
    "NEGATIVE_SIGMA",
    "PLAUSIBLE_ENERGY_EV",
]

logger = logging.getLogger(__name__)

#: emission below -NEGATIVE_SIGMA noise sigma counts as negative beyond noise
NEGATIVE_SIGMA = 5.0
#: photon energies outside this range (eV) draw a warning about the axis units
PLAUSIBLE_ENERGY_EV = (0.3, 10.0)
_MAD_TO_SIGMA = 1.4826


def fail(expected: str, found: str, fix: str, *, path=None, field=None) -> None:
    """Raise a :class:`DataError` worded as expected / found / fix."""
    raise DataError(f"expected {expected}; found {found}. Fix: {fix}", path=path, field=field)


def _warn(message: str, *, path=None, field=None) -> None:
    where = ": ".join(
        p for p in (None if path is None else str(path), field and f"field '{field}'") if p
    )
    warnings.warn(f"{where}: {message}" if where else message, DataWarning, stacklevel=3)


def _as_float(values, *, path, field, what) -> np.ndarray:
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
    v = _as_float(values, path=path, field=name, what="axis values")
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


def _netcdf_safe(value) -> bool:
    if isinstance(value, (str, bytes)) or (
        isinstance(value, (Real, Integral, np.number)) and not isinstance(value, (bool, np.bool_))
    ):
        return True
    if isinstance(value, (list, tuple, np.ndarray)):
        arr = np.asarray(value)
        return arr.ndim == 1 and arr.dtype.kind in "iuf"
    return False


def _check_attrs_safe(attrs: dict, *, path) -> None:
    for key, value in attrs.items():
        if not _netcdf_safe(value):
            fail(
                "attributes netCDF can store (text, numbers or 1-D numeric arrays)",
                f"{type(value).__name__} {value!r}",
                "store flags as int and structured metadata as JSON text",
                path=path,
                field=key,
            )


def _check_number_attrs(attrs: dict, *, path) -> dict:
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


def _check_signal_units(units, *, path, field) -> str:
    if not isinstance(units, str) or not units.strip():
        fail(
            "the units of the signal (e.g. 'counts', 'counts/s', '1' for a reflectance)",
            "none" if units in (None, "") else repr(units),
            "add a 'units' attribute to the signal, or pass signal_units=...",
            path=path,
            field=field,
        )
    return units.strip()


def _check_values(
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


def _check_negative(values: np.ndarray, attrs: dict, *, path, field) -> None:
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
    _warn(f"{found}; a few such pixels can be defects", path=path, field=field)


def validate_map(da: xr.DataArray, *, path=None) -> xr.DataArray:
    """Check a map against the canonical schema and return it (as float64).

    Parameters
    ----------
    da
        Dims (``angle`` or ``k``, ``energy``); see :mod:`polkit.data.schema`.
    path
        The file the map came from, for messages (default: ``attrs["source"]``).

    Returns
    -------
    xarray.DataArray
        The same map with float64 values and ``long_name`` filled in where missing.

    Raises
    ------
    DataError
        On any violation of the schema, naming the field.
    """
    if not isinstance(da, xr.DataArray):
        fail(
            "an xarray.DataArray map",
            type(da).__name__,
            "build the map with polkit.data.make_map",
            path=path,
            field="map",
        )
    attrs = dict(da.attrs)
    if path is None:
        path = attrs.get("source")
    if da.ndim != 2 or da.dims[0] not in ANGLE_DIMS or da.dims[1] != ENERGY_DIM:
        fail(
            "dims ('angle' or 'k', 'energy')",
            f"dims {tuple(da.dims)}",
            "name the axes 'angle' [degree] or 'k' [1/um] and 'energy' [eV], in that order "
            "(transpose if needed)",
            path=path,
            field="dims",
        )
    adim = da.dims[0]
    coords = {}
    for dim, minimum in ((adim, MIN_ANGLES), (ENERGY_DIM, MIN_ENERGIES)):
        if dim not in da.coords:
            fail(
                f"coordinate values for dim '{dim}'",
                "none",
                f"attach the {dim} axis as a coordinate",
                path=path,
                field=dim,
            )
        c = da.coords[dim]
        want = COORD_ATTRS[dim]["units"]
        got = c.attrs.get("units")
        if got != want:
            fail(
                f"units {want!r} on coordinate '{dim}'",
                "no units" if got is None else repr(got),
                "convert the axis with polkit's loaders, or set units after converting",
                path=path,
                field=dim,
            )
        values = check_axis_values(c.values, dim, path=path, units=want)
        if values.size < minimum:
            fail(
                f"at least {minimum} {dim} values",
                f"{values.size}",
                "load a larger region or bin less",
                path=path,
                field=dim,
            )
        coords[dim] = values
    if adim == "angle" and np.max(np.abs(coords["angle"])) > 90.0:
        fail(
            "emission angles within -90..90 degree",
            f"angles up to {np.max(np.abs(coords['angle'])):.4g} degree",
            "check the angle units (radian axes must say 'rad'; pixel axes 'pixel')",
            path=path,
            field="angle",
        )
    energy = coords[ENERGY_DIM]
    if energy[0] <= 0:
        fail(
            "positive photon energies",
            f"minimum {energy[0]:.4g} eV",
            "check the energy axis and its units",
            path=path,
            field="energy",
        )
    lo, hi = PLAUSIBLE_ENERGY_EV
    if energy[0] < lo or energy[-1] > hi:
        _warn(
            f"photon energies {energy[0]:.4g}-{energy[-1]:.4g} eV lie outside {lo}-{hi} eV; "
            "check the units of the spectral axis",
            path=path,
            field="energy",
        )

    units = _check_signal_units(attrs.get("units"), path=path, field="units")
    kind = attrs.get("kind")
    if kind not in KINDS:
        fail(
            f"kind one of {KINDS}",
            repr(kind),
            "set attrs['kind'] (or pass kind=... to the loader)",
            path=path,
            field="kind",
        )
    if "wavelength_medium" in attrs and attrs["wavelength_medium"] not in MEDIA:
        fail(
            f"wavelength_medium one of {MEDIA}",
            repr(attrs["wavelength_medium"]),
            "set it to 'vacuum' or 'air'",
            path=path,
            field="wavelength_medium",
        )
    masked = attrs.get("masked", 0)
    if masked not in (0, 1) or isinstance(masked, (bool, np.bool_)):
        fail(
            "masked = 0 or 1 (int)",
            repr(masked),
            "store the flag as int",
            path=path,
            field="masked",
        )
    attrs = _check_number_attrs(attrs, path=path)
    attrs["units"] = units
    attrs["masked"] = int(masked)
    _check_attrs_safe(attrs, path=path)

    values = _as_float(da.values, path=path, field="signal", what="signal values")
    _check_values(values, attrs["masked"], path=path, field="signal")
    extra = _jacobian_coord(da, path=path)
    raw = values / extra["jacobian"][1][None, :] if extra else values
    if kind == "emission":
        _check_negative(raw, attrs, path=path, field="signal")
    if "saturation" in attrs:
        with np.errstate(invalid="ignore"):
            at_level = raw + attrs.get("offset_subtracted", 0.0) >= attrs["saturation"]
        n_sat = int(np.count_nonzero(at_level))
        if n_sat:
            _warn(
                f"{n_sat} pixel(s) at or above the saturation level {attrs['saturation']:g}; "
                "mask them with polkit.data.flag_saturated",
                path=path,
                field="signal",
            )

    out = xr.DataArray(
        values,
        dims=(adim, ENERGY_DIM),
        coords={
            adim: (adim, coords[adim], {**COORD_ATTRS[adim], **da.coords[adim].attrs}),
            ENERGY_DIM: (
                ENERGY_DIM,
                energy,
                {**COORD_ATTRS[ENERGY_DIM], **da.coords[ENERGY_DIM].attrs},
            ),
            **extra,
        },
        attrs=attrs,
        name=da.name,
    )
    return out


def _jacobian_coord(da: xr.DataArray, *, path) -> dict:
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


def _series_table_checks(ds: xr.Dataset, dim: str, *, path) -> None:
    n = ds.sizes[dim]
    if n < MIN_POWERS:
        fail(
            f"at least {MIN_POWERS} powers",
            f"{n}",
            "measure more pump powers",
            path=path,
            field="power",
        )
    if "sweep" in ds.variables:
        if dim != POINT_DIM:
            fail(
                "a series with a sweep label on dim 'point'",
                f"dim '{dim}'",
                "build the series with polkit.data.make_series",
                path=path,
                field="sweep",
            )
        labels = [str(s) for s in np.asarray(ds["sweep"].values).ravel()]
        bad = sorted({s for s in labels if s not in SWEEPS})
        if bad:
            fail(
                f"sweep labels {SWEEPS}",
                ", ".join(repr(b) for b in bad[:5]),
                "label each row 'up' or 'down'",
                path=path,
                field="sweep",
            )


def validate_series(ds: xr.Dataset, *, path=None) -> xr.Dataset:
    """Check a power series (table or spectra cube) against the canonical schema.

    Parameters
    ----------
    ds
        See :mod:`polkit.data.schema`.
    path
        The file it came from, for messages (default: ``attrs["source"]``).

    Returns
    -------
    xarray.Dataset
        The same series with float64 numeric variables.

    Raises
    ------
    DataError
        On any violation of the schema, naming the field.
    """
    if not isinstance(ds, xr.Dataset):
        fail(
            "an xarray.Dataset series",
            type(ds).__name__,
            "build the series with polkit.data.make_series",
            path=path,
            field="series",
        )
    attrs = dict(ds.attrs)
    if path is None:
        path = attrs.get("source")
    if "intensity" not in ds.data_vars:
        fail(
            "a variable 'intensity'",
            f"variables {sorted(map(str, ds.data_vars))}",
            "name the intensity column 'intensity [units]'",
            path=path,
            field="intensity",
        )
    if "power" not in ds.coords:
        fail(
            "a coordinate 'power' [mW]",
            f"coordinates {sorted(map(str, ds.coords))}",
            "name the power column 'power [mW]'",
            path=path,
            field="power",
        )
    intensity = ds["intensity"]
    cube = ENERGY_DIM in intensity.dims
    if cube:
        allowed = [(POWER_DIM, ENERGY_DIM)] + [(POWER_DIM, a, ENERGY_DIM) for a in ANGLE_DIMS]
        if tuple(intensity.dims) not in allowed:
            fail(
                "intensity dims ('power', 'energy') or ('power', 'angle'|'k', 'energy')",
                f"{tuple(intensity.dims)}",
                "transpose the cube",
                path=path,
                field="intensity",
            )
        dim = POWER_DIM
    else:
        if intensity.ndim != 1 or intensity.dims[0] not in (POWER_DIM, POINT_DIM):
            fail(
                "intensity on dim 'power' or 'point'",
                f"dims {tuple(intensity.dims)}",
                "build the series with polkit.data.make_series",
                path=path,
                field="intensity",
            )
        dim = intensity.dims[0]
    power = ds.coords["power"]
    if power.dims != (dim,):
        fail(
            f"power on dim '{dim}'",
            f"dims {power.dims}",
            "build the series with polkit.data.make_series",
            path=path,
            field="power",
        )
    if power.attrs.get("units") != "mW":
        fail(
            "power in units 'mW'",
            repr(power.attrs.get("units")),
            "convert the powers with polkit's loaders",
            path=path,
            field="power",
        )
    pvals = _as_float(power.values, path=path, field="power", what="powers")
    if not np.all(np.isfinite(pvals)):
        fail("finite powers", "NaN/Inf", "fill in every power", path=path, field="power")
    if np.any(pvals < 0):
        fail(
            "powers >= 0 mW",
            f"minimum {pvals.min():g} mW",
            "check the power column and its units",
            path=path,
            field="power",
        )
    if dim == POWER_DIM:
        check_axis_values(pvals, "power", path=path, units="mW")
    masked = attrs.get("masked", 0)
    if masked not in (0, 1) or isinstance(masked, (bool, np.bool_)):
        fail(
            "masked = 0 or 1 (int)",
            repr(masked),
            "store the flag as int",
            path=path,
            field="masked",
        )
    attrs["masked"] = int(masked)
    if cube:
        for adim in (d for d in intensity.dims if d != POWER_DIM):
            c = ds.coords.get(adim)
            want = COORD_ATTRS[adim]["units"]
            if c is None or c.attrs.get("units") != want:
                fail(
                    f"coordinate '{adim}' in {want!r}",
                    "none" if c is None else repr(c.attrs.get("units")),
                    "convert the axis with polkit's loaders",
                    path=path,
                    field=adim,
                )
            check_axis_values(c.values, adim, path=path, units=want)
        if ds.sizes[POWER_DIM] < MIN_POWERS:
            fail(
                f"at least {MIN_POWERS} powers",
                f"{ds.sizes[POWER_DIM]}",
                "measure more pump powers",
                path=path,
                field="power",
            )
        if ds.sizes[ENERGY_DIM] < MIN_ENERGIES:
            fail(
                f"at least {MIN_ENERGIES} energies",
                f"{ds.sizes[ENERGY_DIM]}",
                "load a wider spectral window",
                path=path,
                field="energy",
            )
    else:
        _series_table_checks(ds, dim, path=path)

    out = ds.copy()
    out.attrs = attrs
    iunits = _check_signal_units(intensity.attrs.get("units"), path=path, field="intensity")
    for name in ds.data_vars:
        var = ds[name]
        name = str(name)
        if name == "sweep":
            continue
        values = _as_float(var.values, path=path, field=name, what="values")
        want = iunits if name == "intensity" else SERIES_VARIABLES.get(name, "")
        if want is None:
            want = iunits
        got = var.attrs.get("units")
        if want and got != want:
            fail(
                f"units {want!r} for '{name}'",
                "none" if got is None else repr(got),
                "convert the column with polkit's loaders (or fix its header)",
                path=path,
                field=name,
            )
        if not want and not got:
            fail(
                f"units on variable '{name}'",
                "none",
                "add units in brackets to the header, e.g. 'temperature [K]'",
                path=path,
                field=name,
            )
        _check_values(values, attrs["masked"], path=path, field=name)
        if name.endswith("_error") and np.any(values[np.isfinite(values)] < 0):
            fail(
                "uncertainties >= 0",
                f"minimum {np.nanmin(values):g}",
                "give standard deviations, which are never negative",
                path=path,
                field=name,
            )
        if name in ("linewidth", "peak_energy") and np.any(values[np.isfinite(values)] <= 0):
            fail(
                f"positive {name.replace('_', ' ')}",
                f"minimum {np.nanmin(values):g}",
                "check the column and its units",
                path=path,
                field=name,
            )
        out[name] = var.copy(data=values)
    _check_attrs_safe(attrs, path=path)
    return out

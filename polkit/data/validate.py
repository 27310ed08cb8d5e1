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

import numpy as np
import xarray as xr

from polkit.data.checks import (
    PLAUSIBLE_ENERGY_EV,
    as_float,
    check_attrs_safe,
    check_axis_values,
    check_masked_flag,
    check_negative,
    check_number_attrs,
    check_signal_units,
    check_type,
    check_values,
    checked_jacobian,
    fail,
    require_units,
    warn,
)
from polkit.data.schema import (
    ANGLE_DIMS,
    COORD_ATTRS,
    ENERGY_DIM,
    KINDS,
    MEDIA,
    MIN_ANGLES,
    MIN_ENERGIES,
    MIN_POWERS,
    POINT_DIM,
    POWER_DIM,
    SERIES_VARIABLES,
    SWEEPS,
)

__all__ = ["validate_map", "validate_series"]

logger = logging.getLogger(__name__)


# ----------------------------------------------------------------------------- maps
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
    attrs, path = check_type(da, xr.DataArray, "an xarray.DataArray map", maker="make_map",
                             path=path, field="map")
    adim, coords = _map_axes(da, path=path)
    energy = coords[ENERGY_DIM]
    attrs = _map_attrs(attrs, path=path)

    values = as_float(da.values, path=path, field="signal", what="signal values")
    check_values(values, attrs["masked"], path=path, field="signal")
    extra = checked_jacobian(da, path=path)
    raw = values / extra["jacobian"][1][None, :] if extra else values
    if attrs["kind"] == "emission":
        check_negative(raw, attrs, path=path, field="signal")
    _check_saturation(raw, attrs, path=path)

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


def _map_axes(da: xr.DataArray, *, path) -> tuple[str, dict[str, np.ndarray]]:
    """The angle/k dim and the checked values of both axes (dims, units, ranges)."""
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
        coords[dim] = _map_coordinate(da, dim, minimum, path=path)
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
        warn(
            f"photon energies {energy[0]:.4g}-{energy[-1]:.4g} eV lie outside {lo}-{hi} eV; "
            "check the units of the spectral axis",
            path=path,
            field="energy",
            stacklevel=4,
        )
    return adim, coords


def _map_coordinate(da: xr.DataArray, dim: str, minimum: int, *, path) -> np.ndarray:
    """The values of coordinate ``dim``: present, in canonical units, ascending, long enough."""
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
    require_units(c.attrs.get("units"), want, f"on coordinate '{dim}'",
                  "convert the axis with polkit's loaders, or set units after converting",
                  path=path, field=dim, missing="no units")
    values = check_axis_values(c.values, dim, path=path, units=want)
    if values.size < minimum:
        fail(
            f"at least {minimum} {dim} values",
            f"{values.size}",
            "load a larger region or bin less",
            path=path,
            field=dim,
        )
    return values


def _map_attrs(attrs: dict, *, path) -> dict:
    """The map's attributes checked: signal units, kind, medium, masked flag and numbers."""
    units = check_signal_units(attrs.get("units"), path=path, field="units")
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
    masked = check_masked_flag(attrs, path=path)
    attrs = check_number_attrs(attrs, path=path)
    attrs["units"] = units
    attrs["masked"] = int(masked)
    check_attrs_safe(attrs, path=path)
    return attrs


def _check_saturation(raw: np.ndarray, attrs: dict, *, path) -> None:
    """Warn about pixels at or above a declared ``saturation`` level (in raw counts)."""
    if "saturation" in attrs:
        with np.errstate(invalid="ignore"):
            at_level = raw + attrs.get("offset_subtracted", 0.0) >= attrs["saturation"]
        n_sat = int(np.count_nonzero(at_level))
        if n_sat:
            warn(
                f"{n_sat} pixel(s) at or above the saturation level {attrs['saturation']:g}; "
                "mask them with polkit.data.flag_saturated",
                path=path,
                field="signal",
                stacklevel=4,
            )


# ----------------------------------------------------------------------------- series
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
        As :func:`validate_map` does.
    """
    attrs, path = check_type(ds, xr.Dataset, "an xarray.Dataset series", maker="make_series",
                             path=path, field="series")
    cube, dim = _series_layout(ds, path=path)
    _check_powers(ds, dim, path=path)
    attrs["masked"] = int(check_masked_flag(attrs, path=path))
    if cube:
        _cube_checks(ds, path=path)
    else:
        _series_table_checks(ds, dim, path=path)

    out = ds.copy()
    out.attrs = attrs
    iunits = check_signal_units(ds["intensity"].attrs.get("units"), path=path, field="intensity")
    for name in ds.data_vars:
        var = ds[name]
        name = str(name)
        if name == "sweep":
            continue
        values = _series_variable(var, name, iunits, attrs["masked"], path=path)
        out[name] = var.copy(data=values)
    check_attrs_safe(attrs, path=path)
    return out


def _series_layout(ds: xr.Dataset, *, path) -> tuple[bool, str]:
    """Whether the series is a spectra cube, and the dim its powers run along."""
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
    return cube, dim


def _check_powers(ds: xr.Dataset, dim: str, *, path) -> None:
    """The power coordinate: on ``dim``, in mW, finite, >= 0 (and ascending on dim power)."""
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
    pvals = as_float(power.values, path=path, field="power", what="powers")
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


def _cube_checks(ds: xr.Dataset, *, path) -> None:
    """A spectra cube's axes: canonical units, ascending, enough powers and energies."""
    for adim in (d for d in ds["intensity"].dims if d != POWER_DIM):
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
    for dim, minimum, what, fix in (
        (POWER_DIM, MIN_POWERS, "powers", "measure more pump powers"),
        (ENERGY_DIM, MIN_ENERGIES, "energies", "load a wider spectral window"),
    ):
        if ds.sizes[dim] < minimum:
            fail(f"at least {minimum} {what}", f"{ds.sizes[dim]}", fix, path=path, field=dim)


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


def _series_variable(var: xr.DataArray, name: str, iunits: str, masked: int, *, path) -> np.ndarray:
    """One variable of a series as float64: its units, finite values, signs checked."""
    values = as_float(var.values, path=path, field=name, what="values")
    want = iunits if name == "intensity" else SERIES_VARIABLES.get(name, "")
    if want is None:
        want = iunits
    got = var.attrs.get("units")
    if want:
        require_units(got, want, f"for '{name}'",
                      "convert the column with polkit's loaders (or fix its header)",
                      path=path, field=name)
    if not want and not got:
        fail(
            f"units on variable '{name}'",
            "none",
            "add units in brackets to the header, e.g. 'temperature [K]'",
            path=path,
            field=name,
        )
    check_values(values, masked, path=path, field=name)
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
    return values

"""Turn a reader's raw dataset into a canonical map or spectra cube (tables: series.py).

Every reader returns a *raw* :class:`xarray.Dataset`: the file's own names, a
``units`` attribute wherever the file gave units, and the file's metadata as
attributes.  This module does everything that is common to all readers: it finds the
signal and tells the axes apart (units first, names second, see
:mod:`polkit.data.roles`), converts units (:mod:`polkit.units`), calibrates
Fourier-plane pixel axes (:mod:`polkit.data.fourier`), scales spectral densities on a
wavelength axis by the Jacobian, sorts axes ascending, masks non-finite values on
request, and finally hands the object to :mod:`polkit.data.validate`.

Spectral densities
    Emission recorded on a wavelength grid is treated as a density on that grid (a
    count per pixel is a count per wavelength bin), and is multiplied by
    |d lambda / d E| (lambda^2 / hc in vacuum) so that its integral over the axis is
    kept: integral I_E dE = integral I_lambda d lambda.  The units become
    ``"<units> nm/eV"`` (or ``".../eV"`` when the file said ``".../nm"``) and the
    attribute ``jacobian`` records the factor; the raw per-bin counts are
    ``signal * E**2 / hc`` (vacuum).  Reflectance and transmission are ratios and are
    never scaled.  Linear relabellings (meV, 1/cm) change no values.  The factor per
    pixel is kept as the 1-D coordinate ``jacobian`` along ``energy`` (units e.g.
    ``nm/eV``) and ``attrs["raw_units"]`` names the file's units (e.g. ``counts``);
    ``gain``, ``read_noise`` and ``saturation`` stay in raw counts.  A raw count c
    becomes s = J c, so var(s) = J s / gain + (J read_noise)^2
    (:func:`polkit.data.camera.detector_variance_terms`).
    ``wavelength_jacobian=False`` keeps the file's values.

Camera offset and saturation (:mod:`polkit.data.camera`)
    A declared camera offset (``dark=`` a number of counts or a dark-frame file on the
    same raw axes, else the file's ``camera_offset`` or ``dark`` attribute) is subtracted
    from the raw counts before any conversion, and ``attrs["offset_subtracted"]`` records
    it (a file that carries it is not corrected again).  With ``mask_saturated`` the
    clipped pixels are found on the raw counts before the offset and masked (NaN,
    ``masked = 1``).  Both are written to ``attrs["preprocessing"]`` (JSON text).
"""

from __future__ import annotations

import logging
import re
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr

from polkit import units as U
from polkit.data.camera_raw import camera_step, jacobian_coord, record_lines
from polkit.data.fourier import calibrate_pixel_axis
from polkit.data.options import LoadOptions
from polkit.data.roles import SIGNAL_NAMES, axis_role
from polkit.data.schema import (
    CARRIED_ATTRS,
    COORD_ATTRS,
    DENSITY_KINDS,
    KINDS,
    MAP_NUMBER_ATTRS,
    MEDIA,
    append_history,
)
from polkit.data.validate import validate_map, validate_series
from polkit.errors import DataError, DataWarning

__all__ = ["raw_to_map", "cube_to_series", "raw_content", "find_signal"]

logger = logging.getLogger(__name__)

_SPECTRAL_FIX = (
    "write the units with one of "
    + U.accepted(U.ENERGY_UNITS)
    + ", "
    + U.accepted(U.WAVELENGTH_UNITS)
    + ", "
    + U.accepted(U.WAVENUMBER_UNITS)
)


def _warn(message: str, path, field, *, stacklevel: int = 4) -> None:
    warnings.warn(f"{path}: field '{field}': {message}", DataWarning, stacklevel=stacklevel)


# ----------------------------------------------------------------------------- helpers
def find_signal(raw: xr.Dataset, *, variable: str | None = None, path=None, min_ndim: int = 2):
    """Name of the signal variable: ``variable``, a known name, or the single N-D variable."""
    names = [str(n) for n in raw.data_vars]
    if variable is not None:
        if variable not in raw.data_vars:
            raise DataError(
                f"expected a variable {variable!r}; found variables {names}. Fix: pass one of them",
                path=path,
                field=variable,
            )
        return variable
    lower = {n.lower(): n for n in names}
    for cand in SIGNAL_NAMES:
        if cand in lower and raw[lower[cand]].ndim >= min_ndim:
            return lower[cand]
    multi = [n for n in names if raw[n].ndim >= min_ndim]
    if len(multi) == 1:
        return multi[0]
    raise DataError(
        f"expected one signal variable ({', '.join(SIGNAL_NAMES)}) or a single "
        f"{min_ndim}-D variable; found "
        + (", ".join(f"{n}{tuple(raw[n].dims)}" for n in names) or "no variables")
        + ". Fix: pass variable='...' to choose",
        path=path,
        field="signal",
    )


def raw_content(raw: xr.Dataset) -> str:
    """``"map"``, ``"cube"`` or ``"table"``: what a raw dataset holds."""
    try:
        name = find_signal(raw)
    except DataError:
        return "table"
    dims = raw[name].dims
    roles = [axis_role(d, raw[d].attrs.get("units") if d in raw.variables else None) for d in dims]
    return "cube" if "power" in roles else "map"


def _number(value, key: str, *, path) -> float:
    units = MAP_NUMBER_ATTRS[key][0]
    if isinstance(value, str):
        m = re.match(r"^\s*([-+0-9.eE]+|nan|inf)\s*(.*?)\s*$", value)
        suffix = m.group(2) if m else None
        if not m or (suffix and suffix not in (units, "px" if units == "pixel" else units)):
            raise DataError(
                f"expected a number in {units}; found {value!r}. Fix: write e.g. '{key}: 10'",
                path=path,
                field=key,
            )
        value = m.group(1)
    try:
        return float(value)
    except (TypeError, ValueError):
        raise DataError(
            f"expected a number in {units}; found {value!r}", path=path, field=key
        ) from None


def _carried(raw_attrs: dict, sig_attrs: dict, *, path) -> dict:
    merged = {**raw_attrs, **{k: v for k, v in sig_attrs.items() if k != "units"}}
    out = {}
    for key in CARRIED_ATTRS:
        if key not in merged:
            continue
        value = merged[key]
        if key in MAP_NUMBER_ATTRS:
            out[key] = _number(value, key, path=path)
        elif key == "position":
            arr = np.asarray(value)
            out[key] = value if isinstance(value, str) else arr.astype(float).ravel()
        else:
            out[key] = str(value)
    if "masked" in merged:
        try:
            out["masked"] = int(merged["masked"])
        except (TypeError, ValueError):
            raise DataError(
                f"expected masked = 0 or 1; found {merged['masked']!r}", path=path, field="masked"
            ) from None
    return out


def _choose_medium(option, attrs: dict, *, path) -> str:
    file_medium = attrs.get("wavelength_medium")
    if file_medium is not None:
        file_medium = str(file_medium).strip().lower()
        if file_medium not in MEDIA:
            raise DataError(
                f"expected wavelength_medium one of {MEDIA}; found {attrs['wavelength_medium']!r}",
                path=path,
                field="wavelength_medium",
            )
    if option is None:
        return file_medium or "vacuum"
    if option not in MEDIA:
        raise DataError(
            f"expected wavelength_medium one of {MEDIA}; found {option!r}",
            path=path,
            field="wavelength_medium",
        )
    if file_medium and file_medium != option:
        _warn(
            f"the file says {file_medium!r} wavelengths; using {option!r} as requested",
            path,
            "wavelength_medium",
        )
    return option


def _choose_kind(option, attrs: dict, sig_name: str, *, path) -> str:
    kind = option if option is not None else attrs.get("kind")
    if kind is None:
        low = sig_name.lower()
        kind = low if low in KINDS else "emission"
    kind = str(kind).strip().lower()
    if kind not in KINDS:
        raise DataError(
            f"expected kind one of {KINDS}; found {kind!r}. Fix: pass kind='emission' (or "
            "'reflectance', 'transmission')",
            path=path,
            field="kind",
        )
    return kind


def _density_units(units: str, axis_units: str) -> str:
    suffix = f"/{axis_units}"
    if units.endswith(suffix):
        return units[: -len(suffix)] + "/eV"
    return f"{units} {axis_units}/eV"


def _coord_values(raw: xr.Dataset, dim: str, *, path) -> np.ndarray:
    if dim not in raw.variables:
        raise DataError(
            f"expected coordinate values for dimension {dim!r}; found none. Fix: store the axis "
            f"as a variable named {dim!r}",
            path=path,
            field=dim,
        )
    values = np.asarray(raw[dim].values)
    if values.dtype.kind not in "biuf":
        raise DataError(
            f"expected numeric axis values; found dtype {values.dtype}. Fix: store numbers",
            path=path,
            field=dim,
        )
    return values.astype(float)


def _float_signal(values, *, path, field) -> np.ndarray:
    arr = np.asarray(values)
    if arr.dtype.kind not in "biuf":
        raise DataError(
            f"expected numeric values; found dtype {arr.dtype}. Fix: store numbers",
            path=path,
            field=field,
        )
    return arr.astype(np.float64, copy=True)


def _resolve_roles(raw, dims, *, allowed: list[set[str]], energy_units, angle_units, path):
    """Units and roles per dim; ``allowed`` lists the acceptable sets of roles."""
    units = {d: (raw[d].attrs.get("units") if d in raw.variables else None) for d in dims}
    units = {d: (u.strip() if isinstance(u, str) and u.strip() else None) for d, u in units.items()}
    roles = {d: axis_role(d, units[d]) for d in dims}
    unknown = [d for d in dims if roles[d] is None]
    if len(unknown) == 1:
        candidates = [s - {r for r in roles.values() if r} for s in allowed if len(s) == len(dims)]
        left = {next(iter(c)) for c in candidates if len(c) == 1}
        if len(left) == 1:
            roles[unknown[0]] = left.pop()
    for opt, opt_roles, label in (
        (energy_units, ("spectral",), "energy_units"),
        (angle_units, ("angle", "k"), "angle_units"),
    ):
        if opt is None:
            continue
        targets = [d for d in dims if roles[d] in opt_roles]
        if not targets:
            raise DataError(
                f"expected an axis for {label}={opt!r}; found dims {tuple(dims)} with roles "
                f"{tuple(roles[d] for d in dims)}. Fix: name the axes in the file",
                path=path,
                field=label,
            )
        d = targets[0]
        if units[d] is not None and units[d] != opt:
            raise DataError(
                f"expected {label}={opt!r} to agree with the file; found the file's units "
                f"{units[d]!r} on {d!r}. Fix: drop {label}= or correct the file",
                path=path,
                field=d,
            )
        units[d] = opt
        roles[d] = axis_role(d, opt) or roles[d]
    got = {roles[d] for d in dims}
    if None in got or not any(got == s for s in allowed):
        want = " or ".join("/".join(sorted(s)) for s in allowed)
        raise DataError(
            f"expected axes {want}; found dims "
            + ", ".join(f"{d} [{units[d] or 'no units'}] -> {roles[d] or 'unknown'}" for d in dims)
            + ". Fix: name the axes (energy/wavelength, angle/k/pixel, power) and give their units "
            "(or pass energy_units=/angle_units=)",
            path=path,
            field="dims",
        )
    for d in dims:
        if units[d] is None:
            label = "energy_units" if roles[d] == "spectral" else "angle_units"
            fix = (
                f"add a units attribute to {d!r} (e.g. 'nm'), a header '# rows: wavelength [nm]', "
                f"or pass {label}=..."
            )
            if roles[d] == "power":
                fix = f"add a units attribute to {d!r} (e.g. 'mW')"
            raise DataError(
                f"expected units on axis {d!r}; found none. Fix: {fix}",
                path=path,
                field=d,
            )
    return roles, units


@dataclass
class _Grid:
    """A signal being converted axis by axis, with what the conversion found and did."""

    signal: np.ndarray
    sig_units: Any
    coords: dict = field(default_factory=dict)
    #: canonical axis name -> axis of the signal
    target: dict = field(default_factory=dict)
    extra_attrs: dict = field(default_factory=dict)
    history: list = field(default_factory=list)


def _convert_grid(raw, sig_name, options: LoadOptions, *, allowed, path, kind, medium,
                  raw_step=None):
    """Convert a signal on (spectral, angle/k/pixel[, power]) axes; return pieces in order.

    ``options`` gives the axis units, the Fourier calibration and whether to apply the
    wavelength Jacobian.  ``raw_step(signal, var, spectral_axis)`` (optional) works on the
    raw values in the file's own axes before any conversion and returns the values to convert.
    """
    energy_units, angle_units = options.energy_units, options.angle_units
    fourier, jacobian = options.fourier, options.wavelength_jacobian
    var = raw[sig_name]
    for d in var.dims:
        if (
            var.sizes[d] == 1
            and axis_role(d, raw[d].attrs.get("units") if d in raw.variables else None) is None
        ):
            var = var.isel({d: 0})
    dims = list(var.dims)
    roles, units = _resolve_roles(
        raw, dims, allowed=allowed, energy_units=energy_units, angle_units=angle_units, path=path
    )
    signal = _float_signal(var.values, path=path, field=sig_name)
    if raw_step is not None:
        spectral = [i for i, d in enumerate(dims) if roles[d] == "spectral"][0]
        signal = raw_step(signal, var, spectral)
    grid = _Grid(signal, var.attrs.get("units"))
    for axis, d in enumerate(dims):
        values = _coord_values(raw, d, path=path)
        role, u = roles[d], units[d]
        if role == "spectral":
            _spectral_axis(grid, axis, d, values, u, kind=kind, medium=medium, jacobian=jacobian,
                           path=path)
        elif role == "angle" and u in U.PIXEL_UNITS:
            merged_attrs = {**raw.attrs, **var.attrs}
            _pixel_axis(grid, axis, d, values, fourier=fourier, attrs=merged_attrs, path=path)
        elif role == "angle":
            grid.coords["angle"] = U.angle_to_degree(values, u, path=path, field=d)
            grid.target["angle"] = axis
            if u not in ("degree",):
                grid.history.append(f"{d} [{u}] -> angle [degree]")
        elif role == "k":
            grid.coords["k"] = U.wavevector_to_inv_um(values, u, path=path, field=d)
            grid.target["k"] = axis
            if u != "1/um":
                grid.history.append(f"{d} [{u}] -> k [1/um]")
        elif role == "power":
            grid.coords["power"] = U.power_to_mw(values, u, path=path, field=d)
            grid.target["power"] = axis
            if u != "mW":
                grid.history.append(f"{d} [{u}] -> power [mW]")
    order = _canonical_order(grid)
    return grid.signal, order, grid.coords, grid.sig_units, grid.extra_attrs, grid.history


def _spectral_axis(grid: _Grid, axis: int, d: str, values, u: str, *, kind, medium, jacobian,
                   path) -> None:
    """Convert the spectral axis to energy [eV]; scale a density on a wavelength axis."""
    q = U.energy_axis_quantity(u)
    if q is None:
        raise DataError(
            f"expected units of a spectral axis; found {u!r}. Fix: {_SPECTRAL_FIX}",
            path=path,
            field=d,
        )
    quantity, factor = q
    energy = U.axis_to_ev(values, quantity, factor, medium=medium, path=path, field=d)
    step = f"{d} [{u}] -> energy [eV]"
    extra_attrs = grid.extra_attrs
    if quantity == "wavelength":
        extra_attrs["wavelength_medium"] = medium
        step += f" ({medium} wavelengths)"
        if kind in DENSITY_KINDS and jacobian:
            jac = U.wavelength_jacobian(energy, factor, medium=medium)
            shape = [1] * grid.signal.ndim
            shape[axis] = -1
            grid.signal = grid.signal * jac.reshape(shape)
            sig_units = grid.sig_units
            if isinstance(sig_units, str) and sig_units.strip():
                extra_attrs["raw_units"] = sig_units.strip()
                grid.sig_units = _density_units(sig_units.strip(), u)
            extra_attrs["jacobian"] = (
                f"signal multiplied by |d lambda/d E| in {u}/eV "
                "(lambda^2/hc in vacuum) to keep its integral; the factor per pixel is "
                "the coordinate 'jacobian'; gain, read_noise and saturation stay in raw "
                "counts"
            )
            step += ", density scaled by |d lambda/d E|"
            extra_attrs["_jacobian_values"] = np.asarray(jac, dtype=float)
            extra_attrs["_jacobian_units"] = f"{u}/eV"
    if quantity != "energy" or factor != 1.0:
        grid.history.append(step)
    grid.coords["energy"] = energy
    grid.target["energy"] = axis


def _pixel_axis(grid: _Grid, axis: int, d: str, values, *, fourier, attrs, path) -> None:
    """Calibrate a Fourier-plane pixel axis to emission angle [degree]."""
    signal = grid.signal
    image = np.moveaxis(signal, axis, 0).reshape(signal.shape[axis], -1)
    angle, keep, calibration = calibrate_pixel_axis(
        values, image, fourier=fourier, attrs=attrs, path=path, image_axis=0
    )
    grid.signal = np.compress(keep, signal, axis=axis)
    grid.extra_attrs.update(calibration)
    grid.history.append(
        f"{d} [pixel] -> angle [degree] by sin(theta) = NA (p - p0)/r_NA with NA "
        f"{calibration['na']:g}, p0 {calibration['k0_pixel']:.3f} px, r_NA "
        f"{calibration['pupil_radius_px']:.3f} px ({calibration['fourier_calibration']})"
    )
    grid.coords["angle"] = angle
    grid.target["angle"] = axis


def _canonical_order(grid: _Grid) -> list[str]:
    """Put the signal's axes in canonical order, each ascending; return the axis names."""
    order = [n for n in ("power", "angle", "k", "energy") if n in grid.target]
    signal = np.transpose(grid.signal, [grid.target[n] for n in order])
    coords, extra_attrs = grid.coords, grid.extra_attrs
    for axis, name in enumerate(order):
        c = coords[name]
        if c.size > 1 and np.all(np.diff(c) < 0):
            coords[name] = c[::-1]
            signal = np.flip(signal, axis=axis)
            if name == "energy" and "_jacobian_values" in extra_attrs:
                extra_attrs["_jacobian_values"] = extra_attrs["_jacobian_values"][::-1]
    grid.signal = signal
    return order


def _apply_signal_units(raw, sig_name, signal_units, *, path) -> None:
    if signal_units is None:
        return
    have = raw[sig_name].attrs.get("units")
    if isinstance(have, str) and have.strip() and have.strip() != signal_units:
        raise DataError(
            f"expected signal_units={signal_units!r} to agree with the file; found {have!r}. "
            "Fix: drop signal_units= or correct the file",
            path=path,
            field=sig_name,
        )
    raw[sig_name].attrs["units"] = signal_units


def _mask(
    values: np.ndarray, mask_nonfinite: bool, *, path, field, n_masked: int = 0
) -> tuple[np.ndarray, int]:
    """Mask non-finite values on request; ``n_masked`` NaN were set by the loader itself."""
    bad = ~np.isfinite(values)
    n_bad = int(np.count_nonzero(bad)) - n_masked
    if n_bad and mask_nonfinite:
        values = values.copy()
        values[bad] = np.nan
        _warn(f"{n_bad} NaN/Inf value(s) masked as NaN (attrs masked=1)", path, field)
    return values, n_bad


def _loaded_attrs(attrs: dict, extra: dict, fixed: dict, history: list, record: dict, *,
                  masked: bool, path, reader) -> tuple[dict, dict]:
    """The attributes of a loaded map or cube, and its ``jacobian`` coordinate (if any).

    ``masked`` says that loading masked values; otherwise the file's flag stays (default 0).
    """
    attrs.update(extra)
    jac_coord = jacobian_coord(attrs)
    attrs.update(fixed)
    attrs["masked"] = 1 if masked else int(attrs.get("masked", 0))
    history += record_lines(attrs, record)
    attrs = append_history(
        attrs, f"loaded {path} ({reader} reader): " + "; ".join(history or ["no conversion"])
    )
    return attrs, jac_coord


# ----------------------------------------------------------------------------- maps
def raw_to_map(
    raw: xr.Dataset, options: LoadOptions | None = None, *, path, reader: str, **changes
) -> xr.DataArray:
    """Build and validate a canonical map from a raw dataset (see :func:`polkit.data.load_map`).

    ``options`` is a :class:`polkit.data.LoadOptions` (or a dict of its fields), ``changes``
    replace its fields; the reader's options and a job's windows and camera are not used.
    """
    opts = LoadOptions.of(options, **changes)
    variable = opts.variable
    if raw_content(raw) == "table" and variable is None:
        raise DataError(
            "expected a 2-D signal (a map); found a table of columns "
            f"{[str(n) for n in raw.data_vars]}. Fix: use polkit.data.load_series for power series",
            path=path,
            field="signal",
        )
    sig_name = find_signal(raw, variable=variable, path=path)
    _apply_signal_units(raw, sig_name, opts.signal_units, path=path)
    record: dict = {}
    medium = _choose_medium(opts.wavelength_medium, raw.attrs, path=path)
    kind_ = _choose_kind(opts.kind, {**raw.attrs, **raw[sig_name].attrs}, sig_name, path=path)
    signal, order, coords, sig_units, extra, history = _convert_grid(
        raw,
        sig_name,
        opts,
        allowed=[{"spectral", "angle"}, {"spectral", "k"}],
        path=path,
        kind=kind_,
        medium=medium,
        raw_step=camera_step(raw.attrs, dark=opts.dark, mask_saturated=opts.mask_saturated,
                              path=path, record=record),
    )
    attrs = _carried(raw.attrs, raw[sig_name].attrs, path=path)
    n_sat = int(record.get("saturated", {}).get("pixels", 0))
    mask_nonfinite = opts.mask_nonfinite
    signal, n_bad = _mask(signal, mask_nonfinite, path=path, field=sig_name, n_masked=n_sat)
    attrs, jac_coord = _loaded_attrs(
        attrs, extra, {"units": sig_units, "kind": kind_, "source": str(path)}, history, record,
        masked=bool((n_bad and mask_nonfinite) or n_sat), path=path, reader=reader)
    adim = order[0]
    da = xr.DataArray(
        signal,
        dims=tuple(order),
        coords={**{n: (n, coords[n], dict(COORD_ATTRS[n])) for n in order}, **jac_coord},
        attrs=attrs,
        name="signal",
    )
    logger.info("loaded map %s: %s x energy, %s", path, adim, attrs["units"])
    return validate_map(da, path=path)


# ----------------------------------------------------------------------------- cubes
def cube_to_series(raw, options: LoadOptions, *, path, reader, medium) -> xr.Dataset:
    """Build and validate a spectra-cube series (see :func:`polkit.data.load_series`).

    ``medium`` is the wavelength medium already chosen from ``options`` and the file.
    """
    sig_name = find_signal(raw, variable=options.variable, path=path)
    _apply_signal_units(raw, sig_name, options.signal_units, path=path)
    kind_ = _choose_kind(None, {**raw.attrs, **raw[sig_name].attrs}, sig_name, path=path)
    record: dict = {}
    signal, order, coords, sig_units, extra, history = _convert_grid(
        raw,
        sig_name,
        options,
        allowed=[{"power", "spectral"}, {"power", "spectral", "angle"}, {"power", "spectral", "k"}],
        path=path,
        kind=kind_,
        medium=medium,
        raw_step=camera_step(raw.attrs, dark=None, mask_saturated=False, path=path,
                              record=record),
    )
    if not isinstance(sig_units, str) or not sig_units.strip():
        raise DataError(
            f"expected units on the signal {sig_name!r}; found none. Fix: add a units attribute",
            path=path,
            field=sig_name,
        )
    attrs = _carried(raw.attrs, raw[sig_name].attrs, path=path)
    signal, n_bad = _mask(signal, options.mask_nonfinite, path=path, field=sig_name)
    attrs, jac_coord = _loaded_attrs(
        attrs, extra, {"kind": kind_, "source": str(path)}, history, record,
        masked=bool(n_bad and options.mask_nonfinite), path=path, reader=reader)
    ds = xr.Dataset(
        {"intensity": (tuple(order), signal, {"units": sig_units.strip()})},
        coords={**{n: (n, coords[n], dict(COORD_ATTRS[n])) for n in order}, **jac_coord},
        attrs=attrs,
    )
    return validate_series(ds, path=path)

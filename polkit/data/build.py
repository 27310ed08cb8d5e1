"""Build canonical maps and series from plain arrays already in polkit's units."""

from __future__ import annotations

import numpy as np
import xarray as xr

from polkit.data.checks import check_signal_shape, fail
from polkit.data.schema import COORD_ATTRS, POINT_DIM, POWER_DIM, SERIES_VARIABLES
from polkit.data.validate import validate_map, validate_series

__all__ = ["make_map", "make_series"]


def _vector(values, name: str) -> np.ndarray:
    arr = np.asarray(values)
    if arr.ndim != 1:
        fail("a 1-D axis", f"{arr.ndim} dimensions", "pass a vector", field=name)
    return arr


def make_map(
    signal,
    angle=None,
    energy=None,
    *,
    k=None,
    units: str = "counts",
    kind: str = "emission",
    **attrs,
) -> xr.DataArray:
    """Build a canonical map from arrays.

    Parameters
    ----------
    signal
        2-D array of shape (n_angle or n_k, n_energy).
    angle
        Emission angles in degree (give either ``angle`` or ``k``).
    energy
        Photon energies in eV.  A strictly descending axis is reversed together with
        the signal.
    k
        In-plane wavevectors in 1/um, instead of ``angle``.
    units
        Units of the signal (``"counts"``, ``"counts/s"``, ``"1"`` ...).
    kind
        ``"emission"``, ``"reflectance"`` or ``"transmission"``.
    **attrs
        Further attributes (``temperature`` [K], ``sample``, ``gain``, ``read_noise``,
        ``saturation``, ``masked``, ``source`` ...).

    Returns
    -------
    xarray.DataArray
        A validated canonical map.

    Raises
    ------
    DataError
        On shape mismatches or anything :func:`~polkit.data.validate_map` refuses.
    """
    if (angle is None) == (k is None):
        fail(
            "exactly one of angle= or k=",
            "both" if angle is not None else "neither",
            "pass the angle axis in degree or the wavevector axis in 1/um",
            field="angle",
        )
    if energy is None:
        fail("an energy axis in eV", "none", "pass energy=...", field="energy")
    adim = "angle" if k is None else "k"
    a = _vector(angle if k is None else k, adim)
    e = _vector(energy, "energy")
    s = np.asarray(signal)
    check_signal_shape(s.shape, {adim: a.size, "energy": e.size})
    if a.size > 1 and np.all(np.diff(a) < 0):
        a, s = a[::-1], s[::-1, :]
    if e.size > 1 and np.all(np.diff(e) < 0):
        e, s = e[::-1], s[:, ::-1]
    all_attrs = {"units": units, "kind": kind, "source": "in-memory", "masked": 0}
    all_attrs.update(attrs)
    da = xr.DataArray(
        s,
        dims=(adim, "energy"),
        coords={
            adim: (adim, a, dict(COORD_ATTRS[adim])),
            "energy": ("energy", e, dict(COORD_ATTRS["energy"])),
        },
        attrs=all_attrs,
        name="signal",
    )
    return validate_map(da)


def make_series(
    power,
    intensity,
    *,
    units: str = "counts",
    sweep=None,
    peak_energy=None,
    linewidth=None,
    intensity_error=None,
    peak_energy_error=None,
    linewidth_error=None,
    extra_variables: dict | None = None,
    **attrs,
) -> xr.Dataset:
    """Build a canonical power series from vectors.

    Parameters
    ----------
    power
        Pump powers in mW.
    intensity
        Integrated intensities in ``units``.
    units
        Units of the intensity and its error.
    sweep
        ``"up"``/``"down"`` label per point for a coherent-drive hysteresis scan.
    peak_energy, peak_energy_error
        Peak energies and their standard deviations in eV.
    linewidth, linewidth_error
        FWHM linewidths and their standard deviations in meV.
    intensity_error
        Standard deviations of the intensity, in ``units``.
    extra_variables
        Further per-power columns as ``{name: (values, units)}``.
    **attrs
        Further attributes (``sample``, ``temperature`` ...).

    Returns
    -------
    xarray.Dataset
        On dim ``power`` (sorted) when all powers differ and no sweep is given, else
        on dim ``point`` (order kept) with ``power`` and ``sweep`` as coordinates.
    """
    p = _vector(power, "power").astype(float)
    columns = {"intensity": intensity}
    optional = {
        "intensity_error": intensity_error,
        "peak_energy": peak_energy,
        "peak_energy_error": peak_energy_error,
        "linewidth": linewidth,
        "linewidth_error": linewidth_error,
    }
    columns.update({k: v for k, v in optional.items() if v is not None})
    arrays = {}
    for name, values in columns.items():
        arrays[name] = _one_per_power(values, name, p.size, "give one value per pump power")
    labels = None
    if sweep is not None:
        labels = np.asarray([str(s) for s in _vector(sweep, "sweep")], dtype=str)
        if labels.size != p.size:
            fail(
                f"{p.size} sweep labels",
                f"{labels.size}",
                "give one 'up'/'down' label per power",
                field="sweep",
            )
    use_point = labels is not None or np.unique(p).size != p.size
    dim = POINT_DIM if use_point else POWER_DIM
    order = np.arange(p.size) if use_point else np.argsort(p, kind="stable")
    coords = {"power": (dim, p[order], dict(COORD_ATTRS["power"]))}
    if labels is not None:
        coords["sweep"] = (dim, labels[order])
    data_vars = {}
    for name, arr in arrays.items():
        u = SERIES_VARIABLES.get(name) or units
        data_vars[name] = (dim, arr[order], {"units": u})
    for name, (values, u) in (extra_variables or {}).items():
        arr = _one_per_power(values, name, p.size, "give one value per power")
        data_vars[name] = (dim, arr[order], {"units": u})
    all_attrs = {"source": "in-memory", "masked": 0}
    all_attrs.update(attrs)
    ds = xr.Dataset(data_vars, coords=coords, attrs=all_attrs)
    return validate_series(ds)


def _one_per_power(values, name: str, n_powers: int, fix: str) -> np.ndarray:
    """``values`` as a vector, refused unless it holds one value per power."""
    arr = _vector(values, name)
    if arr.size != n_powers:
        fail(
            f"{n_powers} values (one per power)",
            f"{arr.size}",
            fix,
            field=name,
        )
    return arr

"""Checks of the data and options given to the line fits, shared by both entry points.

Every check refuses bad input with a :class:`~polkit.errors.DataError` (the data) or a
:class:`~polkit.errors.ConfigError` (an option), naming what was expected and what was found.
"""

from __future__ import annotations

import math

import numpy as np
import xarray as xr

from polkit._checks import window
from polkit.errors import ConfigError, DataError

__all__ = [
    "PROFILES", "ANGLE_DIMS", "SERIES_DIMS", "MIN_ENERGIES", "source_of", "check_choice",
    "check_min_snr", "as_rng", "parse_window", "check_energy", "check_values", "select_window",
    "record_seed",
]

#: line profiles the fits know
PROFILES = ("lorentzian", "voigt")
#: dims that hold an emission angle (degree) or an in-plane wavevector (1/um)
ANGLE_DIMS = ("angle", "k")
#: dims along which a series of spectra runs
SERIES_DIMS = ("power", "point")
#: fewest energies a spectrum must have to be fitted
MIN_ENERGIES = 20


def source_of(obj) -> str | None:
    """The ``source`` attribute of a map or cube (the file it came from), or None."""
    src = obj.attrs.get("source") if hasattr(obj, "attrs") else None
    return str(src) if src not in (None, "") else None


def check_choice(value, allowed, key):
    """Refuse an option ``key`` whose value is not one of ``allowed``."""
    if value not in allowed:
        raise ConfigError(
            f"expected one of {', '.join(repr(a) for a in allowed)}, found {value!r}", key=key
        )


def as_rng(rng) -> np.random.Generator:
    """A generator from None (seed 0), an integer seed, a SeedSequence or a Generator."""
    if isinstance(rng, np.random.Generator):
        return rng
    if rng is None:
        return np.random.default_rng(0)
    if isinstance(rng, (int, np.integer, np.random.SeedSequence)):
        return np.random.default_rng(rng)
    raise ConfigError(
        f"expected None, an integer seed or a numpy.random.Generator, found {type(rng).__name__}",
        key="rng",
    )


def parse_window(value, key) -> tuple[float, float] | None:
    """The window option ``key`` as a pair of floats ``low < high``, or None."""
    return None if value is None else window(value, key)


def check_energy(da: xr.DataArray, path) -> None:
    """Refuse data without a finite, strictly ascending energy axis in eV."""
    if "energy" not in da.coords:
        raise DataError("expected an 'energy' coordinate in eV, found none", path=path,
                        field="energy")
    units = da["energy"].attrs.get("units")
    if units is not None and str(units) != "eV":
        raise DataError(
            f"expected energy in 'eV', found units {units!r}; load the data through "
            "polkit.data, which converts the energy axis to eV", path=path, field="energy")
    e = np.asarray(da["energy"].values, dtype=float)
    if e.size < 2 or not np.all(np.isfinite(e)) or np.any(np.diff(e) <= 0):
        raise DataError(
            "expected a finite, strictly ascending energy axis; sort the map by energy and "
            "drop duplicate energies", path=path, field="energy")


def check_values(da: xr.DataArray, path, name: str) -> None:
    """Refuse values that are not numbers, or NaN/Inf unless NaN marks masked pixels."""
    values = np.asarray(da.values)
    if not np.issubdtype(values.dtype, np.number):
        raise DataError(f"expected numbers, found dtype {values.dtype}", path=path, field=name)
    if not np.all(np.isfinite(values)):
        masked = int(da.attrs.get("masked", 0) or 0) == 1
        if not masked or np.any(np.isinf(values)):
            n_bad = int(np.sum(~np.isfinite(values)))
            raise DataError(
                f"expected finite values, found {n_bad} NaN/Inf pixels; clean them, or mark "
                "pixels to ignore as NaN and set attrs['masked'] = 1", path=path, field=name)


def select_window(da: xr.DataArray, dim: str, window, path, key: str,
                  minimum: int) -> xr.DataArray:
    """The part of ``da`` inside the option ``key``'s window along ``dim`` (None: all of it).

    Refuses a malformed window, or one holding fewer than ``minimum`` points.
    """
    window = parse_window(window, key)
    if window is None:
        return da
    coord = da[dim].values
    keep = (coord >= window[0]) & (coord <= window[1])
    if int(keep.sum()) < minimum:
        raise DataError(
            f"expected at least {minimum} points of '{dim}' inside {key}={list(window)}, "
            f"found {int(keep.sum())} (the data span {coord.min():.6g} to {coord.max():.6g}); "
            f"widen {key}", path=path, field=dim)
    return da.isel({dim: np.flatnonzero(keep)})



def check_min_snr(min_snr) -> None:
    """Refuse a detection threshold that is not a positive finite number."""
    if isinstance(min_snr, bool) or not (isinstance(min_snr, (int, float))
                                         and math.isfinite(min_snr) and min_snr > 0):
        raise ConfigError(f"expected a positive number, found {min_snr!r}", key="min_snr")


def record_seed(attrs: dict, rng) -> None:
    """Store an integer seed (``None`` meaning the default seed 0) in ``attrs["seed"]``."""
    if isinstance(rng, (int, np.integer)) or rng is None:
        attrs["seed"] = int(0 if rng is None else rng)

"""Recognise what an axis or column is from its units, or else from its name.

Units decide first (``nm`` is a spectral axis whatever the name); a name decides only
when no units are given.  The name lists are polkit's vocabulary for input files.
"""

from __future__ import annotations

from polkit.units import (
    ANGLE_UNITS,
    PIXEL_UNITS,
    POWER_UNITS,
    WAVEVECTOR_UNITS,
    energy_axis_quantity,
)

__all__ = [
    "COLUMN_ALIASES",
    "ERROR_SUFFIXES",
    "is_series_column",
    "SPECTRAL_NAMES",
    "ANGLE_NAMES",
    "K_NAMES",
    "POWER_NAMES",
    "SIGNAL_NAMES",
    "axis_role",
    "ROLE_RANK",
]

SPECTRAL_NAMES = ("energy", "photon_energy", "e", "wavelength", "lambda", "wl", "wavenumber")
ANGLE_NAMES = ("angle", "theta", "emission_angle", "pixel", "px")
K_NAMES = ("k", "kx", "ky", "k_parallel", "wavevector")
POWER_NAMES = ("power", "pump_power")
#: names of the signal variable, in order of preference
SIGNAL_NAMES = ("signal", "intensity", "counts", "reflectance", "transmission")
#: the conventional order of axes in an array: power, angle/k, spectral
ROLE_RANK = {"power": 0, "angle": 1, "k": 1, "spectral": 2}


def axis_role(name: str, units) -> str | None:
    """Return ``"spectral"``, ``"angle"``, ``"k"``, ``"power"`` or ``None``.

    ``"angle"`` covers uncalibrated pixel axes too (units ``pixel``).
    """
    if isinstance(units, str) and units.strip():
        u = units.strip()
        if energy_axis_quantity(u) is not None:
            return "spectral"
        if u in ANGLE_UNITS or u in PIXEL_UNITS:
            return "angle"
        if u in WAVEVECTOR_UNITS:
            return "k"
        if u in POWER_UNITS:
            return "power"
    key = str(name).strip().lower()
    if key in SPECTRAL_NAMES:
        return "spectral"
    if key in ANGLE_NAMES:
        return "angle"
    if key in K_NAMES:
        return "k"
    if key in POWER_NAMES:
        return "power"
    return None


#: column names of a series table -> canonical variable name
COLUMN_ALIASES = {
    "power": "power",
    "pump_power": "power",
    "intensity": "intensity",
    "integrated_intensity": "intensity",
    "counts": "intensity",
    "signal": "intensity",
    "peak_energy": "peak_energy",
    "energy": "peak_energy",
    "peak": "peak_energy",
    "wavelength": "peak_energy",
    "peak_wavelength": "peak_energy",
    "linewidth": "linewidth",
    "fwhm": "linewidth",
    "width": "linewidth",
    "sweep": "sweep",
    "direction": "sweep",
}
#: suffixes that mark the standard deviation of a column
ERROR_SUFFIXES = ("_error", "_err", "_std")


def is_series_column(name: str) -> bool:
    """True for the names (and ``*_error`` names) of columns polkit uses in a series."""
    key = str(name).strip().lower()
    for suffix in ERROR_SUFFIXES:
        if key.endswith(suffix):
            key = key[: -len(suffix)]
            break
    return key in COLUMN_ALIASES

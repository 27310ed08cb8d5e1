"""Names, units and attributes of polkit's canonical data objects.

Map
    ``xarray.DataArray`` with dims (``angle`` [degree] or ``k`` [1/um], ``energy`` [eV]),
    both coordinates strictly ascending, float64.  ``attrs``: ``units`` (of the signal),
    ``kind`` (emission | reflectance | transmission), ``source`` (where it came from),
    ``wavelength_medium`` (vacuum | air, only when a wavelength axis was converted),
    ``history`` (one line per processing step) and the optional :data:`MAP_NUMBER_ATTRS`
    and :data:`MAP_TEXT_ATTRS` (``gain``, ``read_noise``, ``saturation`` in raw counts).
    After the wavelength Jacobian a 1-D coordinate ``jacobian`` along ``energy`` holds the
    factor per pixel and ``raw_units`` the file's units; ``preprocessing`` is JSON text
    counting what the camera steps masked (:mod:`polkit.data.camera`).  NaN marks ignored
    pixels only when ``masked == 1``.

Series
    ``xarray.Dataset``.  A table of per-power results has dim ``power`` (sorted
    ascending) when every power is distinct and no ``sweep`` is given.  When powers
    repeat, or a ``sweep`` label is present (a coherent-drive hysteresis scan goes up
    and then down through the same powers), the dim is ``point`` (measurement order
    kept) with ``power`` and ``sweep`` as coordinates on it; a dimension coordinate
    with repeated values could not be indexed, and sorting would destroy the
    sweep history.  Variables: ``intensity`` and optional :data:`SERIES_VARIABLES`.
    A spectra cube has ``intensity`` with dims (``power``, ``energy``) or (``power``,
    ``angle``/``k``, ``energy``): every power slice of a 3-D cube is a canonical map.
"""

from __future__ import annotations

__all__ = [
    "ANGLE_DIMS",
    "ENERGY_DIM",
    "POWER_DIM",
    "POINT_DIM",
    "COORD_ATTRS",
    "KINDS",
    "DENSITY_KINDS",
    "MEDIA",
    "SWEEPS",
    "SERIES_VARIABLES",
    "MAP_NUMBER_ATTRS",
    "MAP_TEXT_ATTRS",
    "CARRIED_ATTRS",
    "MIN_ANGLES",
    "MIN_ENERGIES",
    "MIN_POWERS",
    "coord_attrs",
    "append_history",
]

ANGLE_DIMS = ("angle", "k")
ENERGY_DIM = "energy"
POWER_DIM = "power"
POINT_DIM = "point"

COORD_ATTRS: dict[str, dict[str, str]] = {
    "angle": {"units": "degree", "long_name": "emission angle"},
    "k": {"units": "1/um", "long_name": "in-plane wavevector"},
    "energy": {"units": "eV", "long_name": "photon energy"},
    "power": {"units": "mW", "long_name": "pump power"},
}

KINDS = ("emission", "reflectance", "transmission")
#: kinds whose signal is a spectral density (Jacobian-scaled on a wavelength axis);
#: reflectance and transmission are ratios and are not.
DENSITY_KINDS = ("emission",)
MEDIA = ("vacuum", "air")
SWEEPS = ("up", "down")

#: optional series variables and their canonical units (None: the units of intensity)
SERIES_VARIABLES: dict[str, str | None] = {
    "intensity_error": None,
    "peak_energy": "eV",
    "peak_energy_error": "eV",
    "linewidth": "meV",
    "linewidth_error": "meV",
}

#: optional numeric attributes of a map: name -> (units, lower bound, bound inclusive)
MAP_NUMBER_ATTRS: dict[str, tuple[str, float, bool]] = {
    "temperature": ("K", 0.0, False),
    "gain": ("electrons per count", 0.0, False),
    "read_noise": ("counts", 0.0, True),
    "saturation": ("counts", 0.0, False),
    "offset_subtracted": ("counts", -float("inf"), True),
    "na": ("1", 0.0, False),
    "k0_pixel": ("pixel", -float("inf"), True),
    "pupil_radius_px": ("pixel", 0.0, False),
}
MAP_TEXT_ATTRS = ("sample", "title", "comment", "raw_units", "preprocessing")
#: attributes carried over from an input file into the canonical object
CARRIED_ATTRS = (
    *MAP_NUMBER_ATTRS,
    *MAP_TEXT_ATTRS,
    "position",
    "history",
)

MIN_ANGLES = 5
MIN_ENERGIES = 20
MIN_POWERS = 3


def coord_attrs(name: str) -> dict[str, str]:
    """A fresh copy of the canonical ``units``/``long_name`` of a coordinate."""
    return dict(COORD_ATTRS[name])


def append_history(attrs: dict, line: str) -> dict:
    """Return a copy of ``attrs`` with ``line`` appended to its ``history`` text."""
    out = dict(attrs)
    old = out.get("history")
    out["history"] = f"{old}\n{line}" if old else line
    return out

"""Reading a density calibration file: pump power to density, with the uncertainties.

The physics (:class:`~polkit.models.calibration.DensityCalibration`, the densities) is in
:mod:`polkit.models.calibration`; this module reads its file form and refuses anything else
with a :class:`~polkit.errors.ConfigError` naming the file and the key.

A calibration file is TOML with explicit units on every quantity, for example
(invented numbers)::

    drive = "pulsed"                  # or "cw"
    note = "invented example"
    spot_fwhm = {value = 3.0, error = 0.3, units = "um"}        # or spot_area (um2)
    photon_energy = {value = 1.612, units = "eV"}               # exact when no error
    coupling_efficiency = {value = 0.3, rel_error = 0.3, units = "1"}
    detection_efficiency = {value = 0.05, rel_error = 0.5, units = "1"}   # optional
    polariton_lifetime = {value = 10.0, rel_error = 0.2, units = "ps"}    # optional (cw)
    pulse_duration = {value = 2.0, units = "ps"}                # pulsed only
    repetition_rate = {value = 80.0, units = "MHz"}             # pulsed only

``error`` is absolute (same units as ``value``), ``rel_error`` relative; either becomes
the log-normal width ``sigma_log = error / value`` around the median ``value``.
Efficiencies are log-normal truncated to (0, 1].

A power fit's calibration file may also name the pump-spot profile (``spot = "gaussian"``,
see :func:`read_calibration`).
"""

from __future__ import annotations

import logging
import os
from collections.abc import Mapping
from typing import Any

from polkit import units as U
from polkit.config.quantities import quantity, read_table, refuse_unknown, require_quantity
from polkit.errors import ConfigError
from polkit.files import file_sha256
from polkit.models.calibration import INPUT_FIELDS, DensityCalibration, UncertainInput
from polkit.models.pump_spot import SPOTS

__all__ = ["UNITS", "SPOT_KEY", "load_calibration", "read_calibration"]

logger = logging.getLogger(__name__)

#: accepted units per dimension and their factor to polkit's unit (first entry)
UNITS: dict[str, dict[str, float]] = {
    "length": U.LENGTH_UNITS,
    "area": U.AREA_UNITS,
    "energy": U.subset(U.ENERGY_UNITS, ("eV", "meV")),
    "time": U.subset(U.TIME_UNITS, ("ps", "fs", "ns")),
    "frequency": U.FREQUENCY_UNITS,
    "fraction": {"1": 1.0},
}


def load_calibration(source: str | os.PathLike | Mapping[str, Any]) -> DensityCalibration:
    """Read and check a density calibration from a TOML file or an equivalent dict.

    The file is parsed with :mod:`tomllib` (never evaluated).  Refused, with a
    :class:`~polkit.errors.ConfigError` naming the key: unknown keys, quantities without
    ``units`` or with units of the wrong dimension, non-numeric or non-finite values,
    sizes, energies, times or rates <= 0, efficiencies outside (0, 1], negative errors,
    both ``error`` and ``rel_error``.  The format is in the module docstring.

    Parameters
    ----------
    source
        The calibration file (TOML), or a dict of the same form (e.g. the
        :meth:`~polkit.models.calibration.DensityCalibration.to_dict` of another).

    Returns
    -------
    DensityCalibration
        Values converted to polkit's units (um, um2, eV, ps, MHz).
    """
    raw, path = read_table(source, what="calibration")
    refuse_unknown(raw, ("drive", "note", *INPUT_FIELDS), path)
    if "drive" not in raw:
        raise ConfigError(
            "missing; expected drive = \"cw\" or drive = \"pulsed\"", path=path, key="drive"
        )
    drive = raw["drive"]
    if drive not in ("cw", "pulsed"):
        raise ConfigError(f"expected 'cw' or 'pulsed', found {drive!r}", path=path, key="drive")
    note = raw.get("note", "")
    if not isinstance(note, str):
        raise ConfigError(f"expected text, found {type(note).__name__}", path=path, key="note")
    for key in ("photon_energy", "coupling_efficiency"):
        require_quantity(raw, key, UNITS[INPUT_FIELDS[key][0]], path)
    fields: dict[str, UncertainInput] = {}
    for key, (dim, attr, upper) in INPUT_FIELDS.items():
        if key in raw:
            value, sigma, units = quantity(raw[key], key, dim=dim, units=UNITS[dim],
                                           upper=upper, path=path)
            fields[attr] = UncertainInput(value=value, sigma_log=sigma, units=units, upper=upper)
    cal = DensityCalibration(drive=drive, note=note, source=path, **fields)
    logger.debug("loaded density calibration %s", cal.to_dict())
    return cal



#: calibration-file key of the pump-spot profile (read here: the density calibration
#: itself does not depend on it)
SPOT_KEY = "spot"


def read_calibration(calibration) -> tuple[DensityCalibration | None, dict[str, Any], str | None]:
    """A power fit's calibration: ``(calibration, its provenance, the spot profile it names)``.

    ``calibration`` is a TOML file, a dict in the same form, a
    :class:`~polkit.models.calibration.DensityCalibration` or ``None`` (no calibration:
    ``(None, {}, None)``).  A file or dict may carry the pump-spot profile, ``spot =
    "point" | "gaussian" | "flat"``; the spot is ``None`` when it does not.  The
    provenance is ``{"calibration": file form[, "calibration_file", "calibration_sha256"]}``.
    """
    if calibration is None:
        return None, {}, None
    spot = None
    if isinstance(calibration, DensityCalibration):
        cal = calibration
        info = {"calibration": cal.to_dict()}
    else:
        table, path = read_table(calibration, what="calibration")
        if SPOT_KEY in table:
            spot = table.pop(SPOT_KEY)
            if spot not in SPOTS:
                raise ConfigError(f"expected one of {', '.join(map(repr, SPOTS))}, found "
                                  f"{spot!r}; e.g. spot = \"gaussian\"", path=path,
                                  key=SPOT_KEY)
            try:
                cal = load_calibration(table)
            except ConfigError as exc:  # the rest of the file, refused with its path
                raise ConfigError(exc.reason, path=path, key=exc.key) from None
        else:
            cal = load_calibration(calibration)
        info = {"calibration": cal.to_dict()}
        if spot is not None:
            info["calibration"][SPOT_KEY] = spot
        if isinstance(calibration, (str, os.PathLike)):
            info["calibration_file"] = str(calibration)
            info["calibration_sha256"] = file_sha256(calibration)
    return cal, info, spot

"""The device file: a planned device built from the sample (node geometry, couplings, array).

A device file is a small TOML table read by :func:`load_device` into a :class:`Device`;
every physical quantity is written ``{value = ..., error = ... | rel_error = ..., units =
"..."}`` (see :mod:`polkit.config.quantities`).  The energy budget
(:func:`polkit.jobs.budget.run.energy_budget`) draws the device inputs from it.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from polkit.config.quantities import quantity, read_table, refuse_unknown, require_quantity
from polkit.errors import ConfigError
from polkit.models.calibration import UncertainInput, draw_inputs
from polkit.units import AREA_UNITS, DEVICE_ENERGY_UNITS, LENGTH_UNITS, POWER_UNITS, TIME_UNITS

__all__ = ["Device", "load_device", "DEVICE_UNITS", "DEVICE_QUANTITIES"]

log = logging.getLogger(__name__)

#: Accepted units per dimension and their factor to polkit's unit (first entry).
DEVICE_UNITS: dict[str, dict[str, float]] = {
    "length": LENGTH_UNITS,
    "area": AREA_UNITS,
    "phase": {"rad": 1.0},
    "fraction": {"1": 1.0},
    "temperature": {"K": 1.0},
    "energy": DEVICE_ENERGY_UNITS,
    "power": {u: POWER_UNITS[u] for u in ("mW", "nW", "uW", "µW", "W")},
    "time": TIME_UNITS,
}

#: file key -> (dimension, Device attribute, lower bound kind, upper bound, required);
#: lower: "positive" (> 0) or "nonnegative" (>= 0; zero means "not counted")
DEVICE_QUANTITIES: dict[str, tuple[str, str, str, float | None, bool]] = {
    "node_area": ("area", "node_area_um2", "positive", None, False),
    "node_size": ("length", "node_size_um", "positive", None, False),
    "phase": ("phase", "phase_rad", "positive", None, False),
    "coupling_efficiency": ("fraction", "coupling_efficiency", "positive", 1.0, True),
    "temperature": ("temperature", "temperature_K", "positive", None, True),
    "ambient_temperature": ("temperature", "ambient_temperature_K", "positive", None, False),
    "modulator_energy": ("energy", "modulator_energy_fJ", "nonnegative", None, True),
    "detector_energy": ("energy", "detector_energy_fJ", "nonnegative", None, True),
    "holding_power": ("power", "holding_power_mW", "nonnegative", None, False),
    "holding_window": ("time", "holding_window_ps", "positive", None, False),
    "wall_plug_efficiency": ("fraction", "wall_plug_efficiency", "positive", 1.0, False),
    "cooler_fraction_of_carnot": ("fraction", "cooler_fraction_of_carnot", "positive", 1.0, False),
    "cold_fraction": ("fraction", "cold_fraction", "nonnegative", 1.0, False),
}
_ARRAY_KEYS = ("nodes", "inputs", "outputs")
_PLAIN_KEYS = ("note", "array", "rate_convention")


@dataclass(frozen=True)
class Device:
    """A planned device built from the sample: node geometry, couplings, array, overheads.

    Build it with :func:`load_device`.  Every quantity is an
    :class:`~polkit.models.calibration.UncertainInput` in polkit's units (median and
    log-normal width); ``None`` for an optional line that is not counted.

    Attributes
    ----------
    coupling_efficiency
        Photon-to-polariton input coupling ``eta_in``, in (0, 1].
    temperature_K
        Operating temperature of the nodes, K.
    n_nodes, n_inputs, n_outputs
        Array shape: nonlinear nodes switched, inputs modulated and outputs detected per
        activation.
    modulator_energy_fJ, detector_energy_fJ
        Energy per modulated input and per detected output, fJ.
    node_area_um2, node_size_um
        Exactly one: the node (mode) area, or the diameter of a circular node
        (area ``pi d^2 / 4``).
    phase_rad
        Phase of the operation the array uses (default 1 rad, one linewidth).
    ambient_temperature_K
        Temperature the cooler rejects heat to (default 300 K; exact).
    holding_power_mW, holding_window_ps
        Holding (bias) beam for the whole array and the time it stays on per activation
        (default one time slot, ``1 / operation_rate``).  No holding beam when absent.
    wall_plug_efficiency
        Laser electrical-to-optical efficiency; the wall-plug line is not counted when absent.
    cooler_fraction_of_carnot
        Cooler efficiency relative to Carnot (default 1: the thermodynamic bound).
    cold_fraction
        Fraction of the delivered optical energy dissipated at the cold stage (default 1).
    rate_convention
        ``"linewidth"`` (``gamma / h``, default) or ``"lifetime"`` (``1 / tau``).
    """

    coupling_efficiency: UncertainInput
    temperature_K: UncertainInput
    n_nodes: int
    n_inputs: int
    n_outputs: int
    modulator_energy_fJ: UncertainInput
    detector_energy_fJ: UncertainInput
    node_area_um2: UncertainInput | None = None
    node_size_um: UncertainInput | None = None
    phase_rad: UncertainInput = UncertainInput(1.0, 0.0, "rad")
    ambient_temperature_K: UncertainInput = UncertainInput(300.0, 0.0, "K")
    holding_power_mW: UncertainInput | None = None
    holding_window_ps: UncertainInput | None = None
    wall_plug_efficiency: UncertainInput | None = None
    cooler_fraction_of_carnot: UncertainInput = UncertainInput(1.0, 0.0, "1", 1.0)
    cold_fraction: UncertainInput = UncertainInput(1.0, 0.0, "1", 1.0)
    rate_convention: str = "linewidth"
    note: str = ""
    source: str | None = field(default=None, compare=False)

    @property
    def cooled(self) -> bool:
        """Whether the nodes run below ambient (then a cooling line is counted)."""
        return self.temperature_K.value < self.ambient_temperature_K.value

    def _quantities(self) -> dict[str, UncertainInput]:
        out = {}
        for _, attr, _, _, _ in DEVICE_QUANTITIES.values():
            q = getattr(self, attr)
            if q is not None:
                out[attr] = q
        return out

    def draw(self, rng: np.random.Generator, n: int) -> dict[str, np.ndarray]:
        """``n`` joint draws of the device inputs (keys carry units), using ``rng`` only.

        Always includes ``node_area_um2`` (from ``node_size_um`` per draw when the size was
        given).  The draw order is fixed by the key order, so two devices that differ only
        in values get the same underlying normal deviates for the same seed.
        """
        out = draw_inputs(self._quantities(), rng, n)
        if "node_area_um2" not in out:
            out["node_area_um2"] = 0.25 * np.pi * out["node_size_um"] ** 2
        return out

    def to_dict(self) -> dict[str, Any]:
        """The device in file form (JSON-ready, units explicit), as :func:`load_device` reads."""
        out: dict[str, Any] = {}
        if self.note:
            out["note"] = self.note
        out["array"] = {"nodes": self.n_nodes, "inputs": self.n_inputs, "outputs": self.n_outputs}
        out["rate_convention"] = self.rate_convention
        for key, (_, attr, _, _, _) in DEVICE_QUANTITIES.items():
            q = getattr(self, attr)
            if q is not None:
                out[key] = q.to_dict()
        return out


def load_device(source: str | os.PathLike | Mapping[str, Any]) -> Device:
    """Read and check a device description from a TOML file or an equivalent dict.

    The file is parsed with :mod:`tomllib` (never evaluated).  Every physical quantity is
    a table ``{value = ..., error = ... | rel_error = ..., units = "..."}``; ``error`` is
    absolute and ``rel_error`` relative, either becomes the log-normal width
    ``sigma_log = error / value`` (exact without either).  Example (invented numbers)::

        note = "invented device"
        node_size = {value = 3.0, error = 0.3, units = "um"}   # or node_area (um2)
        phase = {value = 1.0, units = "rad"}                   # optional, default 1 rad
        coupling_efficiency = {value = 0.3, rel_error = 0.3, units = "1"}
        temperature = {value = 4.0, units = "K"}
        ambient_temperature = {value = 300.0, units = "K"}     # optional, default 300 K
        array = {nodes = 16, inputs = 4, outputs = 4}
        modulator_energy = {value = 50.0, rel_error = 0.5, units = "fJ"}
        detector_energy = {value = 20.0, rel_error = 0.5, units = "fJ"}
        holding_power = {value = 2.0, rel_error = 0.2, units = "mW"}        # optional
        holding_window = {value = 40.0, units = "ps"}          # optional, default one slot
        wall_plug_efficiency = {value = 0.2, rel_error = 0.3, units = "1"}  # optional
        cooler_fraction_of_carnot = {value = 1.0, units = "1"} # optional, default 1
        cold_fraction = {value = 1.0, units = "1"}             # optional, default 1
        rate_convention = "linewidth"                          # or "lifetime"

    Refused with a :class:`~polkit.errors.ConfigError` naming the key: unknown keys,
    missing required keys, quantities without ``units`` or with units of another
    dimension, non-numeric values, areas, sizes, phases, efficiencies or temperatures
    <= 0, energies or powers < 0, efficiencies above 1, both ``error`` and ``rel_error``,
    an uncertainty on a zero value or on the ambient temperature, array counts that are
    not whole numbers (nodes >= 1).

    Parameters
    ----------
    source
        The device file (``.toml``), or a mapping laid out like it.

    Returns
    -------
    Device
        Values converted to polkit's units (um, um2, rad, K, fJ, mW, ps).
    """
    raw, path = read_table(source, what="device")
    _check_keys(raw, path)
    counts = _parse_array(raw.get("array"), path)
    note, convention = _plain_settings(raw, path)
    fields = _cap_temperature(_read_quantities(raw, path), path)
    device = Device(
        n_nodes=counts["nodes"],
        n_inputs=counts["inputs"],
        n_outputs=counts["outputs"],
        rate_convention=convention,
        note=note,
        source=path,
        **fields,
    )
    log.debug("loaded device %s", device.to_dict())
    return device


def _check_keys(raw: Mapping[str, Any], path) -> None:
    """Unknown keys, missing required quantities, and exactly one of node_area / node_size."""
    refuse_unknown(raw, (*_PLAIN_KEYS, *DEVICE_QUANTITIES), path)
    for key, (dim, _, _, _, required) in DEVICE_QUANTITIES.items():
        if required:
            require_quantity(raw, key, DEVICE_UNITS[dim], path)
    if ("node_area" in raw) == ("node_size" in raw):
        raise ConfigError(
            "expected exactly one of node_area (um2) or node_size (diameter, um), found "
            + ("both" if "node_area" in raw else "neither"),
            path=path,
            key="node_area",
        )


def _plain_settings(raw: Mapping[str, Any], path) -> tuple[str, str]:
    """The ``note`` and the ``rate_convention`` (both checked)."""
    note = raw.get("note", "")
    if not isinstance(note, str):
        raise ConfigError(f"expected text, found {type(note).__name__}", path=path, key="note")
    convention = raw.get("rate_convention", "linewidth")
    if convention not in ("linewidth", "lifetime"):
        raise ConfigError(
            f"expected 'linewidth' or 'lifetime', found {convention!r}",
            path=path,
            key="rate_convention",
        )
    return note, convention


def _read_quantities(raw: Mapping[str, Any], path) -> dict[str, UncertainInput]:
    """``{Device attribute: UncertainInput}`` of the quantities the file gives."""
    fields: dict[str, UncertainInput] = {}
    for key, (dim, attr, lower, upper, _) in DEVICE_QUANTITIES.items():
        if key in raw:
            value, sigma, units = quantity(
                raw[key], key, dim=dim, units=DEVICE_UNITS[dim], lower=lower, upper=upper,
                bounded="an efficiency or fraction", path=path)
            fields[attr] = UncertainInput(value=value, sigma_log=sigma, units=units, upper=upper)
    return fields


def _cap_temperature(fields: dict[str, UncertainInput], path) -> dict[str, UncertainInput]:
    """Refuse an uncertain ambient; truncate a cold temperature's draws below ambient."""
    amb = fields.get("ambient_temperature_K")
    if amb is not None and amb.sigma_log > 0:
        raise ConfigError(
            "the ambient temperature the cooler rejects heat to is taken as exact; remove "
            "its error",
            path=path,
            key="ambient_temperature.error",
        )
    t_amb = amb.value if amb is not None else 300.0
    temp = fields["temperature_K"]
    if temp.value < t_amb:
        # draws stay below ambient: the log-normal is truncated there
        fields["temperature_K"] = UncertainInput(temp.value, temp.sigma_log, "K", t_amb)
    return fields


def _whole(value: Any, key: str, path, *, minimum: int) -> int:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or value != int(value):
        raise ConfigError(
            f"expected a whole number >= {minimum}, found {value!r}", path=path, key=key
        )
    if value < minimum:
        raise ConfigError(
            f"expected a whole number >= {minimum}, found {int(value)}", path=path, key=key
        )
    return int(value)


def _parse_array(entry: Any, path) -> dict[str, int]:
    if entry is None:
        raise ConfigError(
            "missing; expected array = {nodes = ..., inputs = ..., outputs = ...} (counts per "
            "activation)",
            path=path,
            key="array",
        )
    if not isinstance(entry, Mapping):
        raise ConfigError(
            f"expected a table {{nodes = ..., inputs = ..., outputs = ...}}, found "
            f"{type(entry).__name__} {entry!r}",
            path=path,
            key="array",
        )
    for sub in entry:
        if sub not in _ARRAY_KEYS:
            raise ConfigError(
                f"unknown key; expected {', '.join(_ARRAY_KEYS)}", path=path, key=f"array.{sub}"
            )
    out = {}
    for sub in _ARRAY_KEYS:
        if sub not in entry:
            raise ConfigError("missing (a whole number)", path=path, key=f"array.{sub}")
        out[sub] = _whole(entry[sub], f"array.{sub}", path, minimum=1 if sub == "nodes" else 0)
    return out

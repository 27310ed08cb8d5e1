"""The energy-budget job: what a device built from the sample would cost, per posterior draw.

Inputs: a dispersion result (lower-polariton energy, linewidth and exciton fraction at
k = 0), a power-series result fitted with a density calibration (the polariton
interaction constant ``interaction_constant`` in ueV um^2) and a device file (TOML, see
:func:`load_device`).  The two fits are independent measurements, so their draws are
paired at random with a seeded generator; whole draws are taken from each posterior, so
the correlations inside each fit (for example between the linewidth and the polariton
energy) are kept.  Device inputs are drawn from their log-normal uncertainties.

Per draw (never from medians):

* ``energy_per_operation`` (fJ): control pulse for a shift of one linewidth (1 rad),
  ``E_op = phi gamma A E_LP / (g_LP eta_in)``
  (:func:`polkit.models.device_energy.energy_per_operation`);
* ``energy_per_pi_shift`` (fJ): the same for ``phi = pi``;
* ``control_energy_per_node`` (fJ): the same at the device's ``phase`` (1 rad unless set);
  this is the figure the array accounting uses;
* ``operation_rate`` (GHz): ``gamma / h`` by default (see
  :func:`polkit.models.device_energy.operation_rate`);
* ``power_per_node`` (mW): control power of one node switching in every time slot;
* ``array_optical_power`` (mW): all nodes at full rate plus the holding beam;
* one activation (one pass of the array: every node switched once, every input modulated
  once, every output detected once), line by line in fJ
  (:func:`polkit.models.device_energy.array_energy_per_activation`): ``control_optical``,
  ``modulators``, ``detectors``, ``holding_optical``, ``laser_wallplug``, ``cooling``;
  ``energy_per_activation`` = control + modulators + detectors;
  ``wall_energy_per_activation`` = every line; ``wall_energy_per_node`` = that / nodes.

Sensitivity: ``ln E`` (``E`` = ``control_energy_per_node``) is a sum of logarithms of
the inputs, ``ln E = sum_i a_i ln x_i + const`` (``a_i`` = +1 for phase, linewidth, area
and LP energy, -1 for the interaction constant and the coupling efficiency).  Two
measures are reported per input:

* the *variance share* ``a_i Cov(ln x_i, ln E) / Var(ln E)``: the shares add up to 1
  exactly, and the covariance between two inputs (the dispersion fit's linewidth and
  energy are correlated) is split evenly between them; a share can be negative when an
  input's correlations offset its own variance;
* the *first-order share* ``Corr(ln x_i, ln E)^2``: the fraction of the variance the input
  explains alone (R^2 of a straight-line regression of ``ln E`` on ``ln x_i``).
  For independent inputs both equal ``a_i^2 Var(ln x_i) / Var(ln E)``.

Besides, the Spearman rank correlation of every uncertain input with
``wall_energy_per_activation`` (not a product, so no log decomposition) is listed.

Claims such as ``"energy_per_operation < 10 fJ"`` are parsed (never evaluated as code)
and answered with the fraction of draws for which they hold.
"""

from __future__ import annotations

import html
import json
import logging
import math
import os
import re
import warnings
from collections.abc import Iterable, Mapping, Sequence
from dataclasses import dataclass, field
from datetime import UTC, datetime
from importlib import metadata
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr
from scipy import constants as _c
from scipy import stats

from polkit._paths import shareable
from polkit.config.quantities import quantity, read_table, refuse_unknown, require_quantity
from polkit.errors import ConfigError, ConvergenceWarning, DataError, DataWarning
from polkit.files import write_json, write_netcdf
from polkit.inference import FitResult
from polkit.models.calibration import UncertainInput, draw_inputs
from polkit.models.device_energy import (
    ELECTRONIC_REFERENCE,
    array_energy_per_activation,
    energy_per_operation,
    operation_rate,
    power_per_node,
)

__all__ = [
    "Device",
    "load_device",
    "Claim",
    "parse_claim",
    "energy_budget",
    "BudgetResult",
    "BUDGET_FILE",
    "SUMMARY_FILE",
]

log = logging.getLogger(__name__)

BUDGET_FILE = "budget.nc"
SUMMARY_FILE = "summary.json"
_QUANTILES = {"median": 0.5, "q16": 0.16, "q84": 0.84, "q2_5": 0.025, "q97_5": 0.975}
_FJ_PER_J = 1e15

# --------------------------------------------------------------------------------------
# Device file
# --------------------------------------------------------------------------------------

# Accepted units per dimension and their factor to polkit's unit (first entry).
_DEVICE_UNITS: dict[str, dict[str, float]] = {
    "length": {"um": 1.0, "µm": 1.0, "nm": 1e-3, "mm": 1e3},
    "area": {"um2": 1.0, "um^2": 1.0, "µm2": 1.0, "µm^2": 1.0},
    "phase": {"rad": 1.0},
    "fraction": {"1": 1.0},
    "temperature": {"K": 1.0},
    "energy": {"fJ": 1.0, "aJ": 1e-3, "pJ": 1e3, "nJ": 1e6, "J": 1e15},
    "power": {"mW": 1.0, "nW": 1e-6, "uW": 1e-3, "µW": 1e-3, "W": 1e3},
    "time": {"ps": 1.0, "fs": 1e-3, "ns": 1e3, "us": 1e6, "µs": 1e6},
}

# file key -> (dimension, Device attribute, lower bound kind, upper bound, required)
#   lower: "positive" (> 0) or "nonnegative" (>= 0; zero means "not counted")
_DEVICE_QUANTITIES: dict[str, tuple[str, str, str, float | None, bool]] = {
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
        for _, attr, _, _, _ in _DEVICE_QUANTITIES.values():
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
        for key, (_, attr, _, _, _) in _DEVICE_QUANTITIES.items():
            q = getattr(self, attr)
            if q is not None:
                out[key] = {"value": q.value, "rel_error": q.sigma_log, "units": q.units}
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
        Path to a ``.toml`` file, or a mapping with the same structure.

    Returns
    -------
    Device
        Values converted to polkit's units (um, um2, rad, K, fJ, mW, ps).
    """
    raw, path = read_table(source, what="device")
    refuse_unknown(raw, (*_PLAIN_KEYS, *_DEVICE_QUANTITIES), path)
    for key, (dim, _, _, _, required) in _DEVICE_QUANTITIES.items():
        if required:
            require_quantity(raw, key, _DEVICE_UNITS[dim], path)
    if ("node_area" in raw) == ("node_size" in raw):
        raise ConfigError(
            "expected exactly one of node_area (um2) or node_size (diameter, um), found "
            + ("both" if "node_area" in raw else "neither"),
            path=path,
            key="node_area",
        )
    counts = _parse_array(raw.get("array"), path)
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

    fields: dict[str, UncertainInput] = {}
    for key, (dim, attr, lower, upper, _) in _DEVICE_QUANTITIES.items():
        if key in raw:
            value, sigma, units = quantity(
                raw[key], key, dim=dim, units=_DEVICE_UNITS[dim], lower=lower, upper=upper,
                bounded="an efficiency or fraction", path=path)
            fields[attr] = UncertainInput(value=value, sigma_log=sigma, units=units, upper=upper)
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


# --------------------------------------------------------------------------------------
# Claims
# --------------------------------------------------------------------------------------

# unit -> (dimension, factor to the dimension's base unit)
_CLAIM_UNITS: dict[str, tuple[str, float]] = {
    **{u: ("energy", f) for u, f in (("zJ", 1e-21), ("aJ", 1e-18), ("fJ", 1e-15),
                                     ("pJ", 1e-12), ("nJ", 1e-9), ("uJ", 1e-6), ("µJ", 1e-6),
                                     ("mJ", 1e-3), ("J", 1.0))},
    **{u: ("energy", f * _c.e) for u, f in (("ueV", 1e-6), ("µeV", 1e-6), ("meV", 1e-3),
                                            ("eV", 1.0))},
    **{u: ("frequency", f) for u, f in (("Hz", 1.0), ("kHz", 1e3), ("MHz", 1e6), ("GHz", 1e9),
                                        ("THz", 1e12))},
    **{u: ("power", f) for u, f in (("nW", 1e-9), ("uW", 1e-6), ("µW", 1e-6), ("mW", 1e-3),
                                    ("W", 1.0))},
    **{u: ("time", f) for u, f in (("fs", 1e-15), ("ps", 1e-12), ("ns", 1e-9), ("us", 1e-6),
                                   ("µs", 1e-6), ("s", 1.0))},
    **{u: ("length", f) for u, f in (("nm", 1e-3), ("um", 1.0), ("µm", 1.0), ("mm", 1e3))},
    **{u: ("area", 1.0) for u in ("um2", "um^2", "µm2", "µm^2")},
    **{u: ("interaction", f) for u, f in (("ueV um^2", 1.0), ("ueV um2", 1.0),
                                          ("µeV µm^2", 1.0), ("µeV µm2", 1.0),
                                          ("meV um^2", 1e3), ("meV um2", 1e3))},
    "K": ("temperature", 1.0),
    "rad": ("phase", 1.0),
    "1": ("dimensionless", 1.0),
    "": ("dimensionless", 1.0),
}
_NUMBER = r"[-+]?(?:\d+(?:\.\d*)?|\.\d+)(?:[eE][-+]?\d+)?"
_CLAIM_RE = re.compile(
    rf"^\s*(?P<name>[A-Za-z_][A-Za-z0-9_]*)\s*(?P<op><=|>=|<|>)\s*(?P<num>{_NUMBER})"
    r"\s*(?P<units>[^\s].*?)?\s*$"
)
_OPS = {"<": np.less, "<=": np.less_equal, ">": np.greater, ">=": np.greater_equal}


@dataclass(frozen=True)
class Claim:
    """A parsed claim ``quantity op threshold units``.

    Attributes
    ----------
    text
        The claim as written.
    quantity
        Name of a budget quantity.
    op
        One of ``<``, ``<=``, ``>``, ``>=``.
    threshold
        The number as written, in ``units``.
    units
        The units as written (``""`` for a dimensionless quantity).
    threshold_native
        The threshold converted to the quantity's own units.
    native_units
        The quantity's units.
    """

    text: str
    quantity: str
    op: str
    threshold: float
    units: str
    threshold_native: float
    native_units: str

    def probability(self, values: np.ndarray) -> float:
        """Fraction of ``values`` (draws in the quantity's units) for which the claim holds."""
        return float(np.mean(_OPS[self.op](np.asarray(values, dtype=float),
                                           self.threshold_native)))


def parse_claim(text: str, quantities: Mapping[str, str]) -> Claim:
    """Parse ``"name op number units"`` against the known quantities and their units.

    The text is matched with a regular expression; nothing is evaluated.  Units convert
    within their dimension (aJ, fJ, pJ, nJ, J and eV for energies; Hz to THz; nW to W;
    ...).

    Parameters
    ----------
    text
        For example ``"energy_per_operation < 10 fJ"`` or ``"operation_rate >= 20 GHz"``.
    quantities
        ``{name: units}`` of the quantities a claim may name.

    Returns
    -------
    Claim

    Raises
    ------
    ConfigError
        Unparseable text, an unknown quantity, unknown units or units of another dimension;
        the key is ``claim 'TEXT'``.
    """
    key = f"claim {text!r}"
    if not isinstance(text, str):
        raise ConfigError(f"expected text, found {type(text).__name__}", key=key)
    m = _CLAIM_RE.match(text)
    if m is None:
        raise ConfigError(
            "expected 'QUANTITY OP NUMBER UNITS' with OP one of <, <=, >, >=, e.g. "
            "'energy_per_operation < 10 fJ'",
            key=key,
        )
    name, op, num, units = m["name"], m["op"], float(m["num"]), (m["units"] or "").strip()
    if name not in quantities:
        raise ConfigError(
            f"unknown quantity {name!r}; expected one of {', '.join(sorted(quantities))}",
            key=key,
        )
    native = quantities[name]
    if native not in _CLAIM_UNITS:  # pragma: no cover - every budget quantity is listed
        raise ConfigError(f"quantity {name!r} has units {native!r} that claims cannot convert",
                          key=key)
    dim, native_factor = _CLAIM_UNITS[native]
    same_dim = [u for u, (d, _) in _CLAIM_UNITS.items() if d == dim and u]
    if units not in _CLAIM_UNITS:
        raise ConfigError(
            f"unknown units {units!r} for {name} (units {native!r}); expected one of "
            f"{', '.join(same_dim)}",
            key=key,
        )
    udim, factor = _CLAIM_UNITS[units]
    if udim != dim:
        raise ConfigError(
            f"units {units or 'none'!r} are {udim}, but {name} is {dim} (units {native!r}); "
            f"expected one of {', '.join(same_dim)}",
            key=key,
        )
    return Claim(text=text, quantity=name, op=op, threshold=num, units=units,
                 threshold_native=num * factor / native_factor, native_units=native)


# --------------------------------------------------------------------------------------
# Reading the two fits
# --------------------------------------------------------------------------------------

# posterior name -> accepted units and factor to polkit's unit
_RESULT_UNITS = {
    "lp_energy_k0": {"eV": 1.0, "meV": 1e-3},
    "lp_linewidth_k0": {"meV": 1.0, "ueV": 1e-3, "µeV": 1e-3, "eV": 1e3},
    "exciton_fraction_k0": {"1": 1.0},
    "lp_lifetime_k0": {"ps": 1.0, "fs": 1e-3, "ns": 1e3},
    "interaction_constant": {u: f for u, (_, f) in _CLAIM_UNITS.items()
                             if _CLAIM_UNITS[u][0] == "interaction"},
}
_RESULT_UNITS["exciton_interaction_constant"] = _RESULT_UNITS["interaction_constant"]
_CANONICAL = {"lp_energy_k0": "eV", "lp_linewidth_k0": "meV", "exciton_fraction_k0": "1",
              "lp_lifetime_k0": "ps", "interaction_constant": "ueV um^2",
              "exciton_interaction_constant": "ueV um^2"}


def _as_result(source: str | os.PathLike | FitResult, role: str) -> tuple[FitResult, str]:
    if isinstance(source, FitResult):
        return source, f"<{role} result in memory>"
    return FitResult.load(source), os.fspath(source)


def _posterior_values(result: FitResult, name: str, where: str, *, fix: str) -> np.ndarray:
    post = result.posterior
    if name not in post.data_vars:
        raise DataError(
            f"the posterior has no {name!r} ({_CANONICAL[name]}); found "
            f"{sorted(post.data_vars)}. {fix}",
            path=where,
            field=name,
        )
    units = str(post[name].attrs.get("units", ""))
    table = _RESULT_UNITS[name]
    if units not in table:
        raise DataError(
            f"expected units {', '.join(repr(u) for u in table)}, found {units!r}",
            path=where,
            field=name,
        )
    values = result.draws(name) * table[units]
    bad = ~np.isfinite(values) | (values <= 0)
    if name == "exciton_fraction_k0":
        bad |= values > 1
    if bad.any():
        raise DataError(
            f"expected finite positive draws{' in (0, 1]' if name == 'exciton_fraction_k0' else ''}"
            f", found {int(bad.sum())} of {values.size} outside (minimum "
            f"{np.nanmin(values):g}); check that this is the right result folder",
            path=where,
            field=name,
        )
    return values


def _recorded_sample(result: FitResult) -> str | None:
    tree = result.tree
    if "observed_data" in tree.children:
        value = tree["observed_data"].attrs.get("sample")
        if value not in (None, ""):
            return str(value)
    value = result.provenance.get("sample")
    return None if value in (None, "") else str(value)


def _recorded_position(result: FitResult) -> str | None:
    tree = result.tree
    if "observed_data" in tree.children and "position" in tree["observed_data"].attrs:
        return str(tree["observed_data"].attrs["position"])
    return None


def _dispersion_hash_in(power: FitResult) -> str | None:
    """The dispersion input hash a power result recorded, if it used a dispersion result."""
    prov = power.provenance
    for key in ("dispersion_input_sha256",):
        if isinstance(prov.get(key), str):
            return prov[key]
    nested = prov.get("dispersion")
    if isinstance(nested, Mapping) and isinstance(nested.get("input_sha256"), str):
        return nested["input_sha256"]
    return None


def _check_same_sample(disp: FitResult, disp_where: str, power: FitResult, power_where: str,
                       *, strict: bool) -> None:
    ds, ps = _recorded_sample(disp), _recorded_sample(power)
    if strict:
        for sample, where in ((ds, disp_where), (ps, power_where)):
            if sample is None:
                raise ConfigError(
                    "the sample check was asked for, but this result records no sample name "
                    "(observed_data attribute 'sample'); add a 'sample' attribute to the input "
                    "data and refit, or drop the check",
                    path=where,
                    key="sample",
                )
        if ds != ps:
            raise ConfigError(
                f"the dispersion result is of sample {ds!r} but the power result is of sample "
                f"{ps!r}; use a dispersion result of the same sample, or drop the check",
                path=disp_where,
                key="sample",
            )
        recorded = _dispersion_hash_in(power)
        mine = disp.provenance.get("input_sha256")
        if recorded is not None and mine is not None and recorded != mine:
            raise ConfigError(
                f"the power result was fitted with a dispersion result whose input has SHA-256 "
                f"{recorded[:12]}..., but this dispersion result's input has {str(mine)[:12]}...; "
                "use the same dispersion result as the power fit, or drop the check",
                path=disp_where,
                key="input_sha256",
            )
    elif ds is not None and ps is not None and ds != ps:
        warnings.warn(
            f"{disp_where}: the dispersion result is of sample {ds!r}, the power result "
            f"({power_where}) of sample {ps!r}; pass expect_same_sample=True (--check-sample) "
            "to refuse such a pair",
            DataWarning,
            stacklevel=3,
        )


# --------------------------------------------------------------------------------------
# The budget
# --------------------------------------------------------------------------------------

_LINES = (
    ("control_optical", "control pulses at the sample (nodes x control energy per node)"),
    ("modulators", "input modulators (inputs x energy per modulation)"),
    ("detectors", "output detectors (outputs x energy per detection)"),
    ("holding_optical", "holding beam kept on for the activation window"),
    ("laser_wallplug", "electrical energy lost by the lasers making the optical energy"),
    ("cooling", "work to pump the optical energy dissipated at the cold stage to ambient"),
)
_MAIN = ("energy_per_operation", "energy_per_pi_shift", "operation_rate", "power_per_node",
         "energy_per_activation")


def energy_budget(
    dispersion: str | os.PathLike | FitResult,
    power: str | os.PathLike | FitResult,
    device: str | os.PathLike | Mapping[str, Any] | Device,
    *,
    claims: Sequence[str] = (),
    seed: int | np.random.SeedSequence | None = None,
    n_draws: int = 4000,
    out: str | os.PathLike | None = None,
    figures: bool = True,
    expect_same_sample: bool = False,
    interaction: str = "polariton",
) -> BudgetResult:
    """Energy per operation and per array activation of a device built from the sample.

    Parameters
    ----------
    dispersion
        A dispersion result folder (or :class:`~polkit.inference.FitResult`) whose posterior
        has ``lp_energy_k0`` (eV), ``lp_linewidth_k0`` (meV) and ``exciton_fraction_k0``.
    power
        A power-series result folder (or result) fitted with a density calibration: its
        posterior has ``interaction_constant`` (ueV um^2).
    device
        Device file (TOML), mapping or :class:`Device` (see :func:`load_device`).
    claims
        Claims such as ``"energy_per_operation < 10 fJ"`` (see :func:`parse_claim`).
    seed
        Root seed for pairing the draws and drawing the device inputs (recorded).
    n_draws
        Number of joint draws.  Each posterior is subsampled without replacement when it
        has at least ``n_draws`` draws, resampled with replacement otherwise.
    out
        Folder for ``budget.nc``, ``summary.json`` and the figures; nothing is written when
        ``None``.
    figures
        Write the breakdown and sensitivity figures into ``out``.
    expect_same_sample
        Refuse (:class:`~polkit.errors.ConfigError`) a pair of results whose recorded sample
        names differ or are missing, or whose recorded dispersion input hash disagrees.
    interaction
        ``"polariton"`` (default): ``g_LP`` is the power result's ``interaction_constant``.
        ``"exciton"``: ``g_LP = g_X |X|^4 / N`` with the power result's
        ``exciton_interaction_constant``, the dispersion draws of ``exciton_fraction_k0``
        and ``N`` = the ``n_wells`` recorded in the power result's provenance (1, i.e. per
        mode, when absent), for a device at another detuning than the power series.

    Returns
    -------
    BudgetResult

    Raises
    ------
    DataError
        A result folder that is missing or lacks a needed quantity (a power result without
        ``interaction_constant``: absolute energies need a calibrated power fit).
    ConfigError
        A bad device file, a bad claim, or a sample mismatch with ``expect_same_sample``.
    """
    if interaction not in ("polariton", "exciton"):
        raise ConfigError(f"expected 'polariton' or 'exciton', found {interaction!r}",
                          key="interaction")
    if isinstance(n_draws, bool) or int(n_draws) != n_draws or n_draws < 2:
        raise ConfigError(f"expected a whole number of draws >= 2, found {n_draws!r}",
                          key="n_draws")
    n = int(n_draws)
    dev = device if isinstance(device, Device) else load_device(device)
    disp, disp_where = _as_result(dispersion, "dispersion")
    pw, power_where = _as_result(power, "power")

    fix_disp = "Pass the folder of a dispersion fit (polkit dispersion ... --out DIR)."
    d_vals = {name: _posterior_values(disp, name, disp_where, fix=fix_disp)
              for name in ("lp_linewidth_k0", "lp_energy_k0", "exciton_fraction_k0")}
    if "lp_lifetime_k0" in disp.posterior.data_vars:
        d_vals["lp_lifetime_k0"] = _posterior_values(disp, "lp_lifetime_k0", disp_where,
                                                     fix=fix_disp)
    g_name = ("interaction_constant" if interaction == "polariton"
              else "exciton_interaction_constant")
    fix_power = ("Absolute energies need a power fit with a density calibration: rerun the power "
                 "fit with a calibration file (polkit power ... --calibration FILE)"
                 + ("" if interaction == "polariton" else " and a dispersion result") + ".")
    p_vals = {g_name: _posterior_values(pw, g_name, power_where, fix=fix_power)}
    _check_same_sample(disp, disp_where, pw, power_where, strict=expect_same_sample)
    for res, where in ((disp, disp_where), (pw, power_where)):
        if not res.converged:
            warnings.warn(
                f"{where}: this input result did not pass its convergence gate; the budget "
                "inherits its draws as they are",
                ConvergenceWarning,
                stacklevel=2,
            )

    ss = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    rng = np.random.default_rng(ss)
    n_disp, n_pow = d_vals["lp_energy_k0"].size, p_vals[g_name].size
    i_disp = rng.choice(n_disp, n, replace=n > n_disp)
    i_pow = rng.choice(n_pow, n, replace=n > n_pow)
    dev_draws = dev.draw(rng, n)

    inputs: dict[str, tuple[np.ndarray, str, str, str]] = {}  # name -> values, units, long, source
    long_names = {
        "lp_linewidth_k0": "lower-polariton linewidth at k = 0 (FWHM), taken as the node linewidth",
        "lp_energy_k0": "lower-polariton energy at k = 0",
        "exciton_fraction_k0": "lower-polariton exciton fraction |X|^2 at k = 0",
        "lp_lifetime_k0": "lower-polariton lifetime at k = 0",
        "interaction_constant": "polariton-polariton interaction constant g_LP",
        "exciton_interaction_constant": "exciton-exciton interaction constant g_X",
    }
    for name, vals in d_vals.items():
        inputs[name] = (vals[i_disp], _CANONICAL[name], long_names[name], "dispersion")
    inputs[g_name] = (p_vals[g_name][i_pow], _CANONICAL[g_name], long_names[g_name], "power")
    if interaction == "exciton":
        wells = pw.provenance.get("n_wells") or 1
        if isinstance(wells, bool) or not isinstance(wells, (int, float)) or wells < 1:
            raise DataError(f"expected a whole number of wells >= 1, found {wells!r}",
                            path=power_where, field="n_wells")
        g_lp = inputs[g_name][0] * inputs["exciton_fraction_k0"][0] ** 2 / wells
        inputs["interaction_constant"] = (
            g_lp, "ueV um^2", f"polariton interaction constant g_X |X|^4 / N (N = {wells:g})",
            "derived")
    dev_meta = {
        "node_area_um2": ("node_area", "um2", "node (mode) area A"),
        "node_size_um": ("node_size", "um", "node diameter (area pi d^2 / 4)"),
        "phase_rad": ("phase", "rad", "phase of the array's operation"),
        "coupling_efficiency": ("coupling_efficiency", "1", "input coupling efficiency eta_in"),
        "temperature_K": ("temperature", "K", "operating temperature"),
        "ambient_temperature_K": ("ambient_temperature", "K",
                                  "ambient (heat-rejection) temperature"),
        "modulator_energy_fJ": ("modulator_energy", "fJ", "energy per modulated input"),
        "detector_energy_fJ": ("detector_energy", "fJ", "energy per detected output"),
        "holding_power_mW": ("holding_power", "mW", "holding-beam power for the whole array"),
        "holding_window_ps": ("holding_window", "ps", "holding-beam time on per activation"),
        "wall_plug_efficiency": ("wall_plug_efficiency", "1", "laser wall-plug efficiency"),
        "cooler_fraction_of_carnot": ("cooler_fraction_of_carnot", "1",
                                      "cooler efficiency relative to Carnot"),
        "cold_fraction": ("cold_fraction", "1", "fraction of optical energy dissipated cold"),
    }
    for attr, vals in dev_draws.items():
        name, units, long_name = dev_meta[attr]
        derived_area = attr == "node_area_um2" and dev.node_area_um2 is None
        inputs[name] = (vals, units, long_name + (" (from node_size)" if derived_area else ""),
                        "derived" if derived_area else "device")

    gamma = inputs["lp_linewidth_k0"][0]
    e_lp = inputs["lp_energy_k0"][0]
    g = inputs["interaction_constant"][0]
    area = inputs["node_area"][0]
    eta = inputs["coupling_efficiency"][0]
    phase = inputs["phase"][0]

    e_op = energy_per_operation(1.0, gamma, area, e_lp, g, eta)
    e_pi = energy_per_operation(np.pi, gamma, area, e_lp, g, eta)
    e_node = energy_per_operation(phase, gamma, area, e_lp, g, eta)
    rate = operation_rate(gamma, dev.rate_convention)
    p_node_W = power_per_node(e_node, rate)
    if "holding_window" not in inputs:
        inputs["holding_window"] = (1e3 / rate, "ps",
                                    "holding-beam time on per activation (one time slot)",
                                    "derived")
    hold_mW = inputs["holding_power"][0] if "holding_power" in inputs else np.zeros(n)
    wall_plug = inputs["wall_plug_efficiency"][0] if "wall_plug_efficiency" in inputs else 1.0
    lines = array_energy_per_activation(
        e_node, dev.n_inputs, dev.n_outputs,
        inputs["modulator_energy"][0] / _FJ_PER_J, inputs["detector_energy"][0] / _FJ_PER_J,
        n_nodes=dev.n_nodes,
        holding_power_W=hold_mW * 1e-3,
        window_s=inputs["holding_window"][0] * 1e-12,
        wall_plug_efficiency=wall_plug,
        t_cold_K=inputs["temperature"][0] if dev.cooled else None,
        t_hot_K=dev.ambient_temperature_K.value,
        cold_fraction=inputs["cold_fraction"][0],
        cooler_fraction_of_carnot=inputs["cooler_fraction_of_carnot"][0],
    )
    polaritons = 1e3 * phase * gamma / g * area

    data_vars: dict[str, xr.Variable] = {}

    def put(name, values, units, long_name, role, source=None):
        attrs = {"units": units, "long_name": long_name, "polkit_role": role}
        if source is not None:
            attrs["source"] = source
        data_vars[name] = xr.Variable(("draw",), np.asarray(values), attrs)

    for name, (vals, units, long_name, source) in inputs.items():
        put(name, vals, units, long_name, "input", source)
    put("dispersion_draw", i_disp.astype(np.int64), "1",
        "index of the dispersion posterior draw used (chain-major)", "index")
    put("power_draw", i_pow.astype(np.int64), "1",
        "index of the power posterior draw used (chain-major)", "index")
    put("polaritons_per_node", polaritons, "1",
        "polaritons per node for the array's operation, phi gamma A / g_LP", "derived")
    put("energy_per_operation", e_op * _FJ_PER_J, "fJ",
        "control-pulse energy for a shift of one linewidth (1 rad)", "derived")
    put("energy_per_pi_shift", e_pi * _FJ_PER_J, "fJ",
        "control-pulse energy for a pi phase shift", "derived")
    put("control_energy_per_node", e_node * _FJ_PER_J, "fJ",
        "control-pulse energy per node at the device's phase", "derived")
    put("operation_rate", rate, "GHz",
        f"operations per second per node ({dev.rate_convention} convention)", "derived")
    put("power_per_node", p_node_W * 1e3, "mW",
        "control optical power of one node switching in every time slot", "derived")
    put("array_optical_power", dev.n_nodes * p_node_W * 1e3 + hold_mW, "mW",
        "optical power on the sample: all nodes at full rate plus the holding beam", "derived")
    for name, long_name in _LINES:
        put(name, lines[f"{name}_J"] * _FJ_PER_J, "fJ", long_name, "line")
    put("energy_per_activation",
        (lines["control_optical_J"] + lines["modulators_J"] + lines["detectors_J"]) * _FJ_PER_J,
        "fJ", "energy per array activation: control pulses, modulators and detectors", "derived")
    put("wall_energy_per_activation", lines["total_J"] * _FJ_PER_J, "fJ",
        "energy per array activation with every declared line", "derived")
    put("wall_energy_per_node", lines["total_J"] * _FJ_PER_J / dev.n_nodes, "fJ",
        "every declared line per activation, shared per node", "derived")

    factors = [("phase", 1), ("lp_linewidth_k0", 1), ("node_area", 1), ("lp_energy_k0", 1),
               ("coupling_efficiency", -1)]
    if interaction == "polariton":
        factors.append(("interaction_constant", -1))
    else:
        factors += [("exciton_interaction_constant", -1), ("exciton_fraction_k0", -2)]

    prov = {
        "polkit_version": _polkit_version(),
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "seed": int(ss.entropy) if isinstance(ss.entropy, int) else str(ss.entropy),
        "seed_spawn_key": list(ss.spawn_key),
        "n_draws": n,
        "interaction": interaction,
        "dispersion": _input_record(disp, disp_where),
        "power": _input_record(pw, power_where),
        "device": dev.to_dict(),
        "device_file": dev.source,
        "sample_check": bool(expect_same_sample),
        "libraries": _library_versions(),
    }
    diagnostics = {
        "converged": bool(disp.converged and pw.converged),
        "dispersion_converged": bool(disp.converged),
        "power_converged": bool(pw.converged),
        "dispersion_draws_available": int(n_disp),
        "power_draws_available": int(n_pow),
        "n_draws": n,
        "resampled_with_replacement": {"dispersion": bool(n > n_disp), "power": bool(n > n_pow)},
        # inputs whose own model check said the model does not describe their data
        "model_check_failed": [role for role, res in (("dispersion", disp), ("power", pw))
                               if (res.model_check or {}).get("passed", True) is False],
    }
    attrs = {
        "model": "energy_budget",
        "kind": "budget",
        "n_nodes": dev.n_nodes,
        "n_inputs": dev.n_inputs,
        "n_outputs": dev.n_outputs,
        "rate_convention": dev.rate_convention,
        "cooled": int(dev.cooled),
        "counted": json.dumps(_counted(dev, inputs)),
        "factors": json.dumps(factors),
        "claims": json.dumps(list(claims)),
        "diagnostics": json.dumps(diagnostics),
        "provenance": json.dumps(prov),
        "created_by": f"polkit {prov['polkit_version']}",
    }
    ds = xr.Dataset(data_vars, coords={"draw": np.arange(n)}, attrs=attrs)
    ds["draw"].attrs.update({"units": "1", "long_name": "joint draw index"})
    result = BudgetResult(ds)  # parses the claims: a bad claim is refused before any write
    if out is not None:
        result.save(out, figures=figures)
    return result


def _input_record(result: FitResult, where: str) -> dict[str, Any]:
    prov = result.provenance
    return {"folder": shareable(str(where)), "model": result.model, "kind": result.kind,
            "input_sha256": prov.get("input_sha256"), "input": prov.get("input"),
            "seed": prov.get("seed"), "sample": _recorded_sample(result),
            "position": _recorded_position(result), "converged": bool(result.converged)}


def _counted(dev: Device, inputs: Mapping[str, Any]) -> dict[str, str]:
    """What each line counts, in words (so that what is left out is explicit)."""
    out = {
        "control_optical": f"{dev.n_nodes} node(s) x control pulse at the sample for the device "
                           "phase (incident energy, i.e. divided by the input coupling)",
        "modulators": f"{dev.n_inputs} input(s) x energy per modulation (device file)",
        "detectors": f"{dev.n_outputs} output(s) x energy per detection (device file)",
    }
    if "holding_power" in inputs:
        window = ("holding_window from the device file" if dev.holding_window_ps is not None
                  else "one time slot, 1 / operation_rate")
        out["holding_optical"] = f"holding beam for the whole array, on for {window}"
    else:
        out["holding_optical"] = "not counted (no holding_power in the device file)"
    if dev.wall_plug_efficiency is not None:
        out["laser_wallplug"] = ("electrical loss of the lasers making the control and holding "
                                 "light, (1 / wall_plug_efficiency - 1) x optical energy")
    else:
        out["laser_wallplug"] = "not counted (no wall_plug_efficiency in the device file)"
    if dev.cooled:
        bound = ("the Carnot bound" if dev.cooler_fraction_of_carnot.value == 1.0
                 and dev.cooler_fraction_of_carnot.sigma_log == 0
                 else "the Carnot work divided by the cooler's fraction of Carnot")
        out["cooling"] = (f"{bound}, (T_amb - T) / T per joule, for the optical energy "
                          f"dissipated at {dev.temperature_K.value:g} K (cold_fraction); "
                          "modulators and detectors are taken to sit at ambient")
    else:
        out["cooling"] = "not counted (the nodes run at or above the ambient temperature)"
    return out


def _polkit_version() -> str:
    from polkit import __version__

    return __version__


def _library_versions() -> dict[str, str]:
    import platform

    out = {"python": platform.python_version()}
    for name in ("numpy", "scipy", "xarray", "h5netcdf"):
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out


# --------------------------------------------------------------------------------------
# The result
# --------------------------------------------------------------------------------------


def _quantiles(values: np.ndarray) -> dict[str, float | None]:
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    return {k: (float(np.quantile(v, q)) if v.size else None) for k, q in _QUANTILES.items()}


def _g(x: float | None, digits: int = 3) -> str:
    if x is None or not math.isfinite(x):
        return "n/a"
    return f"{x:.{digits}g}"


class BudgetResult:
    """The energy budget: joint draws with units, claims, sensitivity and context.

    Parameters
    ----------
    dataset
        Draws along dim ``draw`` (every variable has ``units``) with the attributes written
        by :func:`energy_budget`; claims recorded in ``attrs["claims"]`` are parsed here.
    """

    def __init__(self, dataset: xr.Dataset, *, path: str | os.PathLike | None = None):
        where = None if path is None else os.fspath(path)
        for key in ("model", "kind", "claims", "factors", "counted", "diagnostics",
                    "provenance", "n_nodes"):
            if key not in dataset.attrs:
                raise DataError(f"attribute {key!r} is missing: not a polkit budget",
                                path=where, field=key)
        for name, var in dataset.data_vars.items():
            if var.dims != ("draw",) or "units" not in var.attrs:
                raise DataError("expected dims ('draw',) and a 'units' attribute",
                                path=where, field=name)
        self._ds = dataset
        units = {name: str(v.attrs["units"]) for name, v in dataset.data_vars.items()
                 if v.attrs.get("polkit_role") != "index"}
        self._claims = [parse_claim(t, units) for t in json.loads(dataset.attrs["claims"])]

    # -- access ---------------------------------------------------------------------------
    @property
    def dataset(self) -> xr.Dataset:
        """All joint draws, dim ``draw``."""
        return self._ds

    @property
    def provenance(self) -> dict[str, Any]:
        """Versions, seed, the two input results (hashes, samples) and the device."""
        return json.loads(self._ds.attrs["provenance"])

    @property
    def diagnostics(self) -> dict[str, Any]:
        """The inputs' convergence flags and the draw counts."""
        return json.loads(self._ds.attrs["diagnostics"])

    @property
    def counted(self) -> dict[str, str]:
        """What each line of the activation counts, in words."""
        return json.loads(self._ds.attrs["counted"])

    def draws(self, name: str) -> np.ndarray:
        """Draws of ``name`` in its units (``dataset[name].attrs['units']``)."""
        if name not in self._ds.data_vars:
            raise DataError(f"no budget quantity {name!r}; known: {sorted(self._ds.data_vars)}",
                            field=name)
        return np.asarray(self._ds[name].values)

    @property
    def energy_per_operation(self) -> np.ndarray:
        """Control-pulse energy for a 1-rad (one-linewidth) shift, fJ, per draw."""
        return self.draws("energy_per_operation")

    @property
    def energy_per_pi_shift(self) -> np.ndarray:
        """Control-pulse energy for a pi shift, fJ, per draw."""
        return self.draws("energy_per_pi_shift")

    @property
    def operation_rate(self) -> np.ndarray:
        """Operations per second per node, GHz, per draw."""
        return self.draws("operation_rate")

    @property
    def power_per_node(self) -> np.ndarray:
        """Control power of one node at full rate, mW, per draw."""
        return self.draws("power_per_node")

    @property
    def energy_per_activation(self) -> np.ndarray:
        """Control pulses + modulators + detectors per array activation, fJ, per draw."""
        return self.draws("energy_per_activation")

    # -- analysis -------------------------------------------------------------------------
    def claims(self) -> list[dict[str, Any]]:
        """``[{"text", "probability", "evidence"}]`` for the recorded claims."""
        out = []
        for c in self._claims:
            values = self.draws(c.quantity)
            q = _quantiles(values)
            out.append({
                "text": c.text,
                "probability": c.probability(values),
                "evidence": {
                    "quantity": c.quantity, "operator": c.op, "threshold": c.threshold,
                    "threshold_units": c.units, "threshold_in_quantity_units": c.threshold_native,
                    "units": c.native_units, "median": q["median"], "q2_5": q["q2_5"],
                    "q97_5": q["q97_5"], "n_draws": int(values.size),
                },
            })
        return out

    def sensitivity(self) -> dict[str, Any]:
        """Which input's uncertainty dominates the spread (method in the module docstring).

        Returns
        -------
        dict
            ``{"target", "method", "sigma_log_target", "shares_sum", "factors": [{"input",
            "exponent", "source", "sigma_log", "variance_share", "first_order_share"}],
            "rank_target", "rank_correlations": [{"input", "source", "spearman"}]}``.
        """
        y = np.log(self.draws("control_energy_per_node"))
        var_y = float(np.var(y))
        rows = []
        for name, power in json.loads(self._ds.attrs["factors"]):
            x = np.log(self.draws(name))
            var_x = float(np.var(x))
            cov = float(np.mean((x - x.mean()) * (y - y.mean())))
            ok = var_x > 0 and var_y > 0
            rows.append({
                "input": name, "exponent": power,
                "source": str(self._ds[name].attrs.get("source", "")),
                "sigma_log": math.sqrt(var_x),
                "variance_share": power * cov / var_y if ok else 0.0,
                "first_order_share": cov * cov / (var_x * var_y) if ok else 0.0,
            })
        rows.sort(key=lambda r: -abs(r["variance_share"]))
        target = self.draws("wall_energy_per_activation")
        ranks = []
        for name, var in self._ds.data_vars.items():
            if var.attrs.get("polkit_role") != "input" or var.attrs.get("source") == "derived":
                continue
            x = np.asarray(var.values, dtype=float)
            if np.ptp(x) == 0 or np.ptp(target) == 0:
                continue
            ranks.append({"input": name, "source": str(var.attrs.get("source", "")),
                          "spearman": float(stats.spearmanr(x, target).statistic)})
        ranks.sort(key=lambda r: -abs(r["spearman"]))
        return {
            "target": "control_energy_per_node",
            "method": "variance share a_i Cov(ln x_i, ln E) / Var(ln E) (sums to 1, covariances "
                      "split evenly); first-order share Corr(ln x_i, ln E)^2",
            "sigma_log_target": math.sqrt(var_y),
            "shares_sum": float(sum(r["variance_share"] for r in rows)),
            "factors": rows,
            "rank_target": "wall_energy_per_activation",
            "rank_correlations": ranks,
        }

    def comparison(self) -> list[dict[str, Any]]:
        """Electronic reference energies beside the budget's medians (context only).

        Order-of-magnitude context, not a benchmark: the references are single arithmetic
        operations in 45 nm CMOS; a polariton node's operation is not the same operation.
        """
        e_op = float(np.median(self.energy_per_operation))
        wall = float(np.median(self.draws("wall_energy_per_node")))
        return [{"operation": r.operation, "energy_fJ": r.energy_J * _FJ_PER_J,
                 "source": r.source,
                 "energy_per_operation_over_reference": e_op / (r.energy_J * _FJ_PER_J),
                 "wall_energy_per_node_over_reference": wall / (r.energy_J * _FJ_PER_J)}
                for r in ELECTRONIC_REFERENCE]

    def notes(self) -> list[str]:
        """The estimate statement, the laser-safety note when it applies, input warnings."""
        out = [
            "This is an estimate under stated assumptions, not a measurement: the node "
            "linewidth is the lower-polariton linewidth at k = 0 of the dispersion fit; the "
            "blueshift is mean-field, g_LP n, uniform over the node area; each polariton is made "
            "from one incident photon at E_LP with the stated input coupling; the dispersion "
            "and power fits are independent (draws paired at random); one activation is one "
            "pass of the array; the lines counted are listed under 'counted'.",
        ]
        p = self.draws("array_optical_power")
        q = _quantiles(p)
        hold = (self.draws("holding_power") if "holding_power" in self._ds
                else np.zeros_like(p))
        control = p - hold
        if q["q97_5"] is not None:
            # no class limit is quoted: the accessible emission limits of IEC 60825-1 depend
            # on wavelength, exposure duration and beam geometry, so polkit defers to them
            out.append(
                f"Laser safety: the implied optical power on the sample is {_g(q['median'])} mW "
                f"(95 % interval {_g(q['q2_5'])} to {_g(q['q97_5'])} mW; control pulses of all "
                f"nodes at full rate {_g(float(np.median(control)))} mW, holding beam "
                f"{_g(float(np.median(hold)))} mW); the lasers that deliver it are usually far "
                "more powerful. Which laser class applies, and the eyewear, interlocks and "
                "enclosures it needs, follow the accessible emission limits of IEC 60825-1 "
                "(they depend on wavelength, exposure and beam geometry) and your local "
                "laser-safety officer, not this estimate."
            )
        d = self.diagnostics
        for role in ("dispersion", "power"):
            if not d.get(f"{role}_converged", True):
                out.append(f"The {role} result did not pass its convergence gate; its draws are "
                           "used as they are.")
        for role in d.get("model_check_failed", []):
            out.append(f"The {role} result failed its model check (its model does not describe "
                       "its data); the budget inherits numbers that may be biased.")
        return out

    def summary(self) -> dict[str, Any]:
        """The ``summary.json`` dict, in the layout of the fits plus the budget's sections.

        ``{"model", "kind", "parameters": {name: {median, q16, q84, q2_5, q97_5, units}},
        "claims": [{"text", "probability", "evidence"}], "counted", "sensitivity",
        "context": {"label", "rows"}, "notes", "diagnostics", "provenance"}``.
        """
        params = {}
        for name, var in self._ds.data_vars.items():
            if var.attrs.get("polkit_role") == "index":
                continue
            params[name] = {**_quantiles(var.values), "units": str(var.attrs["units"])}
        return {
            "model": str(self._ds.attrs["model"]),
            "kind": str(self._ds.attrs["kind"]),
            "parameters": params,
            "claims": self.claims(),
            "counted": self.counted,
            "sensitivity": self.sensitivity(),
            "context": {"label": "order-of-magnitude context, not a benchmark",
                        "rows": self.comparison()},
            "notes": self.notes(),
            "diagnostics": self.diagnostics,
            "provenance": self.provenance,
        }

    # -- presentation ---------------------------------------------------------------------
    def _main_rows(self) -> list[tuple[str, str, str, str]]:
        rows = []
        for name in ("energy_per_operation", "energy_per_pi_shift", "control_energy_per_node",
                     "polaritons_per_node", "operation_rate", "power_per_node",
                     "array_optical_power", "energy_per_activation",
                     "wall_energy_per_activation", "wall_energy_per_node"):
            q = _quantiles(self.draws(name))
            rows.append((name, str(self._ds[name].attrs["units"]), _g(q["median"]),
                         f"[{_g(q['q2_5'])}, {_g(q['q97_5'])}]"))
        return rows

    def _line_rows(self) -> list[tuple[str, str, str, str]]:
        wall = self.draws("wall_energy_per_activation")
        counted = self.counted
        rows = []
        for name, _ in _LINES:
            v = self.draws(name)
            share = float(np.median(v / wall)) if np.all(wall > 0) else float("nan")
            status = "not counted" if counted[name].startswith("not counted") else "counted"
            rows.append((name, _g(float(np.median(v))), f"{100 * share:.3g} %", status))
        return rows

    def table(self) -> str:
        """A printed table with units: main figures, lines, claims, sensitivity, context."""
        n = self._ds.sizes["draw"]
        a = self._ds.attrs
        out = [f"Energy budget ({n} joint draws) -- an estimate under stated assumptions", ""]
        rows = [("quantity", "units", "median", "95% interval"), *self._main_rows()]
        out += _columns(rows)
        out += ["", f"One activation = {a['n_nodes']} node(s) switched, {a['n_inputs']} input(s) "
                    f"modulated, {a['n_outputs']} output(s) detected; lines in fJ:"]
        out += _columns([("line", "median fJ", "median share of wall", ""),
                         *self._line_rows()])
        out += ["", "What each line counts:"]
        out += [f"  {name}: {text}" for name, text in self.counted.items()]
        claims = self.claims()
        if claims:
            out += ["", "Claims (posterior probability that the claim holds):"]
            for c in claims:
                e = c["evidence"]
                out.append(f"  P({c['text']}) = {c['probability']:.3f}   [{e['quantity']} median "
                           f"{_g(e['median'])} {e['units']}, 95% {_g(e['q2_5'])} to "
                           f"{_g(e['q97_5'])} {e['units']}, {e['n_draws']} draws]")
        s = self.sensitivity()
        out += ["", f"Sensitivity of ln({s['target']}) (sigma_log {s['sigma_log_target']:.3g}):"]
        out += _columns([("input", "source", "sigma_log", "variance share", "first-order"),
                         *[(r["input"], r["source"], f"{r['sigma_log']:.3g}",
                            f"{r['variance_share']:.3f}", f"{r['first_order_share']:.3f}")
                           for r in s["factors"]]])
        out += ["", "Electronic reference energies -- order-of-magnitude context, not a benchmark:"]
        out += _columns([("operation", "energy fJ", "E_op / ref", "wall per node / ref", "source"),
                         *[(r["operation"], _g(r["energy_fJ"]),
                            _g(r["energy_per_operation_over_reference"]),
                            _g(r["wall_energy_per_node_over_reference"]), r["source"])
                           for r in self.comparison()]])
        out += ["", "Notes:"] + [f"  - {t}" for t in self.notes()]
        return "\n".join(out)

    def __str__(self) -> str:
        return self.table()

    def __repr__(self) -> str:
        q = _quantiles(self.energy_per_operation)
        return (f"<BudgetResult {self._ds.sizes['draw']} draws, energy_per_operation median "
                f"{_g(q['median'])} fJ, {len(self._claims)} claim(s)>")

    def _repr_html_(self) -> str:
        esc = html.escape

        def table(header, rows):
            head = "".join(f'<th style="text-align:left">{esc(h)}</th>' for h in header)
            body = "".join("<tr>" + "".join(f"<td>{esc(str(c))}</td>" for c in r) + "</tr>"
                           for r in rows)
            return f"<table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table>"

        parts = ["<div><p><b>Energy budget</b> &mdash; an estimate under stated assumptions "
                 f"({self._ds.sizes['draw']} joint draws)</p>",
                 table(("quantity", "units", "median", "95% interval"), self._main_rows()),
                 "<p>Lines of one activation (fJ):</p>",
                 table(("line", "median fJ", "median share of wall", "what is counted"),
                       [(*r[:3], self.counted[r[0]]) for r in self._line_rows()])]
        claims = self.claims()
        if claims:
            parts.append("<ul>" + "".join(
                f"<li>P({esc(c['text'])}) = {c['probability']:.3f}</li>" for c in claims) + "</ul>")
        s = self.sensitivity()
        parts.append(f"<p>Sensitivity of ln({esc(s['target'])}):</p>")
        parts.append(table(("input", "variance share", "first-order share"),
                           [(r["input"], f"{r['variance_share']:.3f}",
                             f"{r['first_order_share']:.3f}") for r in s["factors"]]))
        parts.append("<p>Electronic reference energies: order-of-magnitude context, not a "
                     "benchmark.</p>")
        parts.append(table(("operation", "energy fJ", "E_op / ref", "source"),
                           [(r["operation"], _g(r["energy_fJ"]),
                             _g(r["energy_per_operation_over_reference"]), r["source"])
                            for r in self.comparison()]))
        parts.append("<ul>" + "".join(f"<li>{esc(t)}</li>" for t in self.notes()) + "</ul></div>")
        return "".join(parts)

    # -- files ----------------------------------------------------------------------------
    def save(self, folder: str | os.PathLike, *, figures: bool = True) -> Path:
        """Write ``budget.nc``, ``summary.json`` and (by default) the figures into ``folder``."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        summary = self.summary()
        write_netcdf(folder / BUDGET_FILE, self._ds)
        write_json(folder / SUMMARY_FILE, summary)
        if figures:
            self.figures(folder)
        log.info("energy budget written to %s", folder)
        return folder

    def figures(self, folder: str | os.PathLike) -> list[Path]:
        """Write the breakdown and sensitivity figures (PNG) into ``folder``."""
        from polkit.plotting import budget as plots_budget

        return plots_budget.budget_figures(self, folder)

    @classmethod
    def load(cls, folder: str | os.PathLike) -> BudgetResult:
        """Read a budget written by :meth:`save`.

        Raises
        ------
        DataError
            If the folder or ``budget.nc`` is missing or not a polkit budget.
        """
        path = Path(folder) / BUDGET_FILE
        if not path.is_file():
            raise DataError(f"missing {BUDGET_FILE}: not a polkit budget folder", path=path)
        try:
            with xr.open_dataset(path, engine="h5netcdf") as opened:
                ds = opened.load()
        except (OSError, ValueError) as exc:
            raise DataError(f"cannot read the budget file ({exc})", path=path) from None
        return cls(ds, path=path)


def _columns(rows: Iterable[Sequence[str]]) -> list[str]:
    rows = [tuple(str(c) for c in r) for r in rows]
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    lines = []
    for k, r in enumerate(rows):
        lines.append("  " + "  ".join(c.ljust(w) for c, w in zip(r, widths, strict=True)).rstrip())
        if k == 0:
            lines.append("  " + "  ".join("-" * w for w in widths))
    return lines

"""Propagating the inputs to the budget, draw by draw (never from medians).

The two fits are independent measurements, so their draws are paired at random with a
seeded generator; whole draws are taken from each posterior, so the correlations inside
each fit (for example between the linewidth and the polariton energy) are kept.  Device
inputs are drawn from their log-normal uncertainties.  Every budget quantity is then
computed per joint draw with :mod:`polkit.models.device_energy`.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any, NamedTuple

import numpy as np
import xarray as xr
from numpy.typing import NDArray

from polkit.config.device import Device
from polkit.errors import DataError
from polkit.jobs.budget.inputs import CANONICAL_UNITS, Fits
from polkit.jobs.budget.result import FJ_PER_J, LINES
from polkit.models.device_energy import (
    Overheads,
    array_energy_per_activation,
    energy_per_operation,
    operation_rate,
    power_per_node,
    required_density,
)
from polkit.units import power_to_mw

__all__ = ["BudgetInput", "JointDraws", "joint_draws", "budget_variables",
           "sensitivity_factors", "counted_lines"]

_FIT_LONG_NAMES = {
    "lp_linewidth_k0": "lower-polariton linewidth at k = 0 (FWHM), taken as the node linewidth",
    "lp_energy_k0": "lower-polariton energy at k = 0",
    "exciton_fraction_k0": "lower-polariton exciton fraction |X|^2 at k = 0",
    "lp_lifetime_k0": "lower-polariton lifetime at k = 0",
    "interaction_constant": "polariton-polariton interaction constant g_LP",
    "exciton_interaction_constant": "exciton-exciton interaction constant g_X",
}
# Device attribute -> (budget name, units, long name)
_DEVICE_META = {
    "node_area_um2": ("node_area", "um2", "node (mode) area A"),
    "node_size_um": ("node_size", "um", "node diameter (area pi d^2 / 4)"),
    "phase_rad": ("phase", "rad", "phase of the array's operation"),
    "coupling_efficiency": ("coupling_efficiency", "1", "input coupling efficiency eta_in"),
    "temperature_K": ("temperature", "K", "operating temperature"),
    "ambient_temperature_K": ("ambient_temperature", "K", "ambient (heat-rejection) temperature"),
    "modulator_energy_fJ": ("modulator_energy", "fJ", "energy per modulated input"),
    "detector_energy_fJ": ("detector_energy", "fJ", "energy per detected output"),
    "holding_power_mW": ("holding_power", "mW", "holding-beam power for the whole array"),
    "holding_window_ps": ("holding_window", "ps", "holding-beam time on per activation"),
    "wall_plug_efficiency": ("wall_plug_efficiency", "1", "laser wall-plug efficiency"),
    "cooler_fraction_of_carnot": ("cooler_fraction_of_carnot", "1",
                                  "cooler efficiency relative to Carnot"),
    "cold_fraction": ("cold_fraction", "1", "fraction of optical energy dissipated cold"),
}


class BudgetInput(NamedTuple):
    """One input of the budget: its joint draws and how to describe them."""

    values: NDArray
    units: str
    long_name: str
    source: str  # "dispersion", "power", "device" or "derived"


@dataclass(frozen=True)
class JointDraws:
    """``n`` joint draws of every input, and which posterior draws were paired.

    Attributes
    ----------
    dispersion_index, power_index
        Index of the dispersion and power posterior draw used per joint draw
        (chain-major).
    inputs
        ``{budget name: BudgetInput}`` in the order the budget lists them.
    """

    dispersion_index: NDArray
    power_index: NDArray
    inputs: dict[str, BudgetInput]


def joint_draws(fits: Fits, dev: Device, n: int, rng: np.random.Generator, *,
                interaction: str) -> JointDraws:
    """Pair ``n`` draws of the two fits at random and draw the device inputs, using ``rng``.

    Each posterior is subsampled without replacement when it has at least ``n`` draws,
    resampled with replacement otherwise.  With ``interaction="exciton"`` the polariton
    interaction constant is derived per draw, ``g_LP = g_X |X|^4 / N``.
    """
    n_disp = fits.dispersion_draws["lp_energy_k0"].size
    n_pow = fits.interaction_draws.size
    i_disp = rng.choice(n_disp, n, replace=n > n_disp)
    i_pow = rng.choice(n_pow, n, replace=n > n_pow)
    dev_draws = dev.draw(rng, n)

    inputs: dict[str, BudgetInput] = {}
    for name, vals in fits.dispersion_draws.items():
        inputs[name] = BudgetInput(vals[i_disp], CANONICAL_UNITS[name], _FIT_LONG_NAMES[name],
                                   "dispersion")
    g_name = fits.interaction_name
    inputs[g_name] = BudgetInput(fits.interaction_draws[i_pow], CANONICAL_UNITS[g_name],
                                 _FIT_LONG_NAMES[g_name], "power")
    if interaction == "exciton":
        inputs["interaction_constant"] = _polariton_constant(inputs, fits)
    for attr, vals in dev_draws.items():
        name, units, long_name = _DEVICE_META[attr]
        derived_area = attr == "node_area_um2" and dev.node_area_um2 is None
        inputs[name] = BudgetInput(vals, units,
                                   long_name + (" (from node_size)" if derived_area else ""),
                                   "derived" if derived_area else "device")
    if "holding_window" not in inputs:
        rate = operation_rate(inputs["lp_linewidth_k0"].values, dev.rate_convention)
        inputs["holding_window"] = BudgetInput(
            1e3 / rate, "ps", "holding-beam time on per activation (one time slot)", "derived")
    return JointDraws(i_disp, i_pow, inputs)


def _polariton_constant(inputs: dict[str, BudgetInput], fits: Fits) -> BudgetInput:
    """``g_LP = g_X |X|^4 / N`` per draw, N the ``n_wells`` the power result recorded."""
    wells = fits.power.provenance.get("n_wells")
    if wells is None:  # not recorded: per mode
        wells = 1
    whole = isinstance(wells, int) or (isinstance(wells, float) and wells.is_integer())
    if isinstance(wells, bool) or not whole or wells < 1:
        raise DataError(f"expected a whole number of wells >= 1, found {wells!r}. Fix: refit "
                        "the power series with the sample's number of quantum wells",
                        path=fits.power_where, field="n_wells")
    g_x = inputs["exciton_interaction_constant"].values
    g_lp = g_x * inputs["exciton_fraction_k0"].values ** 2 / wells
    return BudgetInput(g_lp, "ueV um^2",
                       f"polariton interaction constant g_X |X|^4 / N (N = {wells:g})", "derived")


def budget_variables(draws: JointDraws, dev: Device) -> dict[str, xr.Variable]:
    """Every budget variable along dim ``draw``: inputs, draw indices, derived figures, lines."""
    inputs = {name: inp.values for name, inp in draws.inputs.items()}
    gamma, e_lp = inputs["lp_linewidth_k0"], inputs["lp_energy_k0"]
    g, area = inputs["interaction_constant"], inputs["node_area"]
    eta, phase = inputs["coupling_efficiency"], inputs["phase"]

    e_op = energy_per_operation(1.0, gamma, area, e_lp, g, eta)
    e_pi = energy_per_operation(np.pi, gamma, area, e_lp, g, eta)
    e_node = energy_per_operation(phase, gamma, area, e_lp, g, eta)
    rate = operation_rate(gamma, dev.rate_convention)
    p_node_W = power_per_node(e_node, rate)
    hold_mW = inputs["holding_power"] if "holding_power" in inputs else np.zeros(gamma.size)
    lines = _activation_lines(e_node, hold_mW, inputs, dev)

    out: dict[str, xr.Variable] = {}
    for name, inp in draws.inputs.items():
        out[name] = _variable(inp.values, inp.units, inp.long_name, "input", inp.source)
    for name, index in (("dispersion", draws.dispersion_index), ("power", draws.power_index)):
        out[f"{name}_draw"] = _variable(
            index.astype(np.int64), "1", f"index of the {name} posterior draw used (chain-major)",
            "index")
    derived = [
        ("polaritons_per_node", required_density(phase, gamma, g) * area, "1",
         "polaritons per node for the array's operation, phi gamma A / g_LP"),
        ("energy_per_operation", e_op * FJ_PER_J, "fJ",
         "control-pulse energy for a shift of one linewidth (1 rad)"),
        ("energy_per_pi_shift", e_pi * FJ_PER_J, "fJ", "control-pulse energy for a pi phase shift"),
        ("control_energy_per_node", e_node * FJ_PER_J, "fJ",
         "control-pulse energy per node at the device's phase"),
        ("operation_rate", rate, "GHz",
         f"operations per second per node ({dev.rate_convention} convention)"),
        ("power_per_node", power_to_mw(p_node_W, "W"), "mW",
         "control optical power of one node switching in every time slot"),
        ("array_optical_power", power_to_mw(dev.n_nodes * p_node_W, "W") + hold_mW, "mW",
         "optical power on the sample: all nodes at full rate plus the holding beam"),
    ]
    for name, values, units, long_name in derived:
        out[name] = _variable(values, units, long_name, "derived")
    out.update(_line_variables(lines, dev.n_nodes))
    return out


def _activation_lines(e_node: NDArray, hold_mW: NDArray, inputs: dict[str, NDArray],
                      dev: Device) -> dict[str, NDArray]:
    """The lines of one activation (J) from the per-node control energy and the device."""
    wall_plug = inputs["wall_plug_efficiency"] if "wall_plug_efficiency" in inputs else 1.0
    overheads = Overheads(
        holding_power_W=hold_mW * 1e-3,
        window_s=inputs["holding_window"] * 1e-12,
        wall_plug_efficiency=wall_plug,
        t_cold_K=inputs["temperature"] if dev.cooled else None,
        t_hot_K=dev.ambient_temperature_K.value,
        cold_fraction=inputs["cold_fraction"],
        cooler_fraction_of_carnot=inputs["cooler_fraction_of_carnot"],
    )
    return array_energy_per_activation(
        e_node, dev.n_inputs, dev.n_outputs,
        inputs["modulator_energy"] / FJ_PER_J, inputs["detector_energy"] / FJ_PER_J,
        n_nodes=dev.n_nodes, overheads=overheads,
    )


def _line_variables(lines: dict[str, NDArray], n_nodes: int) -> dict[str, xr.Variable]:
    """The activation's lines in fJ and their sums."""
    out = {name: _variable(lines[f"{name}_J"] * FJ_PER_J, "fJ", long_name, "line")
           for name, long_name in LINES}
    out["energy_per_activation"] = _variable(
        (lines["control_optical_J"] + lines["modulators_J"] + lines["detectors_J"]) * FJ_PER_J,
        "fJ", "energy per array activation: control pulses, modulators and detectors", "derived")
    out["wall_energy_per_activation"] = _variable(
        lines["total_J"] * FJ_PER_J, "fJ", "energy per array activation with every declared line",
        "derived")
    out["wall_energy_per_node"] = _variable(
        lines["total_J"] * FJ_PER_J / n_nodes, "fJ",
        "every declared line per activation, shared per node", "derived")
    return out


def _variable(values: Any, units: str, long_name: str, role: str,
              source: str | None = None) -> xr.Variable:
    attrs = {"units": units, "long_name": long_name, "polkit_role": role}
    if source is not None:
        attrs["source"] = source
    return xr.Variable(("draw",), np.asarray(values), attrs)


def sensitivity_factors(interaction: str) -> list[tuple[str, int]]:
    """``[(input, exponent)]`` of ``ln E = sum_i a_i ln x_i + const`` for the control energy."""
    factors = [("phase", 1), ("lp_linewidth_k0", 1), ("node_area", 1), ("lp_energy_k0", 1),
               ("coupling_efficiency", -1)]
    if interaction == "polariton":
        factors.append(("interaction_constant", -1))
    else:
        factors += [("exciton_interaction_constant", -1), ("exciton_fraction_k0", -2)]
    return factors


def counted_lines(dev: Device, inputs: dict[str, Any]) -> dict[str, str]:
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

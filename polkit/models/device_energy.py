"""What a device built from a polariton sample would cost: energy per nonlinear operation.

A node is switched by a control pulse that blueshifts it by ``phi`` linewidths (a phase
``phi`` in rad: ~1 rad for one linewidth, pi for a full swing).  The pulse energy follows
from the interaction constant, the node area and the input coupling
(:func:`energy_per_operation`); the rest of a device (holding beam, laser wall-plug
efficiency, modulators, detectors, cooling) is counted line by line in
:func:`array_energy_per_activation`, so the caller sees what is and is not included.

Units: linewidths in meV, areas in um^2, levels in eV, interaction constants in ueV um^2,
energies in J (``_fJ`` helpers in fJ), rates in GHz, powers in W, temperatures in K.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass
from typing import Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import constants as _c

from polkit._checks import real_array
from polkit.constants import HBAR_MEV_PS
from polkit.errors import DataError

logger = logging.getLogger(__name__)

__all__ = [
    "ReferenceEnergy",
    "ELECTRONIC_REFERENCE",
    "required_density",
    "energy_per_operation",
    "energy_per_operation_fJ",
    "operation_rate",
    "power_per_node",
    "carnot_work_per_heat",
    "Overheads",
    "array_energy_per_activation",
    "lognormal_product",
]

_J_PER_EV = _c.e  # CODATA (exact since 2019)


@dataclass(frozen=True)
class ReferenceEnergy:
    """An electronic reference point, for order-of-magnitude context only."""

    operation: str
    energy_J: float
    source: str


_HOROWITZ = 'Horowitz, "Computing\'s energy problem", ISSCC 2014, 45 nm CMOS (order of magnitude)'

#: Energies of single arithmetic operations in 45 nm CMOS, as quoted from memory of
#: Horowitz (ISSCC 2014).  Order-of-magnitude context, not a certified table.
ELECTRONIC_REFERENCE: tuple[ReferenceEnergy, ...] = (
    ReferenceEnergy("32-bit float multiply", 3.7e-12, _HOROWITZ),
    ReferenceEnergy("32-bit float add", 0.9e-12, _HOROWITZ),
    ReferenceEnergy("8-bit integer multiply", 0.2e-12, _HOROWITZ),
    ReferenceEnergy("8-bit integer add", 0.03e-12, _HOROWITZ),
)


def _checked(name: str, value: ArrayLike, *, positive: bool = True, upper: float | None = None):
    arr = real_array(name, value, positive=positive, nonneg=not positive)
    if upper is not None and np.any(arr > upper):
        raise DataError(
            f"expected values in (0, {upper:g}], found maximum {arr.max():g}; "
            "give an efficiency as a fraction",
            field=name,
        )
    return arr


def required_density(phase: ArrayLike, gamma_meV: ArrayLike, g_lp_ueV_um2: ArrayLike) -> NDArray:
    """Polariton density (1/um^2) whose blueshift ``g_LP n`` equals ``phase x gamma``.

    ``n = phi gamma / g_LP``; with gamma in meV and g_LP in ueV um^2,
    ``n = 1e3 phi gamma / g_LP`` (mean-field blueshift ``g_LP n``; common practice, no published
    source).
    """
    phi = _checked("phase", phase)
    gamma = _checked("gamma_meV", gamma_meV)
    g = _checked("g_lp_ueV_um2", g_lp_ueV_um2)
    return 1e3 * phi * gamma / g


def energy_per_operation(
    phase: ArrayLike,
    gamma_meV: ArrayLike,
    area_um2: ArrayLike,
    e_lp_eV: ArrayLike,
    g_lp_ueV_um2: ArrayLike,
    eta_in: ArrayLike,
) -> NDArray:
    """Optical energy (J) of the control pulse that shifts a node by ``phase`` linewidths.

    ``E_op = phi gamma A E_LP / (g_LP eta_in)``.

    Derivation: a blueshift of ``phi gamma`` needs the density ``n = phi gamma / g_LP``
    (mean-field shift ``g_LP n``), i.e. ``N = n A`` polaritons in the node area ``A``.
    Each is made from one photon of energy ``E_LP`` (resonant injection), and only a
    fraction ``eta_in`` of the incident photons become polaritons, so the pulse carries
    ``N E_LP / eta_in``.  Units: ``1e3 phi gamma[meV] / g[ueV um^2]`` is in 1/um^2,
    times ``A`` [um^2] gives ``N``, times ``E_LP`` [eV] x e [J/eV] gives joules.  Counted:
    the control pulse only (see :func:`array_energy_per_activation` for the rest).

    Parameters
    ----------
    phase
        Shift in units of the linewidth (rad): 1 for one linewidth, pi for a full swing.
    gamma_meV
        Node linewidth (FWHM), meV.
    area_um2
        Node (mode) area, um^2.
    e_lp_eV
        Lower-polariton energy, eV.
    g_lp_ueV_um2
        Polariton-polariton interaction constant, ueV um^2.
    eta_in
        Photon-to-polariton input coupling efficiency, in (0, 1].

    Returns
    -------
    ndarray
        Energy in J, broadcast over the inputs (one value per posterior draw when the
        inputs are draws).
    """
    n = required_density(phase, gamma_meV, g_lp_ueV_um2)
    area = _checked("area_um2", area_um2)
    e_lp = _checked("e_lp_eV", e_lp_eV)
    eta = _checked("eta_in", eta_in, upper=1.0)
    return n * area * e_lp * _J_PER_EV / eta


def energy_per_operation_fJ(*args: ArrayLike, **kwargs: ArrayLike) -> NDArray:
    """:func:`energy_per_operation` in femtojoules (1 fJ = 1e-15 J).

    Takes the parameters of :func:`energy_per_operation` (``phase, gamma_meV, area_um2,
    e_lp_eV, g_lp_ueV_um2, eta_in``), by position or by name.
    """
    return 1e15 * energy_per_operation(*args, **kwargs)


def operation_rate(
    gamma_meV: ArrayLike, convention: Literal["linewidth", "lifetime"] = "linewidth"
) -> NDArray:
    """Operations per second a node of linewidth ``gamma`` can sustain, in GHz.

    With ``tau = hbar / gamma`` the population lifetime:

    * ``"linewidth"`` (default): ``gamma / h = 1 / (2 pi tau)``, the FWHM of the node's
      Lorentzian response in Hz.  A single-pole resonator passes envelope modulation up to
      ``gamma / (2h)`` (its field amplitude decays at ``gamma / (2 hbar)``), and the
      Nyquist rate for that baseband width is twice it, i.e. ``gamma / h``.  This is the
      conservative choice and polkit's default.
    * ``"lifetime"``: ``1 / tau = gamma / hbar`` (2 pi larger), the "node bandwidth ~ 1/tau"
      often quoted; it assumes an operation per lifetime, which the response does not
      resolve cleanly.

    Example: gamma = 0.1 meV gives 24.18 GHz ("linewidth") or 151.9 GHz ("lifetime").

    Parameters
    ----------
    gamma_meV
        Linewidth (FWHM), meV.
    convention
        ``"linewidth"`` or ``"lifetime"``, see above.

    Returns
    -------
    ndarray
        Rate in GHz.
    """
    gamma = _checked("gamma_meV", gamma_meV)
    per_ps = gamma / HBAR_MEV_PS  # 1 / tau
    if convention == "linewidth":
        return per_ps / (2.0 * np.pi) * 1e3
    if convention == "lifetime":
        return per_ps * 1e3
    raise DataError(
        f"expected convention 'linewidth' or 'lifetime', found {convention!r}", field="convention"
    )


def power_per_node(e_op_J: ArrayLike, rate_GHz: ArrayLike, activity: ArrayLike = 1.0) -> NDArray:
    """Average optical control power of one node, ``E_op x rate x activity`` in W.

    ``activity`` is the fraction of time slots in which the node switches (1 = every slot).
    """
    e = _checked("e_op_J", e_op_J)
    rate = _checked("rate_GHz", rate_GHz)
    a = _checked("activity", activity, upper=1.0)
    return e * rate * 1e9 * a


def carnot_work_per_heat(t_cold_K: ArrayLike, t_hot_K: ArrayLike = 300.0) -> NDArray:
    """Minimum work per unit heat removed at ``T_cold``, ``(T_hot - T_cold) / T_cold`` (W/W).

    Carnot bound for a refrigerator rejecting heat at ``T_hot`` (second law of
    thermodynamics): 74 W per W removed at 4 K from 300 K.  Real cryocoolers need
    several times more.
    """
    tc = _checked("t_cold_K", t_cold_K)
    th = _checked("t_hot_K", t_hot_K)
    if np.any(th < tc):
        raise DataError(
            "expected t_hot_K >= t_cold_K (heat rejected to a warmer bath)", field="t_hot_K"
        )
    return (th - tc) / tc


@dataclass(frozen=True, eq=False)
class Overheads:
    """What an array spends besides control pulses, modulators and detectors.

    The defaults count nothing: no holding beam, lossless lasers, no cooling.  Values may
    be arrays (e.g. one per posterior draw); they are checked by
    :func:`array_energy_per_activation`.

    Attributes
    ----------
    holding_power_W, window_s
        Holding-beam power for the whole array (W) and the time it stays on per
        activation (s).
    wall_plug_efficiency
        Laser electrical-to-optical efficiency, in (0, 1].
    t_cold_K, t_hot_K
        Cryostat and ambient temperatures (K); ``t_cold_K=None`` counts no cooling.
    cold_fraction
        Fraction of the delivered optical energy dissipated at the cold stage, in [0, 1].
    cooler_fraction_of_carnot
        Cooler efficiency relative to Carnot, in (0, 1] (1 = the thermodynamic bound).
    """

    holding_power_W: ArrayLike = 0.0
    window_s: ArrayLike = 0.0
    wall_plug_efficiency: ArrayLike = 1.0
    t_cold_K: ArrayLike | None = None
    t_hot_K: ArrayLike = 300.0
    cold_fraction: ArrayLike = 1.0
    cooler_fraction_of_carnot: ArrayLike = 1.0


def array_energy_per_activation(
    e_op_J: ArrayLike,
    n_inputs: int,
    n_outputs: int,
    e_modulator_J: ArrayLike,
    e_detector_J: ArrayLike,
    *,
    n_nodes: int = 1,
    overheads: Overheads | None = None,
) -> dict[str, NDArray]:
    """Energy (J) of one activation of an array of nodes, as separate declared lines.

    Lines (each always present, zero when not counted), with the :class:`Overheads` fields
    written plainly:

    * ``control_optical_J = n_nodes E_op`` -- control pulses at the sample.
    * ``holding_optical_J = holding_power_W window_s`` -- a holding (bias) beam kept on
      for the activation window (total for the array).
    * ``laser_wallplug_J = (control + holding)(1/eta_wp - 1)`` -- electrical energy the
      lasers waste making that light (wall-plug efficiency ``eta_wp``).
    * ``modulators_J = n_inputs e_modulator`` -- encoding the inputs.
    * ``detectors_J = n_outputs e_detector`` -- reading the outputs.
    * ``cooling_J = cold_fraction (control + holding) W_carnot / cooler_fraction_of_carnot``
      -- work to pump the optical energy dissipated in the cryostat back to ``t_hot_K``;
      ``W_carnot = (T_hot - T_cold) / T_cold`` (:func:`carnot_work_per_heat`); zero when
      ``t_cold_K`` is None (room-temperature device).
    * ``total_J`` -- the sum of the lines above.

    Parameters
    ----------
    e_op_J
        Energy per nonlinear operation (J), e.g. posterior draws of
        :func:`energy_per_operation`.
    n_inputs, n_outputs
        Number of modulated inputs and detected outputs per activation.
    e_modulator_J, e_detector_J
        Energy per modulated input and per detected output (J).
    n_nodes
        Number of nonlinear nodes switched per activation.
    overheads
        Holding beam, laser wall-plug efficiency and cooling (:class:`Overheads`);
        ``None`` counts none of them.

    Returns
    -------
    dict of str to ndarray
        The lines named above, in J, broadcast over the inputs.
    """
    for name, value in (("n_inputs", n_inputs), ("n_outputs", n_outputs), ("n_nodes", n_nodes)):
        if isinstance(value, bool) or int(value) != value or value < 0:
            raise DataError(f"expected a whole number >= 0, found {value!r}", field=name)
    o = Overheads() if overheads is None else overheads
    e_op = _checked("e_op_J", e_op_J)
    e_mod = _checked("e_modulator_J", e_modulator_J, positive=False)
    e_det = _checked("e_detector_J", e_detector_J, positive=False)
    hold = _checked("holding_power_W", o.holding_power_W, positive=False)
    window = _checked("window_s", o.window_s, positive=False)
    wp = _checked("wall_plug_efficiency", o.wall_plug_efficiency, upper=1.0)
    cold = _checked("cold_fraction", o.cold_fraction, positive=False, upper=1.0)
    cooler = _checked("cooler_fraction_of_carnot", o.cooler_fraction_of_carnot, upper=1.0)

    control = n_nodes * e_op
    holding = hold * window
    optical = control + holding
    if o.t_cold_K is None:
        cooling = np.zeros_like(optical)
    else:
        cooling = cold * optical * carnot_work_per_heat(o.t_cold_K, o.t_hot_K) / cooler
    lines = {
        "control_optical_J": control,
        "holding_optical_J": holding,
        "laser_wallplug_J": optical * (1.0 / wp - 1.0),
        "modulators_J": n_inputs * e_mod,
        "detectors_J": n_outputs * e_det,
        "cooling_J": cooling,
    }
    shape = np.broadcast_shapes(*(np.shape(v) for v in lines.values()))
    lines = {k: np.broadcast_to(np.asarray(v, dtype=float), shape).copy() for k, v in lines.items()}
    lines["total_J"] = sum(lines.values())
    return lines


def lognormal_product(
    medians: ArrayLike, sigmas_log: ArrayLike, powers: ArrayLike | None = None
) -> tuple[NDArray, NDArray]:
    """Median and log-width of a product of independent log-normal factors.

    For ``Y = prod_i X_i^a_i`` with ``ln X_i ~ Normal(ln m_i, s_i^2)`` independent,
    ``ln Y = sum_i a_i ln X_i`` is normal with mean ``sum a_i ln m_i`` and variance
    ``sum a_i^2 s_i^2`` (sum of independent normals), so

        median(Y) = prod_i m_i^a_i,   sigma_log(Y) = sqrt(sum_i a_i^2 s_i^2).

    Parameters
    ----------
    medians
        Medians ``m_i`` (> 0), factors along the last axis.
    sigmas_log
        Log-widths ``s_i`` (>= 0), same shape.
    powers
        Exponents ``a_i`` (default all 1; -1 for a divisor).

    Returns
    -------
    (ndarray, ndarray)
        ``median(Y)`` and ``sigma_log(Y)``, with the last axis reduced.
    """
    m = _checked("medians", medians)
    s = _checked("sigmas_log", sigmas_log, positive=False)
    a = np.ones_like(m) if powers is None else np.asarray(powers, dtype=float)
    try:
        m, s, a = np.broadcast_arrays(m, s, a)
    except ValueError as exc:
        raise DataError(
            f"medians {np.shape(medians)}, sigmas_log {np.shape(sigmas_log)} and powers "
            f"{np.shape(powers)} do not broadcast",
            field="sigmas_log",
        ) from exc
    median = np.exp(np.sum(a * np.log(m), axis=-1))
    sigma = np.sqrt(np.sum((a * s) ** 2, axis=-1))
    return median, sigma

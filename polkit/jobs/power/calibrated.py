"""Absolute numbers of a power-series fit: densities and interaction constants per draw.

The fit itself (:mod:`polkit.jobs.power.problem`) needs no calibration: it reports the
identifiable products (blueshift per unit power, drive per power, blueshift per occupation).
:func:`calibrated_quantities` turns them into densities and interaction constants with a
density calibration (:mod:`polkit.models.calibration`), a dispersion result's exciton
fraction and the sample's constants (:class:`polkit.jobs.power.options.PowerCalibration`).

Calibration inputs
    The calibration inputs are *propagated per draw*: each posterior draw is paired with an
    independent draw of the calibration inputs from their log-normal priors.  This is exact
    here because the likelihood depends on powers in mW only, never on the calibration, so
    the joint posterior of (physics, calibration) factorises into posterior x calibration
    prior; sampling them as nuisance parameters would give the same joint distribution
    while enlarging the space emcee must explore.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np

from polkit.constants import HBAR_MEV_PS
from polkit.errors import DataError
from polkit.jobs.power.problem import PowerProblem
from polkit.models.calibration import DensityCalibration, cw_density, pulsed_density

__all__ = ["UEV_PER_MEV", "ciuti_estimate", "calibrated_quantities"]

#: ueV per meV (interaction constants are reported in ueV um^2)
UEV_PER_MEV = 1e3

#: what a quantity per draw is: ``name -> (values (D,), units, long_name)``
Quantities = dict[str, tuple[np.ndarray, str, str]]


def ciuti_estimate(exciton_binding_meV: float, bohr_radius_nm: float) -> float:
    """Exciton-exciton interaction constant ``6 E_b a_B^2`` in ueV um^2.

    Source: Ciuti et al., Phys. Rev. B 58, 7926 (1998), for a two-dimensional exciton of
    binding energy ``E_b`` and Bohr radius ``a_B``: ``meV nm^2 = 1e3 ueV x 1e-6 um^2``.
    """
    if not (exciton_binding_meV > 0 and bohr_radius_nm > 0):
        raise DataError(
            f"expected E_b > 0 meV and a_B > 0 nm, found {exciton_binding_meV!r} and "
            f"{bohr_radius_nm!r}",
            field="exciton_binding_meV" if not exciton_binding_meV > 0 else "bohr_radius_nm",
        )
    return 6.0 * exciton_binding_meV * bohr_radius_nm**2 * 1e-3


def _lognormal(value_and_error, rng, n) -> np.ndarray:
    value, rel = value_and_error
    return value * np.exp(rng.normal(0.0, rel, n)) if rel > 0 else np.full(n, float(value))


def calibrated_quantities(
    problem: PowerProblem,
    draws: np.ndarray,
    base: Mapping[str, tuple[np.ndarray, str, str]],
    *,
    calibration: DensityCalibration | None,
    rng: np.random.Generator,
    exciton_fraction: np.ndarray | None = None,
    n_wells: int | None = None,
    exciton_binding_meV: float | None = None,
    bohr_radius_nm: float | None = None,
    reservoir_lifetime: tuple[float, float] | None = None,
) -> tuple[dict[str, tuple[np.ndarray, str, str]], list[str]]:
    """Absolute densities and interaction constants per posterior draw, and notes.

    Each posterior draw is paired with an independent draw of the calibration inputs (and,
    given, of the exciton fraction from a dispersion result, picked at random: the two fits
    are independent).  Densities come from the pump power through the calibration:

    * coherent: a resonant pump injects ``rho_res = eta P tau / (E_ph A)`` with
      ``tau = hbar / gamma`` per draw (cw; for pulsed drive the peak power ``P / (f tau_p)``,
      a quasi-steady state valid for pulses much longer than ``tau``).  On resonance the
      steady state gives ``y = 4 F / gamma^2 = g rho_res``, so
      ``g_LP = 4 alpha kappa / (gamma^2 rho_res per mW)``.
    * reservoir: above threshold every extra pumped exciton ends in the condensate,
      ``rho_C = (drho/dP) (P - P_th)`` (Wouters and Carusotto, PRL 99, 140402, 2007, far above
      threshold), so ``g_C = (condensate_blueshift_rate) / (drho/dP)`` with ``drho/dP`` the
      calibration's density per mW (cw: polariton lifetime from the calibration, else
      ``hbar / linewidth_low``); the reservoir at threshold holds ``rho_R = eta P_th tau_R /
      (E_ph A)`` (cw, needs ``reservoir_lifetime``) or ``eta P_th / (f E_ph A)`` (pulsed), so
      ``g_R = reservoir_blueshift / rho_R``.

    ``exciton_interaction_constant = g N / |X|^4`` inverts ``g_LP = g_X |X|^4 / N``
    (Ciuti et al., Phys. Rev. B 58, 7926 (1998); N = ``n_wells``, else 1, i.e. per mode).

    Parameters
    ----------
    problem
        The fitted problem (with its space).
    draws
        Posterior draws ``(D, P)``.
    base
        :meth:`PowerProblem.derived` of the same draws.
    calibration
        The density calibration, or None (then only the notes say what is missing).
    rng
        Generator for the calibration and pairing draws.
    exciton_fraction
        ``|X|^2`` draws of a dispersion result.
    n_wells
        Number of equivalent quantum wells.
    exciton_binding_meV, bohr_radius_nm
        For the comparison with ``6 E_b a_B^2`` (Ciuti et al., PRB 58, 7926, 1998).
    reservoir_lifetime
        ``(value_ps, relative_error)`` of the reservoir lifetime (cw reservoir density).

    Returns
    -------
    (dict, list of str)
        ``name -> (values (D,), units, long_name)`` and notes for the result.
    """
    c = problem.columns(draws)
    n = np.atleast_2d(draws).shape[0]
    out: Quantities = {}
    notes: list[str] = []
    if calibration is None:
        notes.append("absolute interaction constants and densities need a calibration file "
                      "(spot size, photon energy, coupling efficiency ...); reported instead: "
                      "the identifiable products (blueshift per unit power, drive per power, "
                      "blueshift per occupation)")
        if exciton_fraction is not None:
            notes.append("the dispersion result was not used: the exciton interaction constant "
                         "needs the polariton one, which needs a calibration")
        return out, notes
    vals = calibration.draw(rng, n)
    pulsed = calibration.drive == "pulsed"
    if problem.model == "coherent":
        g_main = _coherent_constants(base, vals, pulsed, out, notes)
    else:
        g_main = _reservoir_constants(problem, c, vals, pulsed, out, notes,
                                      rng=rng, n=n, reservoir_lifetime=reservoir_lifetime)
    if g_main is not None and exciton_fraction is not None:
        _exciton_constants(g_main, exciton_fraction, rng, n, out, notes, n_wells=n_wells,
                           exciton_binding_meV=exciton_binding_meV,
                           bohr_radius_nm=bohr_radius_nm)
    elif exciton_fraction is not None:
        notes.append("exciton_interaction_constant not reported: no polariton interaction "
                     "constant (see the other notes)")
    if (exciton_binding_meV is None) != (bohr_radius_nm is None):
        notes.append("the comparison with 6 E_b a_B^2 needs both exciton_binding_meV and "
                      "bohr_radius_nm")
    return out, notes


def _coherent_constants(base, vals, pulsed: bool, out: Quantities,
                        notes: list[str]) -> np.ndarray:
    """Coherent drive: density per power and ``g_LP`` per draw (into ``out``); ``g_LP``."""
    gam = base["polariton_linewidth"][0]
    tau = HBAR_MEV_PS / gam
    rho1 = cw_density(1.0, vals["photon_energy_eV"], vals["spot_area_um2"],
                      vals["coupling_efficiency"], tau)
    if pulsed:
        duty = vals["repetition_rate_MHz"] * 1e-6 * vals["pulse_duration_ps"]
        rho1 = rho1 / duty
        if np.median(vals["pulse_duration_ps"]) < 10.0 * np.median(tau):
            notes.append("pulsed coherent drive treated as quasi-steady (peak power); the "
                         "pulses are not much longer than the polariton lifetime, so the "
                         "steady-state densities are upper bounds")
    f1 = base["drive_per_power"][0]
    g_main = 4.0 * f1 / (gam * gam * rho1)  # meV um^2
    out["density_per_power"] = (rho1, "1/um^2/mW",
                                "polariton density per mW of a resonant pump")
    out["interaction_constant"] = (g_main * UEV_PER_MEV, "ueV um^2",
                                   "polariton-polariton interaction constant g_LP")
    out["max_polariton_density"] = (base["max_blueshift"][0] / g_main, "1/um^2",
                                    "largest polariton density reached in the series")
    return g_main


def _condensate_density_per_power(c, vals, pulsed: bool, common,
                                  notes: list[str]) -> np.ndarray | None:
    """Reservoir model: condensate density per mW above threshold, or ``None`` (noted)."""
    if pulsed:
        return pulsed_density(1.0, *common, vals["repetition_rate_MHz"])
    if "polariton_lifetime_ps" in vals:
        return cw_density(1.0, *common, vals["polariton_lifetime_ps"])
    if "linewidth_low" in c:
        drho = cw_density(1.0, *common, HBAR_MEV_PS / c["linewidth_low"])
        notes.append("polariton lifetime taken as hbar / linewidth_low per draw (the "
                     "calibration gives none)")
        return drho
    notes.append("cw calibration without polariton_lifetime and no linewidths: the "
                 "condensate density and interaction_constant are not reported")
    return None


def _reservoir_constants(problem: PowerProblem, c, vals, pulsed: bool, out: Quantities,
                         notes: list[str], *, rng: np.random.Generator, n: int,
                         reservoir_lifetime) -> np.ndarray | None:
    """Nonresonant drive: densities, ``g_C`` and ``g_R`` per draw (into ``out``); ``g_C``."""
    p_th, n_s = c["threshold_power"], c["saturation_number"]
    common = (vals["photon_energy_eV"], vals["spot_area_um2"], vals["coupling_efficiency"])
    drho = _condensate_density_per_power(c, vals, pulsed, common, notes)
    if drho is not None:
        n_max = problem.occupation(p_th, n_s, np.array([np.max(problem.power)]))[0][:, 0]
        out["density_per_power"] = (drho, "1/um^2/mW",
                                    "condensate density per mW above threshold")
        out["max_polariton_density"] = (drho * p_th * n_max / n_s, "1/um^2",
                                        "condensate density at the largest power")
    if "condensate_blueshift_rate" not in c:
        notes.append("no peak energies: the interaction constants need the blueshift")
        return None
    g_main = None
    if drho is not None:
        g_main = c["condensate_blueshift_rate"] / drho
        out["interaction_constant"] = (g_main * UEV_PER_MEV, "ueV um^2",
                                       "polariton-polariton interaction constant g_C")
    if pulsed:
        rho_r = pulsed_density(p_th, *common, vals["repetition_rate_MHz"])
    elif reservoir_lifetime is not None:
        rho_r = cw_density(p_th, *common, _lognormal(reservoir_lifetime, rng, n))
    else:
        rho_r = None
        notes.append("cw drive: the reservoir density (and reservoir_interaction_constant)"
                     " needs the reservoir lifetime; pass reservoir_lifetime_ps")
    if rho_r is not None:
        out["threshold_density"] = (rho_r, "1/um^2", "reservoir density at threshold")
        out["reservoir_interaction_constant"] = (
            c["reservoir_blueshift"] / rho_r * UEV_PER_MEV, "ueV um^2",
            "polariton-reservoir interaction constant g_R")
    return g_main


def _exciton_constants(g_main: np.ndarray, exciton_fraction, rng: np.random.Generator,
                       n: int, out: Quantities, notes: list[str], *, n_wells,
                       exciton_binding_meV, bohr_radius_nm) -> None:
    """``g_X = g N / |X|^4`` per draw, |X|^2 paired at random, and the textbook comparison."""
    x2_all = np.asarray(exciton_fraction, dtype=float)
    x2_all = x2_all[np.isfinite(x2_all) & (x2_all > 0)]
    if x2_all.size == 0:
        raise DataError("the dispersion result holds no positive exciton_fraction_k0 draws",
                        field="exciton_fraction_k0")
    x2 = x2_all[rng.integers(0, x2_all.size, n)]
    wells = 1 if n_wells is None else int(n_wells)
    g_x = g_main * wells / (x2 * x2) * UEV_PER_MEV
    out["exciton_fraction_k0"] = (x2, "1", "exciton fraction |X|^2 at k = 0 (dispersion "
                                  "result, paired at random)")
    label = "per quantum well" if n_wells is not None else "per polariton mode (all wells)"
    out["exciton_interaction_constant"] = (g_x, "ueV um^2",
                                           f"exciton interaction constant g N / |X|^4, {label}")
    if n_wells is None:
        notes.append("exciton_interaction_constant is per mode: give n_wells for the "
                     "per-well constant")
    if exciton_binding_meV is not None and bohr_radius_nm is not None:
        est = ciuti_estimate(exciton_binding_meV, bohr_radius_nm)
        out["exciton_interaction_ratio"] = (
            g_x / est, "1", f"exciton_interaction_constant over 6 E_b a_B^2 = {est:.4g} ueV "
            "um^2 (Ciuti et al., PRB 58, 7926, 1998)")
        prob = float(np.mean((g_x > est / 2) & (g_x < 2 * est)))
        out["within_factor_two_of_estimate"] = (
            np.asarray(prob), "1", "probability that the exciton interaction constant lies "
            "within a factor 2 of 6 E_b a_B^2")

"""Cross-check of the coupled-oscillator dispersion against a general transfer-matrix code.

The reflectance of an invented lambda microcavity with a Lorentz-oscillator quantum
well (tests/tmm_reference.py) is computed with the ``tmm`` PyPI library, which knows
nothing of polaritons.  First the bare mirrors are checked against Macleod's closed
forms; then the two reflectance dips are followed versus angle and fitted with
polkit's coupled-oscillator branches (E_X, E_C0, n_eff, g).
"""

from __future__ import annotations

import numpy as np
import pytest
import tmm
from scipy.optimize import brentq, least_squares, minimize
from tmm_reference import (
    CAVITY,
    HC_EV_NM,
    dbr_layers,
    reflectance_dips,
    reflectance_map,
)

from polkit.models.dispersion import cavity_energy, two_mode_eigenvalues
from polkit.models.spectral import reflectance_basis
from polkit.numerics.projection import prepare_map, project_linear

N_HIGH, N_LOW, N_SUB = 3.5, 2.95, 3.5  # GaAs/AlAs-like indices, value from memory
E_BRAGG = 1.530  # eV, invented
LAM_BRAGG = HC_EV_NM / E_BRAGG



def dbr_reflectance(pairs: int, energy_ev: float, *, outside: float = 1.0,
                    substrate: float = N_SUB) -> float:
    n, d = dbr_layers(N_HIGH, N_LOW, pairs, LAM_BRAGG)
    res = tmm.coh_tmm("s", [outside] + n + [substrate], [np.inf] + d + [np.inf], 0.0,
                      HC_EV_NM / energy_ev)
    return float(res["R"])


@pytest.mark.parametrize("pairs", [20, 24])
def test_dbr_peak_reflectance_matches_macleod(pairs):
    # Source: Macleod, Thin-Film Optical Filters: a quarter-wave stack (HL)^N on a
    # substrate has admittance Y = n_s (n_H/n_L)^(2N) at the Bragg wavelength and
    # R = ((n_0 - Y) / (n_0 + Y))^2
    y = N_SUB * (N_HIGH / N_LOW) ** (2 * pairs)
    expected = ((1.0 - y) / (1.0 + y)) ** 2
    assert dbr_reflectance(pairs, E_BRAGG) == pytest.approx(expected, rel=1e-12)
    assert expected > 0.998


def test_dbr_stop_band_matches_macleod():
    # Source: Macleod, Thin-Film Optical Filters: stop band of a quarter-wave stack
    # dE / E_0 = (4/pi) arcsin((n_H - n_L) / (n_H + n_L)).  The band edges are found from
    # tmm transmissions of one and two periods embedded in the low index, through
    # 1/T_N - 1 = (1/T_1 - 1) U_{N-1}(xi)^2 with xi = cos(K Lambda) (Yeh, Optical Waves
    # in Layered Media, ch. 6), so xi^2 = (1/T_2 - 1) / (4 (1/T_1 - 1)) and |xi| = 1 at
    # the edges.
    def inv_t(pairs, e):
        n, d = dbr_layers(N_HIGH, N_LOW, pairs, LAM_BRAGG)
        res = tmm.coh_tmm("s", [N_LOW] + n + [N_LOW], [np.inf] + d + [np.inf], 0.0,
                          HC_EV_NM / e)
        return 1.0 / res["T"] - 1.0

    def xi2(e):
        return inv_t(2, e) / (4.0 * inv_t(1, e))

    # the Chebyshev identity itself, checked with three periods: U_2 = 4 xi^2 - 1
    for e in (1.40, 1.47, 1.55):
        assert inv_t(3, e) / inv_t(1, e) == pytest.approx((4 * xi2(e) - 1) ** 2, rel=1e-8)
    assert xi2(E_BRAGG) > 1.0  # the Bragg energy is inside the gap
    upper = brentq(lambda e: xi2(e) - 1.0, E_BRAGG, 1.2 * E_BRAGG, xtol=1e-13)
    lower = brentq(lambda e: xi2(e) - 1.0, 0.8 * E_BRAGG, E_BRAGG, xtol=1e-13)
    expected = 4 / np.pi * np.arcsin((N_HIGH - N_LOW) / (N_HIGH + N_LOW))
    assert (upper - lower) / E_BRAGG == pytest.approx(expected, rel=1e-8)


@pytest.fixture(scope="module")
def polariton_fit():
    # Angles up to 21 degrees keep both branches with a sizeable photon fraction; far
    # beyond it the exciton-like dip is shallow and feels the bare exciton resonance.
    angles = np.arange(0.0, 22.0, 1.5)
    dips = [reflectance_dips(CAVITY, a) for a in angles]
    assert all(d.size == 2 for d in dips), [d.size for d in dips]
    lower, upper = np.array(dips).T

    def residuals(p):
        e_x, e_c0, n_eff, g = p
        lo, up = two_mode_eigenvalues(cavity_energy(e_c0, n_eff, angle_deg=angles), e_x, g)
        return np.concatenate([lo.real - lower, up.real - upper])

    fit = least_squares(residuals, [1.530, lower[0], 3.2, 0.001],
                        x_scale=[1e-3, 1e-3, 0.1, 1e-3], xtol=1e-14, ftol=1e-14)
    return fit


def test_coupled_oscillators_describe_the_tmm_dips(polariton_fit):
    # Source: Zhu et al., PRL 64, 2499 (1990): a Lorentz oscillator in a cavity gives
    # two normal modes; the coupled-oscillator branches should follow the tmm dips to
    # a small fraction of the splitting (common practice, no published tolerance)
    e_x, e_c0, n_eff, g = polariton_fit.x
    rms = np.sqrt(np.mean(polariton_fit.fun**2))
    assert rms < 0.02 * 2 * g  # measured ~ 5 ueV against 2g ~ 1.9 meV
    # the exciton sits at the oscillator's resonance up to a small radiative shift
    assert e_x == pytest.approx(CAVITY.qw_energy_ev, abs=2e-4)
    # the field enters the mirrors: n_eff lies between the spacer index and the
    # high index of the DBR
    assert N_LOW < n_eff < N_HIGH


def test_fitted_splitting_equals_dip_splitting_at_resonance(polariton_fit):
    # Source: at zero detuning the branch splitting is 2g (Hopfield 1958); the tmm dips
    # at the fitted resonance angle are compared with it.  Tolerance 2 % (stated: dip
    # positions of a lossy reflectance differ from the branch energies at the level of
    # (linewidth / splitting)^2 ~ 5 %, measured agreement ~ 0.5 %).
    e_x, e_c0, n_eff, g = polariton_fit.x
    theta_res = np.rad2deg(np.arcsin(n_eff * np.sqrt(1.0 - (e_c0 / e_x) ** 2)))
    assert 5.0 < theta_res < 20.0
    dips = reflectance_dips(CAVITY, theta_res, lo=e_x - 0.004, hi=e_x + 0.004, step=1e-4)
    assert dips.size == 2
    assert 2 * g == pytest.approx(dips[1] - dips[0], rel=0.02)


def test_reflectance_map_helper_shape_and_bare_cavity():
    # Source: tmm directly; a bare (exciton-free) lambda cavity has its dip at the
    # Bragg energy at normal incidence (the spacer is one wavelength thick there)
    energies = np.linspace(1.5255, 1.5265, 21)
    bare = reflectance_map([0.0, 10.0], energies, CAVITY, qw_strength_ev2=0.0)
    assert bare.shape == (2, energies.size)
    assert energies[np.argmin(bare[0])] == pytest.approx(1.526, abs=1e-4)
    assert np.all((bare >= 0) & (bare <= 1))


def test_reflectance_map_model_reproduces_tmm(polariton_fit):
    # Source: tmm reflectance map of the same cavity.  polkit's whole-map model
    # R = s(theta) |1 - i kappa G_CC|^2 + b(theta), with s and b projected out per angle,
    # is fitted (scipy.optimize.minimize, Nelder-Mead) over its seven physics
    # parameters.  Tolerances (stated, common practice): residual rms below 1 % of the
    # off-resonance reflectance (measured ~0.3 %); the map fit and the dip fit agree on
    # E_C0 and E_X to 0.1 meV, on n_eff to 1 % and on 2g to 5 % (measured ~3 %: the map
    # fit weighs the line shapes, the dip fit only the minima).
    angles = np.arange(0.0, 22.0, 3.5)
    energies = np.linspace(1.521, 1.539, 120)
    measured = reflectance_map(angles, energies, CAVITY)
    prepared = prepare_map(measured, 1.0)
    e_x, e_c0, n_eff, g = polariton_fit.x
    names = ["e_c0", "n_eff", "e_x", "g", "gamma_c", "gamma_x", "kappa"]
    start = np.array([e_c0, n_eff, e_x, g, 4e-4, 5e-4, 2e-4])
    scale = np.array([1e-3, 0.1, 1e-3, 1e-4, 1e-4, 1e-4, 1e-4])

    def chi2(z):
        p = dict(zip(names, start + z * scale, strict=True))
        if min(p["gamma_c"], p["gamma_x"], p["kappa"], p["g"]) < 0:
            return np.inf
        return float(project_linear(prepared, None, reflectance_basis(angles, energies, **p)))

    res = minimize(chi2, np.zeros(len(names)), method="Nelder-Mead",
                   options=dict(xatol=1e-6, fatol=1e-14, maxfev=20000))
    best = dict(zip(names, start + res.x * scale, strict=True))
    assert np.sqrt(res.fun / measured.size) < 0.01
    assert best["e_c0"] == pytest.approx(e_c0, abs=1e-4)
    assert best["e_x"] == pytest.approx(e_x, abs=1e-4)
    assert best["n_eff"] == pytest.approx(n_eff, rel=0.01)
    assert best["g"] == pytest.approx(g, rel=0.05)
    assert 0 < best["kappa"] < best["gamma_c"]  # a passive cavity

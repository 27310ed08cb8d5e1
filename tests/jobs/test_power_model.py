"""Fitting knowledge of the power-series job: model mapping, derived quantities, calibration.

Every series here is invented (simulated with a known truth); no measured data.
"""

from __future__ import annotations

import math

import numpy as np
import pytest
from scipy import constants
from scipy.integrate import solve_ivp

from polkit.config.calibration import load_calibration
from polkit.data import make_series
from polkit.errors import DataWarning
from polkit.inference import Prior
from polkit.jobs.power.calibrated import calibrated_quantities, ciuti_estimate
from polkit.jobs.power.channels import sweep_segments
from polkit.jobs.power.problem import PowerProblem, linewidth_prior

HBAR_MEV_PS = constants.hbar / constants.e * 1e15  # Source: CODATA via scipy.constants


def coherent_series(delta=0.5, gamma=0.2, f1=0.01, s=1000.0, n=25, p_max=40.0):
    """Noiseless up-then-down sweep; blueshift from numpy's cubic roots (branch by history)."""
    p_up = np.linspace(0.5, p_max, n)
    powers = np.concatenate([p_up, p_up[::-1]])
    labels = ["up"] * n + ["down"] * n
    y = np.array([_branch_root(delta, gamma, f1 * p, lab)
                  for p, lab in zip(powers, labels, strict=True)])
    return make_series(powers, s * y, units="counts", sweep=labels,
                       intensity_error=np.full(2 * n, 5.0))


def _branch_root(delta, gamma, drive, label):
    # Source: Baas et al., Phys. Rev. A 69, 023809 (2004): y^3 - 2 D y^2 + (D^2 + g^2/4) y - F = 0;
    # a full up sweep stays on the lowest real root, a down sweep (after the loop) on the highest.
    r = np.roots([1.0, -2.0 * delta, delta**2 + gamma**2 / 4.0, -drive])
    real = np.sort(r[np.abs(r.imag) < 1e-9].real)
    return real[0] if label == "up" else real[-1]


def _problem(series, model):
    problem = PowerProblem.from_series(series, model)
    problem.default_space()
    return problem


def test_coherent_model_follows_the_lowest_and_highest_roots_of_the_cubic():
    delta, gamma, f1, s = 0.5, 0.2, 0.01, 1000.0
    series = coherent_series(delta, gamma, f1, s)
    problem = _problem(series, "coherent")
    assert [seg[2] for seg in sweep_segments(series)] == ["up", "down"]
    # sampled coordinates: d = Delta/gamma, phi = alpha kappa / gamma^3, s gamma, noise scale
    theta = np.array([[delta / gamma, f1 / gamma**3, s * gamma, 1.0]])
    got = problem.mean_model(theta)["intensity"][0]
    np.testing.assert_allclose(got, series["intensity"].values, rtol=1e-9, atol=1e-9)


def test_coherent_intensity_depends_only_on_energy_ratios():
    # Source: rescaling of the steady state of Baas et al., PRA 69, 023809 (2004):
    # y -> lambda y, Delta -> lambda Delta, gamma -> lambda gamma, F -> lambda^3 F, s -> s/lambda
    # leaves s y unchanged, so intensities cannot fix gamma (it is not sampled).
    a = coherent_series(0.5, 0.2, 0.01, 1000.0)
    lam = 3.7
    b = coherent_series(0.5 * lam, 0.2 * lam, 0.01 * lam**3, 1000.0 / lam)
    np.testing.assert_allclose(a["intensity"].values, b["intensity"].values, rtol=1e-8)


def test_turning_powers_and_bistable_probability_from_the_closed_form():
    series = coherent_series()
    problem = _problem(series, "coherent")
    d = np.array([3.0, 1.0, 0.5, 0.8])
    phi = np.array([0.2, 0.5, 1.0, 0.3])
    theta = np.column_stack([d, phi, np.full(4, 100.0), np.ones(4)])
    gamma = np.full(4, 0.2)
    out = problem.derived(theta, linewidth=gamma)
    # Source: Baas et al., PRA 69, 023809 (2004): turning points of y[(D - y)^2 + 1/4] (gamma = 1)
    # at y = (2D -/+ sqrt(D^2 - 3/4))/3; F at those points over the drive per mW.
    for i in range(2):
        y_lo = (2 * d[i] - math.sqrt(d[i] ** 2 - 0.75)) / 3
        y_hi = (2 * d[i] + math.sqrt(d[i] ** 2 - 0.75)) / 3
        f_up = y_lo * ((d[i] - y_lo) ** 2 + 0.25)
        f_down = y_hi * ((d[i] - y_hi) ** 2 + 0.25)
        assert out["power_up_threshold"][0][i] == pytest.approx(f_up / phi[i], rel=1e-12)
        assert out["power_down_threshold"][0][i] == pytest.approx(f_down / phi[i], rel=1e-12)
    # below sqrt(3)/2 = 0.866 no turning points exist (Baas et al. 2004)
    assert np.all(np.isnan(out["power_up_threshold"][0][2:]))
    assert float(out["bistable_probability"][0]) == pytest.approx(0.5)
    assert out["pump_detuning"][0] == pytest.approx(d * 0.2)
    # low-power slope dy/dP = alpha kappa / (Delta^2 + gamma^2/4) (linear limit of the cubic)
    f1 = phi * 0.2**3
    np.testing.assert_allclose(out["blueshift_per_power"][0], f1 / ((d * 0.2) ** 2 + 0.01))


def test_up_sweep_jumps_between_the_powers_that_bracket_the_turning_point():
    delta, gamma, f1 = 0.6, 0.2, 0.01
    series = coherent_series(delta, gamma, f1, n=200)
    problem = _problem(series, "coherent")
    theta = np.array([[delta / gamma, f1 / gamma**3, 1.0, 1.0]])
    p_up = problem.derived(theta, linewidth=np.array([gamma]))["power_up_threshold"][0][0]
    y = series["intensity"].values[:200]
    p = series["power"].values[:200]
    jump = int(np.argmax(np.diff(y)))  # simulated independently with numpy.roots
    assert p[jump] <= p_up <= p[jump + 1]


def _rates(p_rate, g_r, g_c, r, t_end):
    # Source: Wouters and Carusotto, PRL 99, 140402 (2007), with the spontaneous term
    # R n_R (n_C + 1); integrated here independently with scipy.integrate.solve_ivp.
    def rhs(t, n):
        scatter = r * n[0] * (n[1] + 1.0)
        return [p_rate - g_r * n[0] - scatter, scatter - g_c * n[1]]

    sol = solve_ivp(rhs, (0.0, t_end), [0.0, 0.0], method="LSODA", rtol=1e-10, atol=1e-12)
    return sol.y[0, -1], sol.y[1, -1]


def test_reservoir_model_equals_long_time_solution_of_the_rate_equations():
    g_r, g_c, r = 0.05, 0.5, 5e-4  # 1/ps: n_s = 100, P_th = 50 / ps
    p_th_rate, n_s = g_r * g_c / r, g_r / r
    p_th_mw = 8.0  # invented: this threshold is 8 mW
    power = np.array([0.8, 4.0, 7.0, 8.0, 9.0, 16.0, 40.0])
    series = make_series(power, np.ones(power.size), units="counts",
                         peak_energy=np.full(power.size, 1.54),
                         linewidth=np.full(power.size, 0.3))
    problem = _problem(series, "reservoir")
    names = problem.space.names
    values = {"threshold_power": p_th_mw, "saturation_number": n_s, "intensity_per_occupation": 2.0,
              "lp_energy": 1.54, "condensate_blueshift_rate": 0.05, "reservoir_blueshift": 0.3,
              "linewidth_low": 0.3, "linewidth_high": 0.0, "narrowing_occupation": 1.0}
    theta = np.array([[values.get(n, 1.0) for n in names]])
    model = problem.mean_model(theta)
    b_c = 0.05 * p_th_mw / n_s  # meV per polariton: rate x P_th / n_s
    for i, p in enumerate(power):
        n_r, n_c = _rates(p / p_th_mw * p_th_rate, g_r, g_c, r, t_end=4000.0)
        assert model["intensity"][0, i] == pytest.approx(2.0 * n_c, rel=1e-6)
        n_r_th = g_c / r  # clamped reservoir (Wouters and Carusotto 2007)
        shift = b_c * n_c + 0.3 * n_r / n_r_th
        assert model["peak_energy"][0, i] == pytest.approx(1.54 + shift * 1e-3, abs=1e-12)
        # with linewidth_high = 0 and n_w = 1 the width is the mean-field net damping
        # gamma_C - R n_R of the mode equation (in units of the low-power width)
        assert model["linewidth"][0, i] == pytest.approx(0.3 * (g_c - r * n_r) / g_c, rel=1e-6)


def test_log_space_intensity_leaves_out_non_positive_points_with_a_warning():
    power = np.geomspace(1.0, 50.0, 8)
    intensity = np.linspace(1.0, 100.0, 8)
    intensity[2] = 0.0
    series = make_series(power, intensity, units="counts")
    with pytest.warns(DataWarning, match="log-space"):
        problem = PowerProblem.from_series(series, "reservoir")
    assert problem.channels["intensity"].n_used == 7


@pytest.mark.parametrize("model", ["coherent", "reservoir"])
def test_automatic_start_lands_near_a_known_truth(model):
    # simulated series with known parameters (noiseless), common practice check
    if model == "coherent":
        series = coherent_series(0.5, 0.2, 0.01, 1000.0)
        truth = {"detuning_ratio": 2.5, "reduced_drive_per_power": 1.25, "intensity_scale": 200.0}
    else:
        power = np.geomspace(0.5, 60.0, 25)
        x = power / 10.0
        b = 300.0 * (x - 1.0) - 1.0
        n_c = (b + np.sqrt(b * b + 4 * x * 300.0)) / 2  # Source: Wouters & Carusotto 2007 + n+1
        series = make_series(power, 7.0 * n_c, units="counts", intensity_error=0.05 * 7.0 * n_c)
        truth = {"threshold_power": 10.0, "saturation_number": 300.0,
                 "intensity_per_occupation": 7.0}
    problem = _problem(series, model)
    guess = problem.guess()
    for name, value in truth.items():
        assert guess[name] == pytest.approx(value, rel=0.15), name
        lo, hi = problem.space[name].prior.bounds
        assert lo < value < hi


# --------------------------------------------------------------------------------------
# calibration and interaction constants
# --------------------------------------------------------------------------------------
def _cw(area=20.0, eta=0.4, e_ph=1.54, lifetime=None):
    table = {"drive": "cw", "spot_area": {"value": area, "units": "um2"},
             "photon_energy": {"value": e_ph, "units": "eV"},
             "coupling_efficiency": {"value": eta, "units": "1"}}
    if lifetime is not None:
        table["polariton_lifetime"] = {"value": lifetime, "units": "ps"}
    return load_calibration(table)


def _coherent_constants(cal, f1=0.02, gamma=0.25, **kw):
    series = coherent_series()
    problem = _problem(series, "coherent")
    theta = np.array([[2.0, f1 / gamma**3, 300.0, 1.0]] * 3)
    base = problem.derived(theta, linewidth=np.full(3, gamma))
    out, notes = calibrated_quantities(problem, theta, base, calibration=cal,
                                       rng=np.random.default_rng(0), **kw)
    return out, notes


def test_coherent_interaction_constant_closed_form_and_metamorphic_relations():
    area, eta, e_ph, f1, gamma = 20.0, 0.4, 1.54, 0.02, 0.25
    out, _ = _coherent_constants(_cw(area, eta, e_ph), f1, gamma)
    g = out["interaction_constant"][0]
    # Source: resonant steady state y = 4F/gamma^2 (Baas et al. 2004 at Delta = y) equated to
    # g rho with rho = eta P tau / (E_ph A), tau = hbar / gamma; photon energy in J and hbar
    # from CODATA via scipy.constants.
    photons_per_ps = 1e-3 / (e_ph * constants.e) * 1e-12
    rho1 = eta * photons_per_ps * (HBAR_MEV_PS / gamma) / area
    expected = 4.0 * f1 / (gamma**2 * rho1) * 1e3  # meV um^2 -> ueV um^2
    np.testing.assert_allclose(g, expected, rtol=1e-12)
    assert out["interaction_constant"][1] == "ueV um^2"
    # metamorphic: doubling the spot area doubles g; doubling the coupling halves it;
    # doubling the drive per power (blueshift per power) doubles it
    np.testing.assert_allclose(_coherent_constants(_cw(2 * area, eta, e_ph), f1, gamma)[0][
        "interaction_constant"][0], 2 * g, rtol=1e-12)
    np.testing.assert_allclose(_coherent_constants(_cw(area, 2 * eta, e_ph), f1, gamma)[0][
        "interaction_constant"][0], g / 2, rtol=1e-12)
    np.testing.assert_allclose(_coherent_constants(_cw(area, eta, e_ph), 2 * f1, gamma)[0][
        "interaction_constant"][0], 2 * g, rtol=1e-12)


def test_exciton_constant_from_hopfield_fraction_and_ciuti_estimate():
    x2 = 0.34
    out, notes = _coherent_constants(_cw(), exciton_fraction=np.full(50, x2), n_wells=4,
                                     exciton_binding_meV=10.0, bohr_radius_nm=10.0)
    g = out["interaction_constant"][0]
    # Source: g_LP = g_X |X|^4 / N_QW (Ciuti et al., Phys. Rev. B 58, 7926 (1998)), inverted per
    # draw
    np.testing.assert_allclose(out["exciton_interaction_constant"][0], g * 4 / x2**2, rtol=1e-12)
    # Source: Ciuti et al., PRB 58, 7926 (1998): 6 E_b a_B^2 = 6 x 10 meV x (0.01 um)^2
    # = 6e-3 meV um^2 = 6 ueV um^2
    assert ciuti_estimate(10.0, 10.0) == pytest.approx(6.0, rel=1e-12)
    np.testing.assert_allclose(out["exciton_interaction_ratio"][0],
                               out["exciton_interaction_constant"][0] / 6.0, rtol=1e-12)
    assert not any("n_wells" in n for n in notes)


def test_without_calibration_only_identifiable_products_and_a_note():
    out, notes = _coherent_constants(None)
    assert out == {}
    assert any("need a calibration file" in n for n in notes)


def _reservoir_constants(cal, **kw):
    power = np.geomspace(1.0, 50.0, 10)
    series = make_series(power, power, units="counts", peak_energy=np.linspace(1.54, 1.541, 10))
    problem = _problem(series, "reservoir")
    vals = {"threshold_power": 10.0, "saturation_number": 200.0, "intensity_per_occupation": 1.0,
            "lp_energy": 1.54, "condensate_blueshift_rate": 0.02, "reservoir_blueshift": 0.4}
    theta = np.array([[vals.get(n, 1.0) for n in problem.space.names]] * 2)
    base = problem.derived(theta)
    return calibrated_quantities(problem, theta, base, calibration=cal,
                                 rng=np.random.default_rng(0), **kw)


def test_reservoir_interaction_constants_closed_form_and_scaling():
    area, eta, e_ph, tau_c, tau_r = 30.0, 0.2, 1.65, 5.0, 200.0
    out, notes = _reservoir_constants(_cw(area, eta, e_ph, lifetime=tau_c),
                                      reservoir_lifetime=(tau_r, 0.0))
    photons_per_ps = 1e-3 / (e_ph * constants.e) * 1e-12  # per mW, CODATA via scipy.constants
    # Source: Wouters and Carusotto, PRL 99, 140402 (2007): far above threshold
    # n_C = (P - P_th)/gamma_C, so the condensate density grows by eta tau_C / (E_ph A) per mW
    drho = eta * photons_per_ps * tau_c / area
    np.testing.assert_allclose(out["interaction_constant"][0], 0.02 / drho * 1e3, rtol=1e-12)
    # below threshold n_R = P / gamma_R: the reservoir density at threshold
    rho_r = eta * photons_per_ps * 10.0 * tau_r / area
    np.testing.assert_allclose(out["reservoir_interaction_constant"][0], 0.4 / rho_r * 1e3,
                               rtol=1e-12)
    out2, _ = _reservoir_constants(_cw(2 * area, eta, e_ph, lifetime=tau_c),
                                   reservoir_lifetime=(tau_r, 0.0))
    for name in ("interaction_constant", "reservoir_interaction_constant"):
        np.testing.assert_allclose(out2[name][0], 2 * out[name][0], rtol=1e-12)


def test_cw_reservoir_without_reservoir_lifetime_says_what_is_missing():
    out, notes = _reservoir_constants(_cw(lifetime=5.0))
    assert "interaction_constant" in out
    assert "reservoir_interaction_constant" not in out
    assert any("reservoir lifetime" in n for n in notes)


def test_linewidth_prior_sources():
    cal = _cw(lifetime=2.2)
    prior, note = linewidth_prior(calibration=cal)
    # Source: gamma = hbar / tau, hbar from CODATA via scipy.constants: 0.29918 meV at 2.2 ps
    assert prior.mu == pytest.approx(HBAR_MEV_PS / 2.2, rel=1e-12)
    assert "lifetime" in note
    draws = np.random.default_rng(1).normal(0.31, 0.02, 4000)
    prior, note = linewidth_prior(dispersion_linewidth=draws, calibration=cal)
    assert prior.mu == pytest.approx(0.31, abs=0.002)
    assert prior.sigma == pytest.approx(0.02, rel=0.05)
    assert "dispersion" in note
    prior, note = linewidth_prior()
    assert prior == Prior.loguniform(1e-3, 100.0)
    assert "only Delta/gamma" in note

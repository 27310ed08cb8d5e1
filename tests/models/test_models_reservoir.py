"""Reservoir rate equations under nonresonant drive: closed-form steady state against limits,
high-precision arithmetic and a stiff time integration."""

from __future__ import annotations

from decimal import Decimal, localcontext

import numpy as np
import pytest

from polkit.constants import HBAR_MEV_PS
from polkit.errors import DataError
from polkit.models.reservoir import (
    blueshift,
    condensate_occupation,
    decay_rate,
    emission_rate,
    integrate,
    reservoir_fraction,
    saturation_number,
    steady_state,
    threshold_power,
)

# Invented but typical rates: 10 ps polariton lifetime, 1 ns reservoir lifetime.
GAMMA_C = 0.1  # 1/ps
GAMMA_R = 1e-3  # 1/ps
R = 1e-6  # 1/ps


def test_threshold_and_saturation_number():
    # Source: Wouters and Carusotto, PRL 99, 140402 (2007): P_th = gamma_R gamma_C / R
    assert threshold_power(GAMMA_R, GAMMA_C, R) == pytest.approx(1e-3 * 0.1 / 1e-6, rel=1e-15)
    assert saturation_number(GAMMA_R, R) == pytest.approx(1e3, rel=1e-15)


def test_below_threshold_reservoir_is_linear_and_mode_nearly_empty():
    p_th = GAMMA_R * GAMMA_C / R
    p = p_th * np.array([1e-6, 1e-3, 0.1, 0.5])
    n_r, n_c = steady_state(p, GAMMA_R, GAMMA_C, R)
    # Source: Wouters and Carusotto, PRL 99, 140402 (2007): below threshold n_R = P / gamma_R;
    # the spontaneous term leaves n_C = x/(1-x) + O(1/n_s) (laser rate-equation limit).
    n_s = GAMMA_R / R
    np.testing.assert_allclose(n_r, p / GAMMA_R, rtol=3 / n_s)
    x = p / p_th
    np.testing.assert_allclose(n_c, x / (1 - x), rtol=5 / n_s)
    assert np.all(n_c < 1.01)


def test_far_above_threshold_reservoir_clamps_and_mode_grows_linearly():
    p_th = GAMMA_R * GAMMA_C / R
    p = p_th * np.array([3.0, 10.0, 1e3, 1e6])
    n_r, n_c = steady_state(p, GAMMA_R, GAMMA_C, R)
    # Source: Wouters and Carusotto, PRL 99, 140402 (2007): above threshold n_R clamps at
    # gamma_C / R and n_C = (P - P_th) / gamma_C (corrections O(1/n_C) from the spontaneous term).
    np.testing.assert_allclose(n_r, GAMMA_C / R, rtol=1e-3)
    np.testing.assert_allclose(n_c, (p - p_th) / GAMMA_C, rtol=1e-3)


def test_threshold_occupation_is_near_sqrt_n_s():
    for n_s in (1e2, 1e4, 1e6):
        n_c = condensate_occupation(1.0, n_s)
        # Source: analytic limit of the quadratic at x = 1: n_C = [-1 + sqrt(1 + 4 n_s)]/2
        assert n_c == pytest.approx((-1 + np.sqrt(1 + 4 * n_s)) / 2, rel=1e-12)
        assert n_c == pytest.approx(np.sqrt(n_s), rel=1.0 / np.sqrt(n_s))


def _reference_occupation(x: float, n_s: float) -> float:
    """The positive root by the textbook quadratic formula in 60-digit decimal arithmetic."""
    with localcontext() as ctx:
        ctx.prec = 60
        xd, nd = Decimal(repr(x)), Decimal(repr(n_s))
        b = nd * (xd - 1) - 1
        return float((b + (b * b + 4 * xd * nd).sqrt()) / 2)


@pytest.mark.parametrize("n_s", [1.0, 1e3, 1e6])
def test_stable_quadratic_over_fifteen_decades(n_s):
    x = np.concatenate([np.geomspace(1e-6, 0.999, 25), np.geomspace(1.001, 1e9 / n_s + 1, 25)])
    got = condensate_occupation(x, n_s)
    # Source: independent evaluation with Python's decimal module at 60 significant digits.
    ref = np.array([_reference_occupation(float(xi), n_s) for xi in x])
    assert got.min() < 2e-6 and got.max() > 9e8
    np.testing.assert_allclose(got, ref, rtol=1e-13)


def test_fitting_parametrisation_matches_rates_form():
    p = np.geomspace(1.0, 1e5, 30)
    n_r, n_c = steady_state(p, GAMMA_R, GAMMA_C, R)
    x = p / threshold_power(GAMMA_R, GAMMA_C, R)
    n_s = saturation_number(GAMMA_R, R)
    np.testing.assert_allclose(n_c, condensate_occupation(x, n_s), rtol=1e-14)
    np.testing.assert_allclose(n_r, (GAMMA_C / R) * reservoir_fraction(x, n_s), rtol=1e-14)
    # Source: the rate equations themselves, d/dt = 0 (residuals relative to the pump rate)
    res_r = p - GAMMA_R * n_r - R * n_r * (n_c + 1)
    res_c = R * n_r * (n_c + 1) - GAMMA_C * n_c
    assert np.all(np.abs(res_r) <= 1e-12 * p)
    assert np.all(np.abs(res_c) <= 1e-12 * p)


@pytest.mark.parametrize("x", [0.2, 0.9, 1.0, 1.1, 3.0, 30.0])
def test_steady_state_equals_long_time_integration(x):
    p = x * threshold_power(GAMMA_R, GAMMA_C, R)
    # Source: scipy.integrate.solve_ivp (LSODA) on the rate equations, to 1e6 ps
    # (1000 reservoir lifetimes, far past the critical slowing down at threshold).
    traj = integrate(p, GAMMA_R, GAMMA_C, R, t_end_ps=1e6, t_eval_ps=[1e6])
    n_r, n_c = steady_state(p, GAMMA_R, GAMMA_C, R)
    assert traj.n_R[-1] == pytest.approx(float(n_r), rel=1e-6)
    assert traj.n_C[-1] == pytest.approx(float(n_c), rel=1e-6)


def test_radau_agrees_and_time_dependent_pump_is_followed():
    p_th = threshold_power(GAMMA_R, GAMMA_C, R)
    traj = integrate(
        lambda t: 2.0 * p_th if t > 1e5 else 0.5 * p_th,
        GAMMA_R, GAMMA_C, R, t_end_ps=1e6, t_eval_ps=[9e4, 1e6], method="Radau",
    )
    # Source: scipy.integrate.solve_ivp (Radau); each plateau relaxes to its own steady state.
    for i, x in enumerate((0.5, 2.0)):
        n_r, n_c = steady_state(x * p_th, GAMMA_R, GAMMA_C, R)
        assert traj.n_C[i] == pytest.approx(float(n_c), rel=1e-5)
        assert traj.n_R[i] == pytest.approx(float(n_r), rel=1e-5)


def test_walker_batch_broadcasts():
    g_r = np.array([[1e-3], [2e-3]])
    p = np.geomspace(1, 1e4, 7)
    n_r, n_c = steady_state(p, g_r, GAMMA_C, R)
    assert n_c.shape == (2, 7)
    np.testing.assert_array_equal(n_c[1], steady_state(p, 2e-3, GAMMA_C, R).n_C)


def test_blueshift_units_hand_worked():
    # 1000 polaritons in 10 um^2 with g_C = 3 ueV um^2: 3 * 1000 / 10 = 300 ueV = 0.3 meV;
    # 2e5 reservoir excitons in 20 um^2 with g_R = 6 ueV um^2: 6 * 2e5 / 20 = 6e4 ueV = 60 meV.
    # Source: hand arithmetic, unit conversion 1 ueV = 1e-3 meV.
    assert blueshift(1000, 0, 3.0, 6.0, 10.0) == pytest.approx(0.3, rel=1e-15)
    assert blueshift(1000, 2e5, 3.0, 6.0, 10.0, 20.0) == pytest.approx(60.3, rel=1e-15)


def test_decay_rate_and_emission():
    # Source: CODATA via scipy.constants: hbar = 0.6582119569 meV ps, so 1 meV <-> 1/0.658 ps
    assert decay_rate(1.0) == pytest.approx(1 / 0.6582119569, rel=1e-9)
    assert HBAR_MEV_PS == pytest.approx(0.6582119569, rel=1e-9)
    assert emission_rate(200.0, 0.1) == pytest.approx(20.0)


def test_bad_inputs_are_refused():
    with pytest.raises(DataError, match="field 'R'.*> 0"):
        steady_state(1.0, 1e-3, 0.1, 0.0)
    with pytest.raises(DataError, match="field 'P'.*>= 0"):
        steady_state(-1.0, 1e-3, 0.1, 1e-6)
    with pytest.raises(DataError, match="field 'x'.*non-finite"):
        condensate_occupation(np.nan, 10.0)
    with pytest.raises(DataError, match="field 'method'"):
        integrate(1.0, 1e-3, 0.1, 1e-6, t_end_ps=10.0, method="RK45")
    with pytest.raises(DataError, match="field 'area_um2'"):
        blueshift(1.0, 1.0, 3.0, 6.0, 0.0)

"""Coherent-drive steady states: roots of the cubic, turning points, sweep history."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import minimize_scalar

from polkit.constants import HBAR_MEV_PS
from polkit.errors import DataError
from polkit.models.coherent import (
    BISTABILITY_RATIO,
    blueshift_roots,
    drive_for_blueshift,
    steady_state_sweep,
    transmitted_intensity,
    turning_points,
)


def _numpy_real_roots(delta, gamma, drive):
    """Real roots of y^3 - 2 D y^2 + (D^2 + g^2/4) y - F from numpy's companion-matrix solver."""
    r = np.roots([1.0, -2.0 * delta, delta**2 + gamma**2 / 4.0, -drive])
    return np.sort(r[np.abs(r.imag) < 1e-9 * max(1.0, abs(delta))].real)


def _cubic_response(y, delta, gamma):
    # Source: Baas et al., Phys. Rev. A 69, 023809 (2004): F = y[(Delta - y)^2 + (gamma/2)^2]
    return y * ((delta - y) ** 2 + gamma**2 / 4.0)


@pytest.mark.parametrize("delta,gamma", [(0.6, 0.2), (3.0, 0.1), (0.2, 0.2), (1.0, 1.1)])
def test_turning_points_closed_form_and_numerical_extrema(delta, gamma):
    tp = turning_points(delta, gamma)
    # Source: Baas et al., Phys. Rev. A 69, 023809 (2004): y = (2 D -/+ sqrt(D^2 - 3 g^2/4))/3
    s = np.sqrt(delta**2 - 0.75 * gamma**2)
    assert tp.blueshift_low == pytest.approx((2 * delta - s) / 3, rel=1e-13)
    assert tp.blueshift_high == pytest.approx((2 * delta + s) / 3, rel=1e-13)
    # Independent check: the local maximum and minimum of F(y) found by scipy's bounded search.
    mid = 2 * delta / 3  # inflection point of the cubic, between the two extrema
    peak = minimize_scalar(
        lambda y: -_cubic_response(y, delta, gamma), bounds=(0, mid), method="bounded",
        options={"xatol": 1e-12},
    )
    dip = minimize_scalar(
        lambda y: _cubic_response(y, delta, gamma), bounds=(mid, delta), method="bounded",
        options={"xatol": 1e-12},
    )
    assert tp.blueshift_low == pytest.approx(peak.x, abs=1e-6 * delta)
    assert tp.blueshift_high == pytest.approx(dip.x, abs=1e-6 * delta)
    assert tp.drive_up == pytest.approx(-peak.fun, rel=1e-10)
    assert tp.drive_down == pytest.approx(dip.fun, rel=1e-10)
    assert tp.drive_up > tp.drive_down > 0


@pytest.mark.parametrize("delta,gamma", [(0.6, 0.2), (3.0, 0.1), (1.0, 1.1)])
def test_root_count_changes_exactly_at_turning_drives(delta, gamma):
    tp = turning_points(delta, gamma)
    eps = 1e-6
    drives = np.array(
        [
            tp.drive_down * (1 - eps),
            tp.drive_down * (1 + eps),
            tp.drive_up * (1 - eps),
            tp.drive_up * (1 + eps),
        ]
    )
    # Source: numpy's companion-matrix root finder (independent of the closed forms).
    expected = [1, 3, 3, 1]
    assert [len(_numpy_real_roots(delta, gamma, f)) for f in drives] == expected
    roots = blueshift_roots(delta, gamma, drives)
    assert list(np.isfinite(roots).sum(axis=-1)) == expected


@pytest.mark.parametrize("ratio", [BISTABILITY_RATIO * (1 + 1e-6), 1.5, 1e3])
def test_roots_near_turning_drives_solve_the_cubic(ratio):
    gamma = 0.1
    delta = ratio * gamma
    tp = turning_points(delta, gamma)
    eps = np.geomspace(1e-14, 1e-9, 6)
    drives = np.concatenate([tp.drive_up * (1 - eps), tp.drive_up * (1 + eps),
                             tp.drive_down * (1 - eps), tp.drive_down * (1 + eps)])
    roots = blueshift_roots(delta, gamma, drives)
    assert list(np.isfinite(roots).sum(axis=-1)) == [3] * 6 + [1] * 6 + [1] * 6 + [3] * 6
    # Source: the cubic itself, y[(Delta - y)^2 + gamma^2/4] = F (Baas et al. 2004): relative
    # residual at rounding level even where two roots nearly coincide.
    for y, f in zip(roots, drives, strict=True):
        y = y[np.isfinite(y)]
        resid = np.abs(_cubic_response(y, delta, gamma) - f)
        assert np.all(resid <= 1e-14 * np.maximum(f, y * delta**2))


def test_bistability_appears_exactly_above_sqrt3_over_2():
    gamma = 0.5
    # Source: Baas et al., Phys. Rev. A 69, 023809 (2004): bistable iff Delta > (sqrt 3/2) gamma
    assert BISTABILITY_RATIO == pytest.approx(np.sqrt(3) / 2, rel=1e-15)
    below = turning_points(BISTABILITY_RATIO * gamma * (1 - 1e-9), gamma)
    above = turning_points(BISTABILITY_RATIO * gamma * (1 + 1e-9), gamma)
    assert all(np.isnan(v) for v in below)
    assert all(np.isfinite(v) for v in above)
    # Independent check: F(y) is monotonic on a fine grid below the threshold, not above.
    for ratio, monotonic in [(0.85, True), (0.86, True), (0.875, False), (0.9, False)]:
        delta = ratio * gamma
        y = np.linspace(0, 2 * delta, 200_001)
        rising = np.all(np.diff(_cubic_response(y, delta, gamma)) > 0)
        assert rising == monotonic
        assert np.isfinite(turning_points(delta, gamma).drive_up) == (not monotonic)


def test_roots_match_numpy_companion_solver_on_random_parameters():
    rng = np.random.default_rng(20240611)
    n = 1500
    delta = rng.uniform(-3.0, 3.0, n)
    gamma = rng.uniform(0.02, 2.0, n)
    tp = turning_points(delta, gamma)
    scale = np.where(np.isfinite(tp.drive_up), tp.drive_up, (np.abs(delta) + gamma) ** 3)
    drive = rng.uniform(0.0, 2.0, n) * scale
    roots = blueshift_roots(delta, gamma, drive)
    assert roots.shape == (n, 3)
    for i in range(n):
        # Source: numpy's companion-matrix root finder (np.roots).
        ref = _numpy_real_roots(delta[i], gamma[i], drive[i])
        got = roots[i][np.isfinite(roots[i])]
        assert len(got) == len(ref)
        np.testing.assert_allclose(got, ref, rtol=0, atol=1e-9 * (abs(delta[i]) + gamma[i]))


@pytest.mark.parametrize("delta,gamma", [(0.6, 0.2), (-2.0, 0.3), (0.1, 1.0)])
def test_vanishing_drive_gives_linear_response(delta, gamma):
    drive = np.array([0.0, 1e-30, 1e-20, 1e-14])
    y = blueshift_roots(delta, gamma, drive)[:, 0]
    # Source: analytic limit, Taylor expansion of the cubic: y -> F / (Delta^2 + gamma^2/4)
    np.testing.assert_allclose(y, drive / (delta**2 + gamma**2 / 4), rtol=1e-12, atol=0)
    assert np.all(np.isnan(blueshift_roots(delta, gamma, drive)[:, 1:]))


def test_strong_drive_limit():
    delta, gamma = 0.6, 0.2
    drive = np.array([1e6, 1e9, 1e12])
    y = blueshift_roots(delta, gamma, drive)[:, 0]
    # Source: analytic limit: y = F^(1/3) + 2 Delta/3 + O(F^(-1/3)) (depressed-cubic expansion)
    lead = np.cbrt(drive) + 2 * delta / 3
    p = gamma**2 / 4 - delta**2 / 3
    assert np.all(np.abs(y - lead) <= np.abs(p) / np.cbrt(drive))


def test_walker_batch_broadcasts_against_drive_axis():
    delta = np.array([[0.6], [0.3], [1.0]])
    gamma = np.array([[0.2], [0.4], [0.1]])
    drive = np.linspace(0, 0.05, 40)
    batch = steady_state_sweep(delta, gamma, drive, "up")
    assert batch.shape == (3, 40)
    for w in range(3):
        one = steady_state_sweep(delta[w, 0], gamma[w, 0], drive, "up")
        np.testing.assert_array_equal(batch[w], one)
    assert blueshift_roots(delta, gamma, drive).shape == (3, 40, 3)


def test_monotonic_sweeps_select_lowest_and_highest_roots():
    delta, gamma = 0.6, 0.2
    drive = np.linspace(0, 0.06, 301)
    roots = blueshift_roots(delta, gamma, drive)
    up = steady_state_sweep(delta, gamma, drive, "up")
    down = steady_state_sweep(delta, gamma, drive[::-1], "down")[::-1]
    # Source: Baas et al., Phys. Rev. A 69, 023809 (2004): an up sweep stays on the lowest root
    # until it vanishes, a down sweep on the highest.
    np.testing.assert_array_equal(up, roots[:, 0])
    np.testing.assert_array_equal(down, np.nanmax(roots, axis=-1))
    tp = turning_points(delta, gamma)
    inside = (drive > tp.drive_down) & (drive < tp.drive_up)
    assert inside.sum() > 10
    assert np.all(down[inside] > tp.blueshift_high)
    assert np.all(up[inside] < tp.blueshift_low)


def test_arbitrary_history_follows_the_branch_it_is_on():
    delta, gamma = 0.6, 0.2
    tp = turning_points(delta, gamma)
    inside = 0.5 * (tp.drive_up + tp.drive_down)
    # up into the bistable window, above the upper turning drive, back into the window,
    # below the lower turning drive, back into the window.
    history = np.array([0.0, inside, 1.2 * tp.drive_up, inside, 0.5 * tp.drive_down, inside])
    y = steady_state_sweep(delta, gamma, history, "up", check_order=False)
    roots = blueshift_roots(delta, gamma, inside)
    # common practice, no published source: the same drive reads the lower, upper, lower root
    assert y[1] == pytest.approx(roots[0], rel=1e-14)
    assert y[3] == pytest.approx(roots[2], rel=1e-14)
    assert y[5] == pytest.approx(roots[0], rel=1e-14)


def test_sweep_history_matches_time_integration_of_driven_gp_equation():
    delta, gamma = 0.6, 0.2  # meV; Delta/gamma = 3 > sqrt(3)/2: bistable
    tp = turning_points(delta, gamma)
    f_max = 1.5 * tp.drive_up
    ramp = 20_000.0  # ps, about 6000 polariton lifetimes hbar/gamma: slow against relaxation

    def drive_at(t):
        return f_max * (t / ramp if t < ramp else max(0.0, 2.0 - t / ramp))

    # Source: driven-dissipative Gross-Pitaevskii equation in the pump frame (Baas et al. 2004),
    # i hbar du/dt = (-Delta - i gamma/2 + |u|^2) u + sqrt(F(t)), with u = sqrt(alpha) psi,
    # integrated independently by scipy.integrate.solve_ivp.
    def rhs(t, z):
        u = z[0] + 1j * z[1]
        du = -1j / HBAR_MEV_PS * ((-delta - 0.5j * gamma + abs(u) ** 2) * u + np.sqrt(drive_at(t)))
        return [du.real, du.imag]

    t = np.linspace(0.0, 2 * ramp, 801)
    sol = solve_ivp(rhs, (0.0, 2 * ramp), [0.0, 0.0], t_eval=t, rtol=1e-8, atol=1e-10,
                    max_step=ramp / 200)
    assert sol.success
    y_gp = sol.y[0] ** 2 + sol.y[1] ** 2
    drive = np.array([drive_at(ti) for ti in t])
    rising = t <= ramp
    y_model = np.concatenate(
        [
            steady_state_sweep(delta, gamma, drive[rising], "up"),
            steady_state_sweep(delta, gamma, drive[~rising], "down"),
        ]
    )
    # Away from the turning drives (where the slow ramp lags by critical slowing down) the
    # integration follows the selected root to within the adiabatic lag, ~2e-4 meV here.
    away = (np.abs(drive / tp.drive_up - 1) > 0.05) & (np.abs(drive / tp.drive_down - 1) > 0.05)
    assert np.max(np.abs(y_gp[away] - y_model[away])) < 1e-3  # meV, 0.5 % of gamma
    # Both branches are visited inside the bistable window: the loop is open.
    window = (drive > 1.05 * tp.drive_down) & (drive < 0.95 * tp.drive_up)
    assert np.all(y_gp[window & rising] < tp.blueshift_low)
    assert np.all(y_gp[window & ~rising] > tp.blueshift_high)
    # The jumps happen just past the turning drives, never before them.
    mid = 0.5 * (tp.blueshift_low + tp.blueshift_high)
    f_jump_up = drive[np.argmax(rising & (y_gp > mid))]
    f_jump_down = drive[np.argmax(~rising & (y_gp < mid))]
    assert 1.0 <= f_jump_up / tp.drive_up < 1.02
    assert 0.94 < f_jump_down / tp.drive_down <= 1.0


def test_transmitted_intensity_linear_regime_is_lorentzian():
    delta = np.linspace(-1.0, 1.0, 21)[:, None]
    gamma, alpha, kappa = 0.2, 1e-4, 3.0  # meV, meV per polariton, meV^2 per mW
    power = np.array([1e-6, 2e-6])  # mW
    n = transmitted_intensity(delta, gamma, alpha * kappa * power, alpha, "up")
    # Source: analytic limit (weak drive): n = kappa P / (Delta^2 + gamma^2/4), a Lorentzian
    expected = kappa * power / (delta**2 + gamma**2 / 4)
    np.testing.assert_allclose(n, expected, rtol=1e-6)


def test_drive_for_blueshift_inverts_roots():
    roots = blueshift_roots(0.6, 0.2, 0.02)
    # Source: Baas et al. (2004): every root satisfies F(y) = F
    np.testing.assert_allclose(drive_for_blueshift(roots, 0.6, 0.2), 0.02, rtol=1e-12)


def test_bad_inputs_are_refused_with_named_fields():
    with pytest.raises(DataError, match="field 'gamma'.*> 0"):
        blueshift_roots(0.5, -0.1, 1.0)
    with pytest.raises(DataError, match="field 'drive'.*>= 0"):
        blueshift_roots(0.5, 0.1, -1.0)
    with pytest.raises(DataError, match="field 'delta'.*non-finite"):
        turning_points(np.nan, 0.1)
    with pytest.raises(DataError, match="field 'direction'"):
        steady_state_sweep(0.5, 0.1, [0.0, 1.0], "sideways")
    with pytest.raises(DataError, match="reverse the axis"):
        steady_state_sweep(0.5, 0.1, [0.0, 1.0], "down")
    with pytest.raises(DataError, match="shape"):
        blueshift_roots(np.ones(3), 0.1, np.ones(4))
    with pytest.raises(DataError, match="field 'alpha'"):
        transmitted_intensity(0.5, 0.1, [0.0, 1.0], 0.0)

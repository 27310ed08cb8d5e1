"""Energy per nonlinear operation, device accounting and log-normal propagation."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import constants

from polkit.errors import DataError
from polkit.models.device_energy import (
    ELECTRONIC_REFERENCE,
    Overheads,
    array_energy_per_activation,
    carnot_work_per_heat,
    energy_per_operation,
    energy_per_operation_fJ,
    lognormal_product,
    operation_rate,
    power_per_node,
    required_density,
)

# One invented draw: phase 1 rad, gamma 0.1 meV, A 3 um^2, E_LP 1.55 eV, g_LP 3 ueV um^2, eta 0.5
DRAW = dict(phase=1.0, gamma_meV=0.1, area_um2=3.0, e_lp_eV=1.55, g_lp_ueV_um2=3.0, eta_in=0.5)


def test_worked_example_by_hand():
    # n = phi gamma / g = 1 x 100 ueV / 3 ueV um^2 = 33.333 /um^2
    # N = n A = 33.333 x 3 = 100 polaritons
    # E = N E_LP / eta = 100 x 1.55 eV / 0.5 = 310 eV
    #   = 310 x 1.602176634e-19 J = 4.966747565e-17 J = 0.04966747565 fJ
    # Source: hand arithmetic above; e from CODATA via scipy.constants (exact)
    assert constants.e == 1.602176634e-19
    assert required_density(1.0, 0.1, 3.0) == pytest.approx(100 / 3, rel=1e-14)
    assert energy_per_operation(**DRAW) == pytest.approx(4.966747565e-17, rel=1e-9)
    assert energy_per_operation_fJ(**DRAW) == pytest.approx(0.04966747565, rel=1e-9)


def test_metamorphic_relations():
    base = energy_per_operation(**DRAW)
    # Source: the formula's scaling, E_op proportional to phi A / g_LP (common practice, no
    # published source)
    assert energy_per_operation(**{**DRAW, "area_um2": 6.0}) == pytest.approx(2 * base, rel=1e-14)
    assert energy_per_operation(**{**DRAW, "g_lp_ueV_um2": 6.0}) == pytest.approx(
        base / 2, rel=1e-14
    )
    assert energy_per_operation(**{**DRAW, "phase": np.pi}) == pytest.approx(
        np.pi * base, rel=1e-14
    )
    assert energy_per_operation(**{**DRAW, "eta_in": 1.0}) == pytest.approx(base / 2, rel=1e-14)


def test_vectorised_over_posterior_draws():
    gamma = np.array([0.05, 0.1, 0.2])
    out = energy_per_operation(1.0, gamma, 3.0, 1.55, 3.0, 0.5)
    assert out.shape == (3,)
    np.testing.assert_allclose(out, energy_per_operation(**DRAW) * gamma / 0.1, rtol=1e-14)


def test_lognormal_product_matches_monte_carlo():
    rng = np.random.default_rng(314159)
    medians = np.array([2.0, 0.5, 7.0])
    sigmas = np.array([0.3, 0.1, 0.4])
    powers = np.array([1.0, -1.0, 0.5])
    n = 200_000
    x = np.exp(np.log(medians) + sigmas * rng.standard_normal((n, 3)))
    y = np.prod(x**powers, axis=1)
    median, sigma = lognormal_product(medians, sigmas, powers)
    # Source: lognormal moments (Monte Carlo of known distributions); tolerances are 4 standard
    # errors:
    # sqrt(pi/2) sigma/sqrt(n) for a median of a normal, sigma/sqrt(2n) for its std.
    assert median == pytest.approx(2.0 / 0.5 * np.sqrt(7.0), rel=1e-14)
    assert sigma == pytest.approx(np.sqrt(0.09 + 0.01 + 0.04), rel=1e-14)
    assert np.log(np.median(y)) == pytest.approx(np.log(median), abs=4 * 1.2533 * sigma / n**0.5)
    assert np.std(np.log(y)) == pytest.approx(sigma, abs=4 * sigma / (2 * n) ** 0.5)


def test_energy_per_operation_propagation_matches_closed_form():
    rng = np.random.default_rng(2718)
    # gamma, A, E_LP, g_LP, eta_in: invented medians and log-widths
    medians = np.array([0.1, 3.0, 1.55, 3.0, 0.3])
    sigmas = np.array([0.2, 0.3, 0.001, 1.0, 0.25])
    n = 100_000
    draws = np.exp(np.log(medians) + sigmas * rng.standard_normal((n, 5)))
    assert draws[:, 4].max() <= 1.0  # the seed keeps every efficiency draw physical
    e = energy_per_operation(1.0, *draws.T)
    median, sigma = lognormal_product(medians, sigmas, powers=[1, 1, 1, -1, -1])
    median_J = 1e3 * median * constants.e
    # Source: lognormal moments (Monte Carlo of known distributions), 4 standard errors as above
    assert np.log(np.median(e)) == pytest.approx(np.log(median_J), abs=4 * 1.2533 * sigma / n**0.5)
    assert np.std(np.log(e)) == pytest.approx(sigma, abs=4 * sigma / (2 * n) ** 0.5)


def test_carnot_figure_at_4K():
    # Source: Carnot bound (T_hot - T_cold)/T_cold: (300 - 4)/4 = 74 W per W (common practice, no
    # published source)
    assert carnot_work_per_heat(4.0) == pytest.approx(74.0, rel=1e-15)
    assert carnot_work_per_heat(77.0, 295.0) == pytest.approx(218 / 77, rel=1e-15)
    with pytest.raises(DataError, match="t_hot_K"):
        carnot_work_per_heat(300.0, 4.0)


def test_operation_rate_conventions():
    # gamma = 0.1 meV: gamma/h = 1e-4 eV / 4.135667696e-15 eV s = 2.417989e10 Hz = 24.17989 GHz;
    # gamma/hbar = 1e-4 / 6.582119569e-16 = 1.519267e11 Hz = 151.9267 GHz
    # Source: CODATA via scipy.constants (h, hbar), hand arithmetic
    assert operation_rate(0.1) == pytest.approx(24.17989, rel=1e-6)
    assert operation_rate(0.1, "lifetime") == pytest.approx(151.9267, rel=1e-6)
    assert operation_rate(0.1) == pytest.approx(1e-4 * constants.e / constants.h / 1e9, rel=1e-12)
    # 0.05 fJ at 24.18 GHz = 1.209 uW per node
    assert power_per_node(5e-17, 24.18) == pytest.approx(1.209e-6, rel=1e-12)
    with pytest.raises(DataError, match="convention"):
        operation_rate(0.1, "bandwidth")


def test_array_accounting_declares_every_line():
    lines = array_energy_per_activation(
        1e-15, 10, 10, 1e-12, 1e-13, n_nodes=100,
        overheads=Overheads(holding_power_W=1e-3, window_s=1e-9, wall_plug_efficiency=0.25,
                            t_cold_K=4.0),
    )
    # control 100 x 1e-15 = 1e-13; holding 1e-3 W x 1e-9 s = 1e-12; optical 1.1e-12
    # laser: 1.1e-12 x (1/0.25 - 1) = 3.3e-12; modulators 10 x 1e-12 = 1e-11;
    # detectors 10 x 1e-13 = 1e-12; cooling 1.1e-12 x 74 = 8.14e-11; total 9.68e-11 J
    # Source: hand arithmetic above, Carnot factor 74 at 4 K
    expected = {
        "control_optical_J": 1e-13,
        "holding_optical_J": 1e-12,
        "laser_wallplug_J": 3.3e-12,
        "modulators_J": 1e-11,
        "detectors_J": 1e-12,
        "cooling_J": 8.14e-11,
        "total_J": 9.68e-11,
    }
    assert set(lines) == set(expected)
    for key, value in expected.items():
        assert lines[key] == pytest.approx(value, rel=1e-12), key
    # Nothing counted beyond the control pulses by default: every other line is present and zero.
    bare = array_energy_per_activation(np.array([1e-15, 2e-15]), 0, 0, 0.0, 0.0)
    assert set(bare) == set(expected)
    np.testing.assert_array_equal(bare["total_J"], [1e-15, 2e-15])
    assert all(np.all(bare[k] == 0) for k in expected if k not in ("control_optical_J", "total_J"))


def test_electronic_reference_table():
    table = {r.operation: r.energy_J for r in ELECTRONIC_REFERENCE}
    # Source: Horowitz, "Computing's energy problem", ISSCC 2014 (45 nm) -- value from memory
    assert table == {
        "32-bit float multiply": 3.7e-12,
        "32-bit float add": 0.9e-12,
        "8-bit integer multiply": 0.2e-12,
        "8-bit integer add": 0.03e-12,
    }
    assert all("ISSCC 2014" in r.source for r in ELECTRONIC_REFERENCE)


def test_bad_inputs():
    with pytest.raises(DataError, match="field 'eta_in'.*fraction"):
        energy_per_operation(**{**DRAW, "eta_in": 30.0})
    with pytest.raises(DataError, match="field 'g_lp_ueV_um2'"):
        energy_per_operation(**{**DRAW, "g_lp_ueV_um2": 0.0})
    with pytest.raises(DataError, match="field 'n_nodes'"):
        array_energy_per_activation(1e-15, 1, 1, 0.0, 0.0, n_nodes=2.5)
    with pytest.raises(DataError, match="do not broadcast"):
        lognormal_product([1.0, 2.0], [0.1, 0.2, 0.3])

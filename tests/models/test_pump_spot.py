"""The Gaussian pump-spot average of the coherent-drive steady state, and the spot option.

The quadrature is checked against a direct radial integration of the single-mode steady
state with scipy.integrate.quad, where the cubic is solved by numpy.roots (neither imports
polkit's models).  Every number is invented.
"""

from __future__ import annotations

import numpy as np
import pytest
from coherent_loops import centre_thresholds, loop_powers, noisy_series, point_loop
from scipy.integrate import quad

from polkit.errors import ConfigError, DataError
from polkit.jobs.power.options import PowerCalibration
from polkit.jobs.power.problem import PowerProblem
from polkit.jobs.power.stages import prepare_power
from polkit.models import pump_spot


def _branch(delta, drive, upper):
    r = np.roots([1.0, -2.0 * delta, delta * delta + 0.25, -drive])
    r = np.sort(r[np.abs(r.imag) < 1e-9].real)
    return r[-1] if upper else r[0]


def _radial(delta, drive, drive_max):
    """(2 / pi w^2) * integral 2 pi r y(F f(r)) dr with w = 1, gamma = 1, by quad.

    A radius is on the upper branch iff its drive once passed the up turning drive and has
    not fallen below the down turning drive (Source: Baas et al., Phys. Rev. A 69, 023809
    (2004), applied radius by radius).
    """
    bistable = delta > np.sqrt(3) / 2  # Source: Baas et al. 2004
    # turning drives (a drive per power of 1 makes the switching powers drives)
    f_up, f_down = centre_thresholds(delta, 1.0, 1.0) if bistable else (np.inf, 0.0)

    def integrand(r):
        f = np.exp(-2.0 * r * r)
        upper = drive_max * f > f_up and drive * f >= f_down
        return _branch(delta, drive * f, upper) * 2.0 * np.pi * r

    breaks = [np.sqrt(-0.5 * np.log(x / drive)) for x in (f_up * drive / drive_max, f_down,
                                                         f_up)
              if np.isfinite(x) and 0 < x < drive]
    val, _ = quad(integrand, 0.0, 6.0, points=breaks or None, limit=400, epsabs=1e-12,
                  epsrel=1e-10)
    return val / (np.pi / 2.0)


@pytest.mark.parametrize("delta", [2.5, 1.2, 0.85, 0.3, -1.0])
def test_quadrature_matches_a_direct_radial_integration(delta):
    # Source: direct 2-D radial integration with scipy.integrate.quad (independent solver)
    f_up = centre_thresholds(delta, 1.0, 1.0)[0] if delta > np.sqrt(3) / 2 else 1.0
    drives = np.array([0.2, 0.8, 1.1, 2.0, 6.0]) * f_up
    up = pump_spot.gaussian_spot_sweep(delta, 1.0, drives, "up")
    down = pump_spot.gaussian_spot_sweep(delta, 1.0, drives[::-1], "down",
                                         drive_before=drives[-1])
    ref_up = [_radial(delta, f, f) for f in drives]
    ref_down = [_radial(delta, f, drives[-1]) for f in drives[::-1]]
    np.testing.assert_allclose(up, ref_up, rtol=5e-4)
    np.testing.assert_allclose(down, ref_down, rtol=5e-4)


def test_low_drive_limit_is_the_linear_response():
    # Source: the cubic's linear limit y = F / (Delta^2 + gamma^2/4) (Baas et al. 2004):
    # in units of the spot area pi w^2 / 2 the integral of F f / (...) over the spot is F
    delta, gamma = 1.7, 0.4
    drives = np.array([1e-6, 2e-6, 5e-6])
    y = pump_spot.gaussian_spot_sweep(delta, gamma, drives, "up")
    np.testing.assert_allclose(y, drives / (delta**2 + gamma**2 / 4), rtol=1e-4)


def test_walkers_broadcast_and_a_monostable_mode_has_no_loop():
    delta = np.array([[0.2], [2.0]])
    drives = np.linspace(0.0, 8.0, 9)
    up = pump_spot.gaussian_spot_sweep(delta, 1.0, drives, "up")
    down = pump_spot.gaussian_spot_sweep(delta, 1.0, drives[::-1], "down",
                                         drive_before=8.0)[:, ::-1]
    assert up.shape == (2, 9)
    np.testing.assert_allclose(up[0], down[0], rtol=1e-12)  # no bistability below sqrt(3)/2
    assert np.all(down[1, 1:-1] > up[1, 1:-1])  # a loop: down above up inside the loop


def test_bad_arguments_are_refused():
    with pytest.raises(DataError, match="direction"):
        pump_spot.gaussian_spot_sweep(1.0, 1.0, [1.0, 2.0], "sideways")
    with pytest.raises(DataError, match="up sweep"):
        pump_spot.gaussian_spot_sweep(1.0, 1.0, [2.0, 1.0], "up")
    with pytest.raises(DataError, match="gamma"):
        pump_spot.gaussian_spot_sweep(1.0, -1.0, [1.0, 2.0], "up")


def _series():
    p = loop_powers(0.3, 12.0, 8)
    return noisy_series(p, point_loop(0.5, 0.2, 0.006, p), scale=400.0, seed=4)


def test_flat_spot_keeps_the_single_mode_loop():
    # self-consistency check: a flat top is the point model by construction
    s = _series()
    a = PowerProblem.from_series(s, "coherent", spot="point")
    b = PowerProblem.from_series(s, "coherent", spot="flat")
    d, phi = np.array([2.5, 0.4]), np.array([0.75, 0.1])
    assert np.array_equal(a.reduced_blueshift(d, phi), b.reduced_blueshift(d, phi))


def test_spot_options_are_checked(tmp_path):
    s = _series()
    with pytest.raises(ConfigError, match="spot"):
        prepare_power(s, model="coherent", calibration=PowerCalibration(spot="square"))
    with pytest.raises(ConfigError, match="coherent model only"):
        prepare_power(s.drop_vars("sweep"), model="reservoir",
                      calibration=PowerCalibration(spot="gaussian"))
    cal = tmp_path / "cal.toml"
    cal.write_text('drive = "cw"\nspot = "gaussian"\n'
                   'spot_fwhm = {value = 3.0, units = "um"}\n'
                   'photon_energy = {value = 1.54, units = "eV"}\n'
                   'coupling_efficiency = {value = 0.5, units = "1"}\n', encoding="utf-8")
    problem, setup = prepare_power(s, model="coherent", calibration=cal)
    assert problem.spot == setup.spot == "gaussian"
    with pytest.raises(ConfigError, match="make them agree"):
        prepare_power(s, model="coherent", calibration=PowerCalibration(density=cal, spot="point"))
    bad = tmp_path / "bad.toml"
    bad.write_text(cal.read_text().replace('"gaussian"', '"round"'), encoding="utf-8")
    with pytest.raises(ConfigError, match=r"bad\.toml: key 'spot'"):
        prepare_power(s, model="coherent", calibration=bad)
    worse = tmp_path / "worse.toml"
    worse.write_text(cal.read_text().replace('units = "eV"', 'units = "J"'), encoding="utf-8")
    with pytest.raises(ConfigError, match=r"worse\.toml: key 'photon_energy.units'"):
        prepare_power(s, model="coherent", calibration=worse)

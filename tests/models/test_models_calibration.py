"""Pump-power to density calibration: spot area, worked densities, draws (file: tests/config)."""

from __future__ import annotations

import numpy as np
import pytest
from data_helpers import calibration_dict
from scipy import constants
from scipy.integrate import quad

from polkit.config.calibration import load_calibration
from polkit.errors import ConfigError
from polkit.models.calibration import (
    DensityCalibration,
    UncertainInput,
    cw_density,
    gaussian_spot_area,
    photon_flux,
    pulsed_density,
)


@pytest.mark.parametrize("fwhm", [0.7, 2.0, 25.0])
def test_gaussian_spot_area_is_power_over_peak_intensity(fwhm):
    # Source: definition of the effective area, integral of I(r) = exp(-4 ln2 r^2/w^2) over the
    # plane, computed independently with scipy.integrate.quad.
    power, _ = quad(
        lambda r: 2 * np.pi * r * np.exp(-4 * np.log(2) * r**2 / fwhm**2), 0, 20 * fwhm
    )
    assert gaussian_spot_area(fwhm) == pytest.approx(power, rel=1e-10)
    # Source: Gaussian-beam relation A = pi w0^2 / 2 with w0 = FWHM / sqrt(2 ln 2) (Siegman 1986)
    w0 = fwhm / np.sqrt(2 * np.log(2))
    assert gaussian_spot_area(fwhm) == pytest.approx(np.pi * w0**2 / 2, rel=1e-14)


def test_hand_worked_cw_and_pulsed_densities():
    # Inputs: P = 1 mW, E_ph = 1.6 eV, FWHM 2 um, eta = 0.5, tau = 10 ps, f_rep = 80 MHz.
    # A = pi 2^2 / (4 ln 2) = pi / ln 2 = 4.532360 um^2
    # E_ph = 1.6 x 1.602176634e-19 J = 2.5634826e-19 J   (e: CODATA, exact)
    # photons per s = 1e-3 / 2.5634826e-19 = 3.900943e15, i.e. 3900.943 per ps
    # cw: n = 0.5 x 3900.943 /ps x 10 ps / 4.532360 um^2 = 4303.435 /um^2
    # pulsed: pulse energy 1e-3 / 80e6 = 1.25e-11 J = 4.876179e7 photons;
    #         n = 0.5 x 4.876179e7 / 4.532360 = 5.379293e6 /um^2
    # Source: hand arithmetic above (common practice, no published source)
    area = gaussian_spot_area(2.0)
    assert area == pytest.approx(4.532360, rel=1e-6)
    assert photon_flux(1.0, 1.6) == pytest.approx(3900.943, rel=1e-6)
    assert cw_density(1.0, 1.6, area, 0.5, 10.0) == pytest.approx(4303.435, rel=1e-6)
    assert pulsed_density(1.0, 1.6, area, 0.5, 80.0) == pytest.approx(5.379293e6, rel=1e-6)
    cal = load_calibration(calibration_dict())
    assert cal.density(1.0) == pytest.approx(4303.435, rel=1e-6)
    # Source: CODATA via scipy.constants
    assert constants.e == 1.602176634e-19


def test_draws_follow_the_log_normal_priors_and_respect_efficiency_bound():
    cal = load_calibration(
        {
            "drive": "cw",
            "spot_fwhm": {"value": 3.0, "error": 0.3, "units": "um"},
            "photon_energy": {"value": 1.6, "units": "eV"},
            "coupling_efficiency": {"value": 0.8, "rel_error": 0.5, "units": "1"},
            "polariton_lifetime": {"value": 10.0, "rel_error": 0.2, "units": "ps"},
        }
    )
    n = 40_000
    draws = cal.draw(np.random.default_rng(7), n)
    # Source: lognormal moments (Monte Carlo of known distributions): median = value, std(log) =
    # sigma_log, with
    # Monte Carlo tolerances of about 4 standard errors (sigma/sqrt(n), 1.25 sigma/sqrt(n)).
    log_w = np.log(draws["spot_fwhm_um"])
    assert np.median(log_w) == pytest.approx(np.log(3.0), abs=4 * 1.25 * 0.1 / np.sqrt(n))
    assert np.std(log_w) == pytest.approx(0.1, abs=4 * 0.1 / np.sqrt(2 * n))
    np.testing.assert_array_equal(draws["photon_energy_eV"], 1.6)
    np.testing.assert_allclose(draws["spot_area_um2"], gaussian_spot_area(draws["spot_fwhm_um"]))
    eta = draws["coupling_efficiency"]
    assert eta.max() <= 1.0 and eta.min() > 0
    # the truncated log-normal: P(eta <= 0.8) = Phi(0) / Phi(ln(1/0.8)/0.5) = 0.5 / 0.6726
    # Source: truncated normal CDF (scipy.stats.norm), computed here independently
    from scipy.stats import norm

    expected = 0.5 / norm.cdf(np.log(1 / 0.8) / 0.5)
    assert np.mean(eta <= 0.8) == pytest.approx(expected, abs=4 * np.sqrt(0.25 / n))
    # Draws propagate into densities: one row per draw.
    dens = cal.density(np.array([0.5, 1.0, 2.0]), draws)
    assert dens.shape == (n, 3)
    np.testing.assert_allclose(dens[:, 1], 2 * dens[:, 0])
    # Same seed, same draws; the global numpy state is not used.
    again = cal.draw(np.random.default_rng(7), n)
    np.testing.assert_array_equal(again["coupling_efficiency"], eta)


def test_exact_input_and_generator_check():
    q = UncertainInput(value=2.5, sigma_log=0.0, units="ps")
    np.testing.assert_array_equal(q.draw(np.random.default_rng(1), 4), 2.5)
    cal = load_calibration(calibration_dict())
    assert isinstance(cal, DensityCalibration)
    with pytest.raises(ConfigError, match="Generator"):
        cal.draw(42, 10)

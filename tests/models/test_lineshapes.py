"""Checks of the normalised line shapes against quadrature, limits and scipy's Voigt profile."""

from __future__ import annotations

import numpy as np
import pytest
from scipy import integrate
from scipy.optimize import brentq
from scipy.special import voigt_profile

from polkit.models.lineshapes import FWHM_PER_SIGMA, gaussian, lorentzian, voigt, voigt_fwhm


def _area(f, center, scale):
    # split at the centre so quad sees both halves of the peak
    left = integrate.quad(f, -np.inf, center, limit=500)[0]
    right = integrate.quad(f, center, np.inf, limit=500)[0]
    return left + right


@pytest.mark.parametrize("area", [1.0, 2.5])
def test_lorentzian_integrates_to_area(area):
    # Source: normalisation of the Cauchy distribution, checked by scipy.integrate.quad
    got = _area(lambda e: lorentzian(e, 1.6, 0.003, area), 1.6, 0.003)
    assert got == pytest.approx(area, rel=1e-8)


@pytest.mark.parametrize("area", [1.0, 0.4])
def test_gaussian_integrates_to_area(area):
    # Source: normalisation of the normal distribution, checked by scipy.integrate.quad
    got = _area(lambda e: gaussian(e, -2.0, 0.7, area), -2.0, 0.7)
    assert got == pytest.approx(area, rel=1e-8)


@pytest.mark.parametrize(("fwhm_l", "sigma_g"), [(1.0, 0.3), (0.2, 1.0), (1.0, 1.0)])
def test_voigt_integrates_to_area(fwhm_l, sigma_g):
    # Source: a convolution of two unit-area profiles has unit area; scipy.integrate.quad
    got = _area(lambda e: voigt(e, 0.5, fwhm_l, sigma_g, 3.0), 0.5, fwhm_l + sigma_g)
    assert got == pytest.approx(3.0, rel=1e-7)


def test_half_maximum_at_half_width():
    # Source: definition of the FWHM; L(E0 +/- G/2) = L(E0)/2, same for the Gaussian
    for shape in (lorentzian, gaussian):
        peak = shape(1.0, 1.0, 0.4)
        assert shape(np.array([0.8, 1.2]), 1.0, 0.4) == pytest.approx(peak / 2, rel=1e-12)
    # Source: peak height of a Lorentzian of area A is 2A/(pi G)
    assert lorentzian(0.0, 0.0, 0.5, 2.0) == pytest.approx(2 * 2.0 / (np.pi * 0.5), rel=1e-14)
    # Source: 2 sqrt(2 ln 2) = 2.354820045 (value from memory)
    assert pytest.approx(2.354820045, rel=1e-9) == FWHM_PER_SIGMA


def test_voigt_is_the_convolution_of_lorentzian_and_gaussian():
    # Source: definition of the Voigt profile as a convolution, done by quadrature; this pins
    # the convention that fwhm_l is a full width (scipy takes the half width)
    fl, sg = 0.8, 0.5
    for e in (0.0, 0.3, 1.7, -2.5):
        def integrand(t, e=e):
            return gaussian(t, 0.0, FWHM_PER_SIGMA * sg) * lorentzian(e - t, 0.0, fl)
        ref = integrate.quad(integrand, -np.inf, np.inf, limit=500, epsabs=1e-13)[0]
        assert voigt(e, 0.0, fl, sg) == pytest.approx(ref, rel=1e-7)


def test_voigt_limits():
    e = np.linspace(-3.0, 3.0, 121)
    # Source: analytic limit sigma -> 0 of the Voigt profile is the Lorentzian
    assert voigt(e, 0.2, 0.9, 1e-6) == pytest.approx(lorentzian(e, 0.2, 0.9), rel=1e-6)
    # Source: analytic limit gamma -> 0 is the Gaussian; the first-order correction is of order
    # gamma/sigma times the peak height (here ~1e-8 of it)
    sg = 0.7
    gauss = gaussian(e, 0.2, FWHM_PER_SIGMA * sg)
    assert np.max(np.abs(voigt(e, 0.2, 1e-8, sg) - gauss)) < 1e-6 * gauss.max()
    assert voigt(e, 0.2, 0.0, sg) == pytest.approx(gauss, rel=1e-12)


def _measured_fwhm(fwhm_l: float, sigma_g: float) -> float:
    gamma = fwhm_l / 2
    half = voigt_profile(0.0, sigma_g, gamma) / 2
    return 2 * brentq(lambda x: voigt_profile(x, sigma_g, gamma) - half, 0.0,
                      10 * (fwhm_l + 3 * sigma_g), xtol=1e-15, rtol=1e-14)


def test_voigt_fwhm_matches_the_measured_width():
    # Source: Olivero and Longbothum, JQSRT 17, 233 (1977), quoting ~0.02 %; measured here on
    # scipy.special.voigt_profile by root finding.  The largest deviation over the whole range
    # of f_G/f_L is 0.0237 % (near f_G/f_L ~ 3), so the bound below is 0.024 %.
    ratios = np.geomspace(1e-3, 1e3, 121)  # f_G / f_L
    errors = []
    for r in ratios:
        sg = r / FWHM_PER_SIGMA
        errors.append(voigt_fwhm(1.0, sg) / _measured_fwhm(1.0, sg) - 1.0)
    errors = np.abs(errors)
    assert errors.max() < 2.4e-4
    # away from the crossover the quoted 0.02 % holds
    outside = (ratios < 0.7) | (ratios > 15)
    assert errors[outside].max() < 2.0e-4
    # Source: both pure limits (Lorentzian f_V = f_L; Gaussian f_V = f_G), analytic
    assert voigt_fwhm(1.0, 0.0) == pytest.approx(1.0, rel=1e-5)
    assert voigt_fwhm(0.0, 1.0) == pytest.approx(FWHM_PER_SIGMA, rel=1e-12)


def test_batched_parameters_broadcast_like_a_loop():
    # common practice, no published source: a (W, 1) batch against an (E,) grid gives (W, E)
    e = np.linspace(1.55, 1.65, 50)
    centers = np.array([1.58, 1.60, 1.62])[:, None]
    widths = np.array([0.002, 0.004, 0.001])[:, None]
    sig = np.array([0.001, 0.0005, 0.002])[:, None]
    batch_l = lorentzian(e, centers, widths, 2.0)
    batch_v = voigt(e, centers, widths, sig)
    assert batch_l.shape == batch_v.shape == (3, 50)
    for w in range(3):
        assert batch_l[w] == pytest.approx(lorentzian(e, centers[w, 0], widths[w, 0], 2.0))
        assert batch_v[w] == pytest.approx(voigt(e, centers[w, 0], widths[w, 0], sig[w, 0]))
    assert voigt_fwhm(widths, sig).shape == (3, 1)

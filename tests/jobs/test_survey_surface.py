"""The detuning surface of a survey: weighted least-squares polynomial, its gradient, the
zero-detuning line and its band, checked on invented points with known answers.
"""

from __future__ import annotations

import numpy as np
import pytest

from polkit import ConfigError, FitError
from polkit.jobs.survey.surface import fit_surface


def _grid(n=5, span=10.0):
    g = np.linspace(-span, span, n)
    xx, yy = np.meshgrid(g, g)
    return xx.ravel(), yy.ravel()


def test_surface_recovers_a_plane_and_its_zero_line_exactly():
    # Source: analytic -- v = a + b x + c y vanishes on x = -(a + c y) / b.
    x, y = _grid()
    a, b, c = -1.2, 0.4, 0.05
    v = a + b * x + c * y
    fit = fit_surface(x, y, v, np.full_like(v, 0.02))
    np.testing.assert_allclose(fit.coefficients, [a, b, c], atol=1e-12)  # centre is (0, 0)
    (seg,) = fit.level_line(0.0)
    np.testing.assert_allclose(np.asarray(seg["x"]), -(a + c * np.asarray(seg["y"])) / b,
                               atol=1e-9)
    g, cov = fit.gradient()
    np.testing.assert_allclose(g, [b, c], atol=1e-12)


def test_surface_recovers_a_quadric_and_its_local_gradient():
    # Source: analytic derivatives of v = 1 + 0.2 x - 0.1 y + 0.01 x^2 + 0.02 x y - 0.03 y^2
    x, y = _grid(6)
    x, y = x + 3.0, y - 2.0  # off-centre: the fit works about the centroid (3, -2)
    v = 1 + 0.2 * x - 0.1 * y + 0.01 * x**2 + 0.02 * x * y - 0.03 * y**2
    fit = fit_surface(x, y, v, np.full_like(v, 0.01), degree=2)
    mean, _ = fit.evaluate(np.array([0.0, 4.0]), np.array([0.0, 1.0]))
    np.testing.assert_allclose(mean, [1.0, 1 + 0.8 - 0.1 + 0.16 + 0.08 - 0.03], atol=1e-10)
    g, _ = fit.gradient(4.0, 1.0)
    np.testing.assert_allclose(g, [0.2 + 2 * 0.01 * 4 + 0.02 * 1, -0.1 + 0.02 * 4 - 2 * 0.03 * 1],
                               atol=1e-10)


def test_surface_covariance_matches_an_independent_least_squares_library():
    # Source: scipy.optimize.curve_fit, absolute_sigma=True (covariance of the weights
    # alone) and absolute_sigma=False (scaled by chi2/dof) -- the latter is what the survey
    # reports when the scatter exceeds the per-position intervals.
    from scipy.optimize import curve_fit

    rng = np.random.default_rng(8)
    x, y = _grid()
    sig = rng.uniform(0.01, 0.05, x.size)

    def plane(xy, a, b, c):
        return a + b * xy[0] + c * xy[1]

    for inflate in (0.5, 3.0):  # scatter below, then above the stated uncertainties
        v = -1 + 0.3 * x + 0.02 * y + inflate * sig * rng.standard_normal(x.size)
        fit = fit_surface(x, y, v, sig)
        absolute = fit.chi2 / fit.dof <= 1
        popt, pcov = curve_fit(plane, (x, y), v, sigma=sig, absolute_sigma=absolute)
        np.testing.assert_allclose(fit.coefficients, popt, rtol=1e-8, atol=1e-12)
        np.testing.assert_allclose(fit.covariance, pcov, rtol=1e-6)
        assert (fit.scale_factor > 1) == (not absolute)


def test_surface_gradient_intervals_cover_the_truth_at_their_level():
    # common practice, no published source: simulated Gaussian errors of known size, so the 95 %
    # intervals must cover the true gradient in about 95 % of 400 wafers (binomial sd 1.1 %;
    # the scale factor can only widen them).
    rng = np.random.default_rng(21)
    x, y = _grid(5)
    hits = 0
    n = 400
    for _ in range(n):
        sig = rng.uniform(0.02, 0.06, x.size)
        v = -1.5 + 0.3 * x + rng.normal(0.0, sig)
        g = fit_surface(x, y, v, sig).gradient_summary()["x"]
        hits += g["low"] <= 0.3 <= g["high"]
    assert 0.92 <= hits / n <= 0.99


def test_zero_line_band_matches_a_monte_carlo_of_the_coefficients():
    # Source: the delta-method width of the zero line checked by sampling the coefficients
    # from their Gaussian and solving a + b (x - x0) = 0 for each draw (gradient along x).
    rng = np.random.default_rng(4)
    x, y = _grid(4)
    sig = np.full(x.size, 0.05)
    v = -1.0 + 0.25 * x + rng.normal(0.0, sig)
    fit = fit_surface(x, y, v, sig)
    draws = rng.multivariate_normal(fit.coefficients, fit.covariance, 200_000)
    y0 = 0.0
    x_cross = fit.centre_mm[0] - (draws[:, 0] + draws[:, 2] * (y0 - fit.centre_mm[1])) / draws[:, 1]
    (seg,) = fit.level_line(0.0)
    i = int(np.argmin(np.abs(np.asarray(seg["y"]) - y0)))
    assert seg["sigma_mm"][i] == pytest.approx(np.std(x_cross), rel=0.03)


def test_surface_refuses_too_few_or_collinear_positions():
    with pytest.raises(FitError, match="at least 3 positions"):
        fit_surface([0, 1], [0, 1], [1, 2], [0.1, 0.1])
    with pytest.raises(FitError, match="lie on a line"):
        fit_surface([0, 1, 2, 3], [0, 1, 2, 3], [1, 2, 3, 4], [0.1] * 4)
    with pytest.raises(ConfigError, match="degree of 1 or 2"):
        fit_surface([0, 1, 2], [0, 1, 0], [1, 2, 3], [0.1] * 3, degree=3)

"""Where a symmetric line fit puts an asymmetric polariton branch line."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import curve_fit

from polkit.jobs.dispersion.problem import fitted_line_centre, line_maximum


@pytest.mark.parametrize("b", [0.05, 0.15, -0.1])
def test_symmetric_fit_of_an_asymmetric_line_lands_at_the_first_order_centre(b):
    # Source: scipy.optimize.curve_fit (an independent least-squares fit) of a Lorentzian to
    # the line (a h - b x) / (pi (x^2 + h^2)) over a wide window with uniform weights; the
    # first-order projection gives the centre E0 - h b / a (derivation in the docstring)
    # and the line's maximum lies half as far from E0.
    h, e0 = 0.2, 1.5
    x = np.linspace(-30.0, 30.0, 20001)
    y = (h - b * x) / (np.pi * (x * x + h * h))

    def lorentz(x, area, centre, width):
        return area * width / np.pi / ((x - centre) ** 2 + width**2)

    (area, centre, width), _ = curve_fit(lorentz, x, y, p0=[1.0, 0.0, h])
    pole = np.array([e0 - 1j * h])
    residue = np.array([1.0 + 1j * b])
    predicted = fitted_line_centre(pole, residue)[0] - e0
    # second-order terms (b/a)^2 are below 1e-2 of the shift for these b
    assert centre == pytest.approx(predicted, rel=0.02)
    assert width == pytest.approx(h, rel=1e-4)
    assert line_maximum(pole, residue)[0] - e0 == pytest.approx(predicted / 2, rel=0.02)


def _table(centres, fwhm_mev, areas):
    import xarray as xr

    n = len(centres)
    return xr.Dataset(
        {
            "energy": (("angle", "peak"), np.array([centres], float)),
            "fwhm": (("angle", "peak"), np.array([fwhm_mev], float)),
            "area": (("angle", "peak"), np.array([areas], float)),
            "found": (("angle", "peak"), np.ones((1, n), np.int8)),
        },
        coords={"angle": [0.0], "peak": np.arange(n)},
        attrs={"profile": "lorentzian"},
    )


def test_table_response_of_one_line_with_uniform_weights_is_minus_the_half_width():
    # Source: the first-order projection above (E0 - h b / a): R = -h for one line
    from polkit.jobs.dispersion.problem import table_centre_response

    energy = np.linspace(1.40, 1.70, 30001)
    r = table_centre_response(_table([1.55], [0.4], [100.0]), energy, np.ones((1, energy.size)))
    assert r[0, 0, 0] == pytest.approx(-0.2e-3, rel=2e-3)


def test_table_response_predicts_a_weighted_two_line_fit():
    # Source: scipy.optimize.curve_fit (independent weighted least squares) of two symmetric
    # Lorentzians and a constant to two asymmetric branch lines with shot-noise weights
    # sigma^2 = model + read noise^2; the centres move by R @ beta to first order in beta.
    from polkit.jobs.dispersion.problem import table_centre_response

    energy = np.linspace(1.530, 1.560, 600)
    e0 = np.array([1.5420, 1.5480])
    h = np.array([0.25e-3, 0.40e-3])
    area = np.array([3.0, 1.0])  # counts x eV
    beta = np.array([0.04, -0.06])
    u = energy[None, :] - e0[:, None]
    y = 50.0 + (area[:, None] * (h[:, None] - beta[:, None] * u)
                / (np.pi * (u * u + h[:, None] ** 2))).sum(axis=0)
    sigma = np.sqrt(y + 16.0)

    def model(x, c, x1, w1, a1, x2, w2, a2):
        return (c + a1 * w1 / np.pi / ((x - x1) ** 2 + w1**2)
                + a2 * w2 / np.pi / ((x - x2) ** 2 + w2**2))

    p0 = [50.0, e0[0], h[0], area[0], e0[1], h[1], area[1]]
    p, _ = curve_fit(model, energy, y, p0=p0, sigma=sigma, xtol=1e-14, ftol=1e-14)
    fitted = np.array([p[1], p[4]])
    table = _table([p[1], p[4]], [2e3 * p[2], 2e3 * p[5]], [1e3 * p[3], 1e3 * p[6]])
    r = table_centre_response(table, energy, 1.0 / sigma[None, :] ** 2)[0]
    predicted = e0 + r @ beta
    first_order = e0 - h * beta  # uniform weights, one line
    # the response explains the shift to second order in beta (a few per cent of it) ...
    np.testing.assert_allclose(fitted - e0, predicted - e0, rtol=0.08)
    # ... where the uniform-weight rule misses it by far more
    assert np.all(np.abs(fitted - predicted) < 0.3 * np.abs(fitted - first_order))

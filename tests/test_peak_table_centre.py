"""Where a symmetric line fit puts an asymmetric polariton branch line."""

from __future__ import annotations

import numpy as np
import pytest
from scipy.optimize import curve_fit

from polkit.workflows.dispersion_model import fitted_line_centre, line_maximum


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

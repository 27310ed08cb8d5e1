"""MAP start and initial ensemble, checked against closed-form linear-Gaussian results."""

from __future__ import annotations

import numpy as np
import pytest

from polkit.errors import FitError
from polkit.inference import (
    LogPosterior,
    Parameter,
    ParameterSpace,
    Prior,
    check_ensemble,
    find_map,
    initial_ball,
)

# invented straight-line data y = a + b x with known Gaussian noise
X = np.linspace(-1.0, 1.0, 25)
NOISE = 0.3
Y = 0.5 + 1.2 * X + NOISE * np.random.default_rng(1).standard_normal(X.size)
DESIGN = np.column_stack([np.ones_like(X), X])


def loglike(theta):
    model = theta[:, 0:1] + theta[:, 1:2] * X
    return -0.5 * np.sum((Y - model) ** 2, axis=1) / NOISE**2


def residuals(theta):
    return (Y - theta[0] - theta[1] * X) / NOISE


def space(prior_a, prior_b):
    return ParameterSpace([Parameter("a", "meV", prior_a), Parameter("b", "meV", prior_b)])


def test_least_squares_map_and_scale_match_the_normal_equations():
    # Source: linear least squares, covariance sigma^2 (X^T X)^-1 (e.g. Bishop, PRML 2006,
    # sec. 3.1.1); numpy.linalg.lstsq as an independent solver
    sp = space(Prior.uniform(-10, 10), Prior.uniform(-10, 10))
    res = find_map(LogPosterior(loglike, sp), sp, np.zeros(2), residuals=residuals)
    coef = np.linalg.lstsq(DESIGN, Y, rcond=None)[0]
    cov = NOISE**2 * np.linalg.inv(DESIGN.T @ DESIGN)
    assert res.success
    np.testing.assert_allclose(res.x, coef, rtol=1e-6, atol=1e-8)
    np.testing.assert_allclose(res.scale, np.sqrt(np.diag(cov)), rtol=1e-4)


def test_minimize_map_matches_the_conjugate_posterior_mode():
    # Source: Bishop, Pattern Recognition and Machine Learning (2006), eqs. 3.53-3.54:
    # m_N = beta S_N Phi^T t, S_N^-1 = alpha I + beta Phi^T Phi; the conditional spread of
    # each parameter is 1 / sqrt(diag(S_N^-1))
    alpha, beta = 1.0 / 2.0**2, 1.0 / NOISE**2
    sp = space(Prior.normal(0, 2.0), Prior.normal(0, 2.0))
    precision = alpha * np.eye(2) + beta * DESIGN.T @ DESIGN
    mode = beta * np.linalg.solve(precision, DESIGN.T @ Y)
    res = find_map(LogPosterior(loglike, sp), sp, np.array([3.0, -3.0]))
    np.testing.assert_allclose(res.x, mode, atol=1e-4)
    np.testing.assert_allclose(res.scale, 1.0 / np.sqrt(np.diag(precision)), rtol=1e-3)


def test_map_starts_inside_the_prior_when_x0_is_outside():
    # common practice, no published source: a start at zero posterior must not break the fit
    sp = space(Prior.uniform(0.0, 2.0), Prior.uniform(0.0, 3.0))
    lp = LogPosterior(loglike, sp)
    for x0 in (np.array([-5.0, 9.0]), None):
        res = find_map(lp, sp, x0, rng=np.random.default_rng(0))
        coef = np.linalg.lstsq(DESIGN, Y, rcond=None)[0]
        np.testing.assert_allclose(res.x, coef, atol=1e-4)
        assert (x0 is not None) or "prior draws" in res.message

    def walled(theta):  # zero likelihood for a < 0.2, where the clipped start lands
        return np.where(theta[:, 0] < 0.2, -np.inf, loglike(theta))

    res = find_map(LogPosterior(walled, sp), sp, np.array([-5.0, 9.0]))
    np.testing.assert_allclose(res.x, coef, atol=1e-4)
    assert "zero posterior" in res.message


def test_map_against_a_bound_gives_a_finite_scale():
    # analytic limit: the mode sits on the bound b = 1.0 when the data want b ~ 1.2
    sp = space(Prior.uniform(-10, 10), Prior.uniform(0.0, 1.0))
    res = find_map(LogPosterior(loglike, sp), sp, np.array([0.0, 0.5]))
    assert res.x[1] == pytest.approx(1.0, abs=1e-6)
    assert np.all(np.isfinite(res.scale)) and np.all(res.scale > 0)


def test_initial_ball_stays_inside_the_support_and_spans_all_dimensions():
    # common practice, no published source
    sp = space(Prior.uniform(0.0, 2.0), Prior.uniform(0.0, 1.0))
    p0 = initial_ball(np.array([1.0, 1e-6]), np.array([0.1, 0.1]), 16,
                      np.random.default_rng(3), sp, spread=1.0)
    assert p0.shape == (16, 2)
    assert np.all(np.isfinite(sp.log_prior(p0)))
    assert np.linalg.matrix_rank(p0 - p0.mean(axis=0)) == 2


def test_degenerate_or_bad_ensembles_raise_fit_error():
    # common practice, no published source: an ensemble confined to a subspace never leaves it
    sp = space(Prior.uniform(-10, 10), Prior.uniform(-10, 10))
    rng = np.random.default_rng(4)
    with pytest.raises(FitError, match=r"same value of \['b'\]"):
        initial_ball(np.array([0.5, 1.0]), np.array([0.1, 0.0]), 16, rng, sp)
    a = rng.normal(size=16)
    with pytest.raises(FitError, match="span 1 of 2 dimensions"):
        check_ensemble(np.column_stack([a, 2.0 * a + 1.0]), sp)
    with pytest.raises(FitError, match="at least 4"):
        check_ensemble(rng.normal(size=(3, 2)), sp)
    with pytest.raises(FitError, match="outside the prior"):
        check_ensemble(np.column_stack([rng.normal(size=8), np.full(8, 50.0) + rng.normal(
            size=8)]), sp)
    with pytest.raises(FitError, match="outside the prior"):
        initial_ball(np.array([20.0, 0.0]), np.array([0.1, 0.1]), 8, rng, sp)

"""Convergence diagnostics against processes with known autocorrelation and known mixing."""

from __future__ import annotations

import warnings

import numpy as np
import pytest
import xarray as xr

from polkit.inference import (
    arviz_diagnostics,
    autocorr_time,
    convergence_gate,
    nested_rhat,
    stuck_walkers,
    walker_acceptance,
)


def _ar1(rng, phi, n_steps, n_walkers):
    """AR(1) chains x_t = phi x_{t-1} + e_t started in equilibrium."""
    x = np.empty((n_steps, n_walkers))
    x[0] = rng.standard_normal(n_walkers) / np.sqrt(1 - phi**2)
    noise = rng.standard_normal((n_steps, n_walkers))
    for t in range(1, n_steps):
        x[t] = phi * x[t - 1] + noise[t]
    return x


def test_autocorr_time_of_an_ar1_process():
    # Source: integrated autocorrelation time of AR(1), tau = (1 + phi) / (1 - phi)
    # (Sokal, "Monte Carlo methods in statistical mechanics", 1997, sec. 2)
    rng = np.random.default_rng(0)
    phi = 0.8
    chain = _ar1(rng, phi, 4000, 32)[:, :, None]
    tau = autocorr_time(chain)
    assert tau.shape == (1,)
    assert tau[0] == pytest.approx((1 + phi) / (1 - phi), rel=0.1)


def test_autocorr_time_ignores_frozen_walkers_and_flags_frozen_parameters():
    # analytic limit: a parameter that never moves has no finite autocorrelation time
    rng = np.random.default_rng(1)
    chain = np.stack([_ar1(rng, 0.5, 2000, 8), np.ones((2000, 8))], axis=-1)
    chain[:, 0, 0] = 0.3  # one frozen walker
    tau = autocorr_time(chain)
    assert tau[0] == pytest.approx(3.0, rel=0.15)  # Source: (1 + 0.5) / (1 - 0.5)
    assert tau[1] == np.inf


@pytest.mark.parametrize("n_steps, n_walkers, phi", [(1000, 32, 0.9), (777, 7, 0.3),
                                                      (64, 12, 0.995), (3, 4, 0.5)])
def test_autocorr_time_equals_emcees_estimator(n_steps, n_walkers, phi):
    # Source: emcee.autocorr.integrated_time (Foreman-Mackey et al., PASP 125, 306 (2013);
    # Sokal's window, c = 5), the reference implementation of the same estimator, run
    # walker by walker; lengths off powers of two, a frozen walker, and a chain too short
    # for Sokal's window (the last lag is used) included
    import emcee

    rng = np.random.default_rng(n_steps)
    chain = np.stack([_ar1(rng, phi, n_steps, n_walkers),
                      rng.standard_normal((n_steps, n_walkers)).cumsum(axis=0)], axis=-1)
    chain[:, 1, 0] = 0.25
    tau = autocorr_time(chain)
    expected = [emcee.autocorr.integrated_time(np.delete(chain[:, :, 0], 1, axis=1) if j == 0
                                                else chain[:, :, 1],
                                                c=5, tol=0, quiet=True)[0] for j in range(2)]
    np.testing.assert_allclose(tau, expected, rtol=1e-10, atol=1e-12)  # atol: tau ~ 0 at 3 steps


def test_acceptance_and_stuck_walkers_from_a_constructed_chain():
    # common practice, no published source: acceptance = fraction of steps a walker moved
    rng = np.random.default_rng(2)
    n_steps, n_walkers = 1001, 10
    moves = rng.uniform(size=(n_steps - 1, n_walkers)) < np.linspace(0.02, 0.9, n_walkers)
    steps = np.where(moves[:, :, None], rng.normal(size=(n_steps - 1, n_walkers, 2)), 0.0)
    chain = np.concatenate([np.zeros((1, n_walkers, 2)), np.cumsum(steps, axis=0)])
    acc = walker_acceptance(chain)
    np.testing.assert_allclose(acc, moves.mean(axis=0), rtol=0, atol=1e-12)
    log_prob = rng.normal(-5.0, 1.0, size=(n_steps, n_walkers))
    log_prob[:, 7] -= 40.0  # walker 7 lives far below the rest
    assert stuck_walkers(acc, log_prob, 2).tolist() == [0, 7]


def test_nested_rhat_is_one_for_well_mixed_independent_ensembles():
    # Source: Margossian et al., arXiv:2110.13017 (2022): nRhat -> 1 when all superchains
    # sample the same distribution; here exact iid draws
    rng = np.random.default_rng(3)
    draws = rng.standard_normal((4, 32, 200, 2))
    values = nested_rhat(draws)
    assert values.shape == (2,)
    assert np.all(values < 1.01)


def test_nested_rhat_flags_an_ensemble_stuck_in_another_mode():
    # Source: Margossian et al., arXiv:2110.13017 (2022): a superchain in a different mode
    # inflates the between-superchain variance
    rng = np.random.default_rng(4)
    draws = rng.standard_normal((4, 32, 200))
    draws[3] += 3.0  # ensemble 3 sits in a mode 3 standard deviations away
    assert nested_rhat(draws) > 1.1
    mild = rng.standard_normal((4, 32, 200))
    mild[3] += 0.5
    assert nested_rhat(mild) > 1.01


def test_nested_rhat_with_one_subchain_reduces_to_classic_rhat():
    # Source: Gelman and Rubin, Statist. Sci. 7, 457 (1992): Rhat^2 = (N-1)/N + B/(N W);
    # with M = 1 the nested form gives nRhat^2 = 1 + B/(N W) = Rhat^2 + 1/N.
    # ArviZ's "identity" R-hat is the independent implementation of the classic formula.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", FutureWarning)
        import arviz as az
    rng = np.random.default_rng(5)
    k, n = 6, 50
    draws = rng.standard_normal((k, n)) + rng.normal(0, 0.3, size=(k, 1))
    classic = float(az.rhat(draws, method="identity"))
    nested = nested_rhat(draws[:, None, :])
    assert nested**2 == pytest.approx(classic**2 + 1.0 / n, rel=1e-12)


def test_arviz_ess_of_independent_draws_is_about_the_draw_count():
    # Source: effective sample size of independent draws equals the number of draws
    # (Vehtari et al., Bayesian Analysis 16, 667 (2021))
    rng = np.random.default_rng(6)
    ds = xr.Dataset({"a": (("chain", "draw"), rng.standard_normal((8, 500)))})
    out = arviz_diagnostics(ds)
    assert out["min_ess_bulk"] == pytest.approx(4000, rel=0.15)
    assert out["min_ess_tail"] == pytest.approx(4000, rel=0.25)
    assert out["max_rhat"] < 1.01


def test_gate_passes_a_long_stable_chain_and_names_what_fails_on_a_short_one():
    # Source: AR(1) chains with tau = (1 + phi) / (1 - phi) = 3 (Sokal 1997); acceptance is
    # ~1 for continuous AR(1) moves, so the range is widened.  3000 steps of 16 walkers
    # give about 16 x 2250 / 3 = 12000 effective draws, far above the 1000 target
    rng = np.random.default_rng(7)
    chain = _ar1(rng, 0.5, 3000, 16)[:, :, None]
    log_prob = -0.5 * chain[..., 0] ** 2
    check = convergence_gate(chain, log_prob, names=["x"], acceptance_range=(0.15, 1.0))
    assert check.passed, check.reasons
    assert check.ess["min_ess_bulk"] >= 1000 and check.group_rhat["x"] <= 1.01
    # the former rule (tau settled within tau_rtol) is still available
    prev = autocorr_time(chain[:2900][2900 // 4 :])
    assert convergence_gate(chain, log_prob, prev, names=["x"], tau_rtol=0.05,
                            acceptance_range=(0.15, 1.0)).passed
    # the floor in autocorrelation times (tau is underestimated on short chains: ~2 at 60)
    short = convergence_gate(chain[:60], log_prob[:60], None, names=["x"], autocorr_factor=50)
    assert not short.passed
    text = " ".join(short.reasons)
    assert "shorter than 50 x" in text and "acceptance outside" in text
    assert short.ess is None  # not computed when the cheap tests fail


def test_gate_asks_for_the_ess_target_not_for_a_settled_tau():
    # Source: AR(1) with phi = 0.9 has tau = 19 (Sokal 1997): 600 steps pass the 25-tau floor
    # but 16 walkers then hold about 16 x (600 - 95) / 19 ~ 430 effective draws (< 1000);
    # 3000 steps hold about 2200 (Vehtari et al., Bayesian Analysis 16, 667 (2021) ESS)
    rng = np.random.default_rng(17)
    chain = _ar1(rng, 0.9, 3000, 16)[:, :, None]
    log_prob = -0.5 * chain[..., 0] ** 2
    kw = dict(names=["x"], acceptance_range=(0.15, 1.0))
    early = convergence_gate(chain[:600], log_prob[:600], **kw)
    assert not early.passed
    assert not any("shorter than" in r for r in early.reasons), early.reasons
    assert any("bulk ESS below the target" in r for r in early.reasons), early.reasons
    assert 200 < early.ess["min_ess_bulk"] < 800
    assert convergence_gate(chain, log_prob, **kw).passed
    # a lower target (dict form, as for a nuisance parameter) is met by the short chain
    low = convergence_gate(chain[:600], log_prob[:600], ess_target={"x": 150.0}, **kw)
    assert not any("ESS below" in r for r in low.reasons), low.reasons


def test_gate_flags_a_group_of_walkers_that_sits_apart():
    # Source: rank-normalised R-hat (Vehtari et al., Bayesian Analysis 16, 667 (2021)):
    # one group of 4 of 16 walkers shifted by 0.5 sd: sqrt(1 + var of group means) ~ 1.02
    rng = np.random.default_rng(27)
    chain = rng.standard_normal((4000, 16, 1))
    chain[:, 12:] += 0.5
    log_prob = -0.5 * chain[..., 0] ** 2
    check = convergence_gate(chain, log_prob, names=["x"], acceptance_range=(0.0, 1.0))
    assert not check.passed
    assert any("R-hat over groups of walkers" in r for r in check.reasons), check.reasons
    assert check.group_rhat["x"] > 1.01


_ESS_SCRIPT = r"""
import json, sys
import numpy as np
if sys.argv[1] == "polkit":
    from polkit.numerics import kernels as _kernels
    assert _kernels.available()  # numba imported first, as in a fit
    from polkit._arviz import arviz
    az = arviz()
    import numba
    assert sys.modules["numba"] is numba and not az.Numba.numba_flag
else:
    import arviz as az
    assert az.Numba.numba_flag  # ArviZ's own default with numba installed
x = np.random.default_rng(5).standard_normal((8, 400)).cumsum(axis=1)
print(json.dumps([float(az.ess(x, method="bulk")), float(az.ess(x, method="tail")),
                  float(az.rhat(x))]))
"""


def test_arviz_without_its_numba_kernels_gives_the_same_ess_and_rhat():
    # Source: ArviZ itself (Vehtari et al., Bayesian Analysis 16, 667 (2021) estimators):
    # polkit imports it with numba hidden (to skip compiling kernels it does not use); the
    # numpy path must give ArviZ's numba-path values, and polkit's own numba must still load
    import json
    import subprocess
    import sys

    pytest.importorskip("numba")
    values = {}
    for how in ("polkit", "plain"):
        proc = subprocess.run([sys.executable, "-c", _ESS_SCRIPT, how], capture_output=True,
                              text=True, timeout=300)
        assert proc.returncode == 0, proc.stderr[-2000:]
        values[how] = json.loads(proc.stdout.strip().splitlines()[-1])
    np.testing.assert_allclose(values["polkit"], values["plain"], rtol=1e-10)

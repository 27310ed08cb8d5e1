"""The ensemble runner against a closed-form posterior, and its refusals and stops."""

from __future__ import annotations

import threading
import warnings

import numpy as np
import pytest

from polkit.errors import ConfigError, ConvergenceWarning, FitError
from polkit.inference import (
    GateSettings,
    LogPosterior,
    Parameter,
    ParameterSpace,
    Prior,
    find_map,
    run_ensemble,
)

# invented straight-line data y = a + b x with known Gaussian noise
X = np.linspace(-1.0, 1.0, 20)
NOISE = 0.3
Y = 0.5 + 1.2 * X + NOISE * np.random.default_rng(1).standard_normal(X.size)
PRIOR_SD = 2.0
SPACE = ParameterSpace(
    [
        Parameter("a", "meV", Prior.normal(0.0, PRIOR_SD), "intercept"),
        Parameter("b", "meV", Prior.normal(0.0, PRIOR_SD), "slope"),
    ]
)
FAST = dict(n_walkers=16, check_every=50, min_steps=200, progress=False)


def loglike(theta):
    model = theta[:, 0:1] + theta[:, 1:2] * X
    return -0.5 * np.sum((Y - model) ** 2, axis=1) / NOISE**2


def analytic_posterior():
    """Bishop, PRML (2006), eqs. 3.53-3.54 with alpha = 1/PRIOR_SD^2, beta = 1/NOISE^2."""
    design = np.column_stack([np.ones_like(X), X])
    alpha, beta = 1.0 / PRIOR_SD**2, 1.0 / NOISE**2
    cov = np.linalg.inv(alpha * np.eye(2) + beta * design.T @ design)
    mean = beta * cov @ design.T @ Y
    return mean, cov


@pytest.fixture(scope="module")
def map_start():
    return find_map(LogPosterior(loglike, SPACE), SPACE, np.zeros(2))


@pytest.fixture(scope="module")
def converged_run(map_start):
    return run_ensemble(loglike, SPACE, map_start, FAST, seed=2024)


def test_reproduces_the_conjugate_linear_gaussian_posterior(converged_run):
    # Source: Bishop, Pattern Recognition and Machine Learning (2006), eqs. 3.53-3.54
    out = converged_run
    assert out.converged, out.reasons
    mean, cov = analytic_posterior()
    draws = out.posterior_draws()
    ess = out.diagnostics["ess_bulk"]
    for j, name in enumerate(SPACE.names):
        values = draws[name].values.reshape(-1)
        sd = np.sqrt(cov[j, j])
        mcse = sd / np.sqrt(ess[name])
        assert abs(values.mean() - mean[j]) < 4 * mcse, (name, values.mean(), mean[j], mcse)
        assert values.std() == pytest.approx(sd, rel=0.1)
    corr = cov[0, 1] / np.sqrt(cov[0, 0] * cov[1, 1])
    got = np.corrcoef(draws["a"].values.ravel(), draws["b"].values.ravel())[0, 1]
    assert got == pytest.approx(corr, abs=0.05)


def test_output_layout_and_diagnostics(converged_run):
    # common practice, no published source: the documented shapes and keys
    out = converged_run
    n_ens, steps, walkers, n_par = out.chains.shape
    assert (n_ens, walkers, n_par) == (1, 16, 2)
    assert out.log_prob.shape == (1, steps, 16)
    assert out.acceptance.shape == (1, 16)
    assert out.autocorr_time.shape == (1, 2)
    d = out.diagnostics
    for key in ("converged", "steps", "walkers", "max_autocorr_time", "min_ess_bulk",
                "min_ess_tail", "max_rhat", "nested_rhat", "acceptance_fraction",
                "n_ensembles"):
        assert key in d
    assert d["steps"] == steps and d["walkers"] == 16 and d["converged"] is True
    assert steps >= 50 * d["max_autocorr_time"]  # common practice (Sokal 1997: 50 tau)
    assert 0.15 <= d["acceptance_min"] and d["acceptance_max"] <= 0.7
    draws = out.posterior_draws()
    assert draws["a"].dims == ("chain", "draw")
    assert draws["a"].attrs["units"] == "meV" and draws["b"].attrs["long_name"] == "slope"
    assert draws.sizes["chain"] == 16
    expected = len(range(out.burn_in, steps, out.thin))
    assert draws.sizes["draw"] == expected


def test_same_seed_is_bit_identical(map_start):
    # common practice, no published source: a recorded seed reproduces the run exactly
    kw = {**FAST, "max_steps": 150}
    runs = []
    for seed in (2024, 2024, 7):
        with pytest.warns(ConvergenceWarning):
            runs.append(run_ensemble(loglike, SPACE, map_start, kw, seed=seed))
    np.testing.assert_array_equal(runs[0].chains, runs[1].chains)
    np.testing.assert_array_equal(runs[0].log_prob, runs[1].log_prob)
    assert runs[0].diagnostics == runs[1].diagnostics
    assert not np.array_equal(runs[0].chains[0, :5], runs[2].chains[0, :5])
    assert runs[0].seed_entropy == 2024 and runs[2].seed_entropy == 7


def test_different_seeds_are_statistically_consistent(converged_run, map_start):
    # common practice, no published source: independent seeds agree within Monte Carlo error
    other = run_ensemble(loglike, SPACE, map_start, FAST, seed=7)
    assert other.converged
    d1, d2 = converged_run.posterior_draws(), other.posterior_draws()
    for name in SPACE.names:
        v1, v2 = d1[name].values.ravel(), d2[name].values.ravel()
        mcse = np.hypot(v1.std() / np.sqrt(converged_run.diagnostics["ess_bulk"][name]),
                        v2.std() / np.sqrt(other.diagnostics["ess_bulk"][name]))
        assert abs(v1.mean() - v2.mean()) < 4 * mcse
        assert v1.std() == pytest.approx(v2.std(), rel=0.15)


def test_seed_sequence_is_accepted_and_recorded(map_start):
    # common practice, no published source (numpy.random.SeedSequence spawning)
    seq = np.random.SeedSequence(99).spawn(3)[2]
    kw = {**FAST, "max_steps": 60}
    with pytest.warns(ConvergenceWarning):
        a = run_ensemble(loglike, SPACE, map_start, kw, seed=seq)
    with pytest.warns(ConvergenceWarning):
        b = run_ensemble(loglike, SPACE, map_start, kw,
                         seed=np.random.SeedSequence(99, spawn_key=(2,)))
    np.testing.assert_array_equal(a.chains, b.chains)
    assert a.seed_entropy == 99 and a.seed_spawn_key == (2,)


def test_not_converged_warns_and_says_why(map_start):
    # common practice, no published source
    with pytest.warns(ConvergenceWarning, match="max_steps = 120") as rec:
        out = run_ensemble(loglike, SPACE, map_start, {**FAST, "max_steps": 120}, seed=1)
    # the gate asks for bulk and tail ESS >= 1000 of the reported draws: 120 steps of 16
    # walkers cannot give that, and the warning says so with the numbers
    assert "bulk ESS below the target" in str(rec[0].message)
    assert "target 1000" in str(rec[0].message)
    assert out.diagnostics["min_ess_bulk"] < 1000
    assert out.converged is False and out.diagnostics["converged"] is False
    assert out.reasons and out.diagnostics["reasons"] == out.reasons
    assert out.chains.shape[1] == 120


def test_nan_log_likelihood_names_the_parameter_values(map_start):
    # common practice, no published source: NaN is a bug, never sampled through
    def broken(theta):
        out = loglike(theta)
        return np.where(theta[:, 0] > 0.55, np.nan, out)

    with pytest.raises(FitError, match=r"returned NaN at a = 0\.5[5-9]\d* meV, b = "):
        run_ensemble(broken, SPACE, map_start, FAST, seed=3)


def test_degenerate_or_dead_starting_ensembles_raise(map_start):
    # common practice, no published source
    rng = np.random.default_rng(0)
    a = rng.normal(0.5, 0.1, 16)
    with pytest.raises(FitError, match="degenerate"):
        run_ensemble(loglike, SPACE, np.column_stack([a, 2 * a]), FAST, seed=0)

    def dead(theta):
        return np.where(theta[:, 1] > 1.1, -np.inf, loglike(theta))

    start = np.column_stack([rng.normal(0.5, 0.05, 16), rng.normal(1.1, 0.05, 16)])
    with pytest.raises(FitError, match="start at zero posterior"):
        run_ensemble(dead, SPACE, start, FAST, seed=0)


def test_bad_settings_raise_config_error(map_start):
    # common practice, no published source
    with pytest.raises(ConfigError, match="n_walkers"):
        run_ensemble(loglike, SPACE, map_start, {"n_walkers": 3, "progress": False})
    with pytest.raises(ConfigError, match="n_ensembles >= 4"):
        run_ensemble(loglike, SPACE, map_start,
                     {"strict": True, "n_ensembles": 2, "progress": False})
    with pytest.raises(ConfigError, match="seed"):
        run_ensemble(loglike, SPACE, map_start, {"progress": False}, seed=-1)
    with pytest.raises(ConfigError, match="checkpoint"):
        run_ensemble(loglike, SPACE, map_start, {"progress": False}, resume=True)
    with pytest.raises(ConfigError, match="ess_target must be > 0"):
        run_ensemble(loglike, SPACE, map_start,
                     {"progress": False, "gate": GateSettings(ess_target=0)})
    with pytest.raises(ConfigError, match="walker_groups must be an int >= 2"):
        run_ensemble(loglike, SPACE, map_start,
                     {"progress": False, "gate": GateSettings(walker_groups=1)})


def test_stop_event_ends_cleanly_and_marks_not_converged(map_start):
    # common practice, no published source: the notebook stop button
    stop = threading.Event()
    calls = {"n": 0}

    def counting(theta):
        calls["n"] += 1
        if calls["n"] == 60:
            stop.set()
        return loglike(theta)

    with pytest.warns(ConvergenceWarning, match="stopped on request"):
        out = run_ensemble(counting, SPACE, map_start, {**FAST, "stop_event": stop}, seed=5)
    assert out.converged is False and out.diagnostics["stopped"] is True
    assert 10 < out.chains.shape[1] < 60  # 2 to 4 log-likelihood calls per step
    assert calls["n"] <= 60 + 4  # ended within the step in which the event was set


def test_extras_are_stored_per_draw(map_start):
    # analytic identity: chi^2 = -2 log L for the Gaussian likelihood, recomputed per draw
    def with_chi2(theta):
        ll = loglike(theta)
        return ll, (-2.0 * ll)[:, None]

    with pytest.warns(ConvergenceWarning):
        out = run_ensemble(with_chi2, SPACE, map_start, {**FAST, "max_steps": 100}, seed=6,
                           log_prob_extras={"chi2": "1"})
    draws = out.posterior_draws()
    assert draws["chi2"].attrs["units"] == "1"
    theta = np.stack([draws["a"].values.ravel(), draws["b"].values.ravel()], axis=1)
    np.testing.assert_allclose(draws["chi2"].values.ravel(), -2.0 * loglike(theta),
                               rtol=1e-12)


def test_strict_mode_gates_on_nested_rhat(map_start):
    # Source: Margossian et al., arXiv:2110.13017 (2022): nested R-hat <= 1.01 over four
    # independently seeded ensembles of the same posterior
    out = run_ensemble(loglike, SPACE, map_start,
                       {**FAST, "strict": True, "gate": GateSettings(tau_rtol=0.05)}, seed=11)
    assert out.converged, out.reasons
    assert out.chains.shape[0] == 4
    assert out.diagnostics["nested_rhat"] <= 1.01
    draws = out.posterior_draws()
    assert draws.sizes["chain"] == 64
    assert sorted(set(draws["ensemble"].values.tolist())) == [0, 1, 2, 3]
    # the ensembles are independent: their first steps differ
    assert not np.array_equal(out.chains[0, 0], out.chains[1, 0])


def test_strict_mode_reports_a_stuck_ensemble(map_start):
    # Source: Margossian et al., arXiv:2110.13017 (2022): an ensemble confined to another
    # mode keeps nested R-hat above 1.01; a bimodal posterior with a barrier no move crosses
    def two_modes(theta):
        a = theta[:, 0]
        ll = np.logaddexp(-0.5 * ((a - 2.0) / 0.1) ** 2, -0.5 * ((a + 2.0) / 0.1) ** 2)
        return ll - 0.5 * theta[:, 1] ** 2

    sp = ParameterSpace([Parameter("a", "meV", Prior.uniform(-4, 4)),
                         Parameter("b", "meV", Prior.uniform(-6, 6))])
    rng = np.random.default_rng(8)
    starts = np.stack([np.column_stack([rng.normal(m, 0.05, 16), rng.normal(0, 0.5, 16)])
                       for m in (2.0, 2.0, 2.0, -2.0)])
    with pytest.warns(ConvergenceWarning, match="nested R-hat"):
        out = run_ensemble(two_modes, sp, starts,
                           {**FAST, "strict": True, "max_steps": 300,
                            "gate": GateSettings(tau_rtol=0.05)}, seed=12)
    assert out.diagnostics["nested_rhat"] > 1.01
    assert out.converged is False


def test_progress_bar_runs(map_start, capsys):
    # common practice, no published source: the tqdm.auto bar is drawn when asked for
    with pytest.warns(ConvergenceWarning):
        run_ensemble(loglike, SPACE, map_start, {**FAST, "max_steps": 60, "progress": True},
                     seed=1)
    assert "MCMC" in capsys.readouterr().err


def test_global_random_state_is_untouched(map_start):
    # common practice, no published source: the engine never draws from numpy's global state
    before = np.random.get_state()  # noqa: NPY002 (reading it is the point of the test)
    with pytest.warns(ConvergenceWarning):
        run_ensemble(loglike, SPACE, map_start, {**FAST, "max_steps": 40}, seed=9)
    after = np.random.get_state()  # noqa: NPY002
    assert before[0] == after[0] and before[2:] == after[2:]
    np.testing.assert_array_equal(before[1], after[1])


def test_a_converged_run_reports_what_the_gate_asked_for(converged_run):
    # Source: Vehtari et al., Bayesian Analysis 16, 667 (2021): bulk and tail ESS and
    # rank-normalised R-hat of the reported draws; the run stops once every parameter's
    # reach the target (1000) and R-hat over four groups of walkers is <= 1.01
    d = converged_run.diagnostics
    assert d["converged"] and d["ess_target"] == {"a": 1000.0, "b": 1000.0}
    assert d["min_ess_bulk"] >= 1000 and d["min_ess_tail"] >= 1000
    assert d["walker_groups"] == 4 and max(d["group_rhat"].values()) <= 1.01
    # the chain is at least 25 autocorrelation times long (the floor), but not required to
    # reach the former 50
    assert d["steps"] >= 25 * d["max_autocorr_time"]


def test_noise_parameters_get_the_lower_ess_target(map_start):
    # Source: Vehtari et al., Bayesian Analysis 16, 667 (2021) recommend ESS > 400; a noise
    # scale is only marginalised over, so its target is min(ess_target, 400)
    space = ParameterSpace(list(SPACE) + [Parameter("noise_scale", "1",
                                                    Prior.uniform(0.5, 2.0))])

    def like(theta):
        return loglike(theta[:, :2]) - 0.5 * ((theta[:, 2] - 1.0) / 0.1) ** 2

    out = run_ensemble(like, space, np.r_[map_start.x, 1.0], FAST, seed=5)
    assert out.diagnostics["ess_target"] == {"a": 1000.0, "b": 1000.0, "noise_scale": 400.0}


def test_default_moves_reproduce_the_spread_of_a_correlated_gaussian():
    # Source: the multivariate normal distribution: the central 68 % interval of each
    # marginal is +-0.9945 sd (scipy.stats.norm.ppf(0.84)), sd from the covariance's
    # diagonal.  Measured: emcee 3.1.6's DESnookerMove at weight 0.2 gave intervals 2.8 %
    # too narrow on average (0.955-0.987 over 21 marginals); DE alone 0.998 (0.983-1.011)
    from scipy import stats

    p = 7
    rng = np.random.default_rng(0)
    a = rng.normal(size=(p, p))
    cov = a @ a.T + 0.1 * p * np.eye(p)
    prec = np.linalg.inv(cov)
    sd = np.sqrt(np.diag(cov))
    space = ParameterSpace([Parameter(f"p{i}", "1", Prior.uniform(-100, 100))
                            for i in range(p)])

    def gauss(theta):
        return -0.5 * np.einsum("wi,ij,wj->w", theta, prec, theta)

    ratios = []
    for seed in (1, 2, 3):
        with warnings.catch_warnings():  # fixed length on purpose
            warnings.simplefilter("ignore", ConvergenceWarning)
            out = run_ensemble(gauss, space, np.zeros(p),
                               {"n_walkers": 32, "max_steps": 8000, "min_steps": 8000,
                                "check_every": 8000, "progress": False,
                                "gate": GateSettings(ess_rhat=False)}, seed=seed)
        x = out.chains[0, 1000:].reshape(-1, p)
        q16, q84 = np.quantile(x, [0.16, 0.84], axis=0)
        ratios.append(0.5 * (q84 - q16) / (stats.norm.ppf(0.84) * sd))
    assert abs(np.mean(ratios) - 1.0) < 0.01, np.round(ratios, 3)

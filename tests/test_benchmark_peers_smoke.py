"""Smoke test of the peer and three-oscillator benchmarks (tests/benchmarks/bench_peers.py,
bench_three.py): each runs on a tiny problem, and what they compute other than times is
checked against references outside them.

Nothing here asserts on time.  The emcee script's likelihood is written in numpy
independently of polkit's models; it must equal polkit's whole-map log-likelihood where
the amplitudes are positive (a self-consistency check of two independent codes on data
simulated by polkit's forward model).
"""

from __future__ import annotations

import importlib
import json
import sys
from pathlib import Path

import numpy as np
import pytest

BENCH = Path(__file__).resolve().parent / "benchmarks"


@pytest.fixture(scope="module")
def bench():
    added = str(BENCH) not in sys.path
    if added:
        sys.path.insert(0, str(BENCH))
    try:
        yield importlib.import_module
    finally:
        if added:
            sys.path.remove(str(BENCH))


@pytest.fixture(scope="module")
def tiny(bench) -> dict:
    return {
        "peers": bench("bench_peers").run(True, n_angles=6, n_energies=60, target_ess=50,
                                          max_steps=200, check_every=100),
        "three": bench("bench_three").run(True, n_angles=5, n_energies=40, n_walkers=4,
                                          repeats=2),
    }


def test_script_likelihood_equals_polkit_whole_map_likelihood(bench):
    # self-consistency of two independent codes on a map simulated by polkit's forward
    # model; common practice, no published source
    hot = bench("bench_hot_path")
    peers = bench("bench_peers")
    da, inv_var, _ = hot.simulated_map(9, 120, seed=3)
    problem = hot.problem_for(da, inv_var)
    model = peers.script_model_for(problem)
    x = hot.truth_vector(problem.space)
    assert peers.same_likelihood(problem, model, x) <= 1e-8


def test_group_rhat_flags_groups_that_disagree(bench):
    # Source: Vehtari et al., Bayesian Analysis 16, 667 (2021): rank-normalised split
    # R-hat is about 1 for independent draws of one distribution and well above 1.01 when
    # chains sample different locations
    peers = bench("bench_peers")
    rng = np.random.default_rng(4)
    same = rng.standard_normal((2000, 16, 2))
    assert peers._diagnostics(same, ["a", "b"], 4)["max_rhat_groups"] < 1.01
    shifted = same.copy()
    shifted[:, :4, 0] += 1.0  # the first group of walkers sits elsewhere in "a"
    assert peers._diagnostics(shifted, ["a", "b"], 4)["max_rhat_groups"] > 1.05
    # and ESS of independent draws is about their number (walkers x steps)
    ess = peers._diagnostics(same, ["a", "b"], 4)["min_ess_bulk"]
    assert 0.8 * 32000 < ess < 1.2 * 32000


def test_least_squares_peer_recovers_a_noiseless_map(bench):
    # Source: a least-squares fit of noise-free data returns the generating parameters
    hot = bench("bench_hot_path")
    peers = bench("bench_peers")
    _, inv_var, clean = hot.simulated_map(12, 160, seed=5)
    da, _, _ = hot.simulated_map(12, 160, seed=5)
    da = da.copy(data=clean)
    problem = hot.problem_for(da, inv_var)
    model = peers.script_model_for(problem)
    truth = np.array([hot.TRUTH[n] for n in peers.PHYSICS])
    fit = peers.least_squares_fit(model, truth * (1 + 2e-4))
    np.testing.assert_allclose(fit["x"], truth, rtol=1e-6)


def test_peers_benchmark_runs(tiny):
    r = tiny["peers"]
    assert r["same_likelihood_max_rel_diff"] <= 1e-8
    for key in ("ess_per_second_ratio_vs_emcee", "time_to_answer_ratio_vs_emcee",
                "time_to_answer_ratio_vs_least_squares"):
        assert r[key] > 0
    assert r["emcee_script"]["steps"] <= 200
    assert len(r["least_squares"]["x"]) == 6


def test_three_benchmark_runs(tiny):
    r = tiny["three"]
    assert r["three_vs_two_call_ratio"] > 0
    if r["compiled_path"]:
        # common practice, no published source: the compiled poles feed the same likelihood
        assert r["three_compiled_minus_numpy_max_rel"] <= 1e-10


def test_runner_prints_the_new_figures(bench, tiny):
    runner = bench("run")
    figures = runner.figures(tiny)
    for key in ("ess_per_second_ratio_vs_emcee", "time_to_answer_ratio_vs_emcee",
                "time_to_answer_ratio_vs_least_squares", "three_vs_two_call_ratio"):
        assert figures[key] is not None and figures[key] > 0
    json.loads(json.dumps(figures))


def test_script_posterior_equals_polkit_posterior_up_to_a_constant(bench):
    # self-consistency of two independent codes: the script's uniform and log-uniform
    # priors plus its likelihood give polkit's log posterior up to one constant (the
    # priors' normalisation); common practice, no published source
    from polkit.inference import LogPosterior

    hot = bench("bench_hot_path")
    peers = bench("bench_peers")
    da, inv_var, _ = hot.simulated_map(7, 90, seed=6)
    problem = hot.problem_for(da, inv_var)
    model = peers.script_model_for(problem)
    x = hot.truth_vector(problem.space)
    rng = np.random.default_rng(7)
    # posterior-sized steps (far away a branch amplitude can turn negative, where
    # polkit's non-negative solve and the script's unconstrained one part, by design)
    theta = x * (1.0 + 2e-5 * rng.standard_normal((5, x.size)))
    outside = theta[:1].copy()
    outside[0, problem.space.names.index("n_eff")] = 99.0  # beyond the prior bound
    theta = np.vstack([theta, outside])
    ours = model.log_prob(theta)
    theirs = LogPosterior(problem.log_likelihood, problem.space)(theta)
    assert np.isneginf(ours[-1]) and np.isneginf(theirs[-1])
    offset = ours[:-1] - theirs[:-1]
    np.testing.assert_allclose(offset - offset[0], 0.0, atol=1e-8 * np.abs(theirs[0]))

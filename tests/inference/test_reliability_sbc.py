"""Calibrated posteriors and reproducible runs.

Simulation-based calibration (Talts et al., arXiv:1804.06788, 2018) of the three models a
physicist puts intervals from into a paper: the peak-table dispersion model, the whole-map
model on small maps, and the coherent-drive model (the cases, their invented priors and the
rank statistics live in tests/sbc_tools.py).  The reduced campaigns (20 simulations each)
run by default; the full ones (100 simulations each) run with ``-m slow`` and print the
table recorded in the README::

    .venv/bin/python -m pytest -m slow tests/inference/test_reliability_sbc.py -s

Then the seeds: one seed gives bit-identical summaries, two seeds give medians that agree
within their Monte Carlo errors.
"""

from __future__ import annotations

import math
import os

import numpy as np
import pytest
from sbc_tools import (
    FULL,
    REDUCED,
    SEED,
    PeakTableCase,
    SamplerSettings,
    central_coverage,
    chi2_uniformity,
    run_sbc,
    sample,
)

from polkit.inference import FitResult

CASES = ["peak_table", "whole_map", "coherent"]
WORKERS = min(2, os.cpu_count() or 1)  # the ranks do not depend on it (seeded per simulation)


# ----------------------------------------------------------------------------------------
# the rank statistics themselves (so that a failure below means the model, not the ruler)
# ----------------------------------------------------------------------------------------
def test_rank_checks_pass_uniform_ranks_and_catch_biased_and_overconfident_ones():
    # Source: Talts et al. (2018), figures 3-5: a shifted posterior skews the rank
    # histogram, a too narrow one makes it U-shaped; exact draws give uniform ranks
    rng = np.random.default_rng(1)
    n_sims, n_draws = 400, 99
    truth = rng.normal(size=n_sims)
    data = truth + rng.normal(size=n_sims)  # y ~ N(theta, 1), theta ~ N(0, 1)
    post_mean, post_sd = data / 2.0, math.sqrt(0.5)  # conjugate normal posterior

    def ranks(mean, sd):
        draws = mean[:, None] + sd * rng.normal(size=(n_sims, n_draws))
        return np.sum(draws < truth[:, None], axis=1)

    exact = ranks(post_mean, post_sd)
    assert chi2_uniformity(exact, n_draws, 10) > 0.01
    cov, expected = central_coverage(exact, n_draws, 0.68)
    assert expected == 0.68 and abs(cov - expected) < 0.08
    assert chi2_uniformity(ranks(post_mean + 0.5, post_sd), n_draws, 10) < 1e-6  # biased
    narrow = ranks(post_mean, 0.4 * post_sd)
    assert chi2_uniformity(narrow, n_draws, 10) < 1e-6  # overconfident
    assert central_coverage(narrow, n_draws, 0.68)[0] < 0.5


# ----------------------------------------------------------------------------------------
# reduced campaigns (default run)
# ----------------------------------------------------------------------------------------
@pytest.mark.parametrize("name", CASES)
def test_reduced_calibration(name):
    # Source: Talts et al., arXiv:1804.06788 (2018): ranks of the truth uniform, central
    # intervals covering at their nominal rate.  A check proportionate to 20 simulations:
    # 4 rank bins (5 expected per bin) and family-wise 0.1 % over all checks of the model;
    # it catches gross errors (a wrong likelihood, units, a sampler that does not move),
    # the full campaign below the subtler ones.
    run = run_sbc(name, 20, 99, seed=SEED, settings=REDUCED, workers=WORKERS)
    print(run.table(4))
    failures = run.failures(4, 0.001)
    assert not failures, "\n".join([run.table(4), *failures])


# ----------------------------------------------------------------------------------------
# full campaigns (-m slow); the numbers go to the README
# ----------------------------------------------------------------------------------------
_FULL_RUNS: dict[str, object] = {}


def _full(name: str):
    if name not in _FULL_RUNS:
        _FULL_RUNS[name] = run_sbc(name, 100, 199, seed=SEED, settings=FULL, workers=WORKERS)
        print(_FULL_RUNS[name].table(10))
    return _FULL_RUNS[name]


@pytest.mark.slow
@pytest.mark.parametrize("name", CASES)
def test_full_calibration(name):
    # Source: Talts et al., arXiv:1804.06788 (2018): 100 simulations, 199 draws each,
    # 10 rank bins (10 expected per bin); chi-square p > 0.01 and 68 % / 95 % coverage
    # within binomial bounds, at family-wise 1 % (Bonferroni over 3 checks per parameter).
    run = _full(name)
    failures = run.failures(10, 0.01)
    if name == "whole_map":  # the noise scale has its own test below
        failures = [f for f in failures if not f.startswith("noise_scale")]
    assert not failures, "\n".join([run.table(10), *failures])


@pytest.mark.slow
def test_full_calibration_of_the_whole_map_noise_scale():
    # Source: Talts et al. (2018); the degrees of freedom of a linear least-squares
    # residual, N - K (e.g. Gelman et al., Bayesian Data Analysis, 3rd ed., section 14.2)
    run = _full("whole_map")
    failures = [f for f in run.failures(10, 0.01) if f.startswith("noise_scale")]
    assert not failures, "\n".join([run.table(10), *failures])


# ----------------------------------------------------------------------------------------
# seeds
# ----------------------------------------------------------------------------------------
SEEDS_CHECK = SamplerSettings(autocorr_factor=20.0, ess_target=400.0, min_steps=200,
                              max_steps=3000, check_every=50)


def _fit(loglike, space, x0, seed):
    out, _ = sample(loglike, space, x0, seed, SEEDS_CHECK)
    result = FitResult.from_samples(out, space, model="peak_table_check", kind="dispersion",
                                    provenance={"input_sha256": "0" * 64})
    return out, result


def _without_creation_time(summary: dict) -> dict:
    prov = {k: v for k, v in summary["provenance"].items() if "created" not in k}
    return {**summary, "provenance": prov}


def test_same_seed_is_bit_identical_and_other_seeds_agree_within_errors():
    # common practice, no published source (seeded SeedSequence -> identical chains);
    # standard error of a median sqrt(pi/2) sd / sqrt(ESS) for a near-normal posterior
    # (asymptotic variance of the sample median, e.g. Kendall and Stuart), ESS from ArviZ
    case = PeakTableCase()
    truth = case.space.sample_prior(np.random.default_rng(41), 1)[0]
    loglike, x0, space = case.problem(truth, np.random.default_rng(42))
    out_a, a = _fit(loglike, space, x0, 11)
    out_b, b = _fit(loglike, space, x0, 11)
    np.testing.assert_array_equal(out_a.chains, out_b.chains)
    assert _without_creation_time(a.summary()) == _without_creation_time(b.summary())
    for seed in (12, 13):
        out_c, c = _fit(loglike, space, x0, seed)
        assert not np.array_equal(out_c.chains[0, -1], out_a.chains[0, -1])
        for name in space.names:
            x, y = a.draws(name), c.draws(name)
            se = [math.sqrt(math.pi / 2) * np.std(v) / math.sqrt(o.diagnostics["ess_bulk"][name])
                  for v, o in ((x, out_a), (y, out_c))]
            assert abs(np.median(x) - np.median(y)) < 4 * math.hypot(*se), (name, seed)

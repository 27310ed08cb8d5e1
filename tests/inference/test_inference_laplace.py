"""The quick answer: the Laplace summary at the mode, its refusals and its comparison with MCMC."""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pytest
from scipy import stats

from polkit.cli import main
from polkit.inference import LogPosterior, Parameter, ParameterSpace, Prior, find_map
from polkit.inference.laplace import LABEL, compare_with_mcmc, format_quick, laplace_summary

DEMO = Path(__file__).resolve().parents[2] / "data_examples"

# invented straight-line data y = a + b x with known Gaussian noise
X = np.linspace(-1.0, 1.0, 20)
NOISE = 0.3
Y = 0.5 + 1.2 * X + NOISE * np.random.default_rng(3).standard_normal(X.size)
PRIOR_SD = 2.0
SPACE = ParameterSpace([Parameter("a", "meV", Prior.normal(0.0, PRIOR_SD)),
                        Parameter("b", "meV", Prior.normal(0.0, PRIOR_SD)),
                        Parameter("noise_scale", "1", Prior.uniform(0.5, 2.0))])


def loglike(theta):
    model = theta[:, 0:1] + theta[:, 1:2] * X
    return -0.5 * np.sum((Y - model) ** 2, axis=1) / NOISE**2 + 0.0 * theta[:, 2]


def test_laplace_is_exact_for_the_conjugate_linear_gaussian_posterior():
    # Source: Bishop, Pattern Recognition and Machine Learning (2006), eqs. 3.53-3.54 (the
    # posterior is Gaussian, so its Laplace approximation is exact).  The noise_scale here
    # has a flat likelihood: as a nuisance parameter it is left out of the summary, but the
    # flat direction makes the whole Hessian singular, so it is fixed for this check
    space = ParameterSpace(list(SPACE)[:2])

    def like(theta):
        return loglike(np.column_stack([theta, np.ones(len(theta))]))

    start = find_map(LogPosterior(like, space), space, np.zeros(2))
    design = np.column_stack([np.ones_like(X), X])
    alpha, beta = 1.0 / PRIOR_SD**2, 1.0 / NOISE**2
    cov = np.linalg.inv(alpha * np.eye(2) + beta * design.T @ design)
    mean = beta * cov @ design.T @ Y
    out = laplace_summary(like, space, start)
    assert out["available"] and out["method"] == LABEL
    for j, name in enumerate(("a", "b")):
        p = out["parameters"][name]
        assert p["units"] == "meV"
        assert p["median"] == pytest.approx(mean[j], abs=1e-4 * np.sqrt(cov[j, j]))
        assert p["sd"] == pytest.approx(np.sqrt(cov[j, j]), rel=1e-4)
        # Source: the normal quantiles 0.16/0.84 and 0.025/0.975 (scipy.stats.norm)
        assert p["q84"] - p["median"] == pytest.approx(stats.norm.ppf(0.84) * p["sd"])
        assert p["q97_5"] - p["median"] == pytest.approx(1.959964 * p["sd"], rel=1e-6)
    assert "approximate (Laplace, before MCMC)" in format_quick(out)
    json.dumps(out)  # JSON-ready


def test_a_flat_direction_gives_no_quick_answer_and_says_why():
    # common practice, no published source: with only a + b constrained, the curvature is
    # singular and the Laplace approximation cannot identify a and b
    space = ParameterSpace([Parameter("a", "meV", Prior.uniform(-10, 10)),
                            Parameter("b", "meV", Prior.uniform(-10, 10))])

    def like(theta):
        return -0.5 * ((theta[:, 0] + theta[:, 1] - 1.0) / 0.1) ** 2

    start = find_map(LogPosterior(like, space), space, np.array([0.3, 0.4]))
    out = laplace_summary(like, space, start)
    assert not out["available"] and not out["parameters"]
    assert "not identifiable" in out["reason"]
    assert "not available" in format_quick(out)
    assert compare_with_mcmc(out, {"a": np.zeros(10)})["gaussian_enough"] is False


def test_comparison_with_mcmc_reports_shift_and_sd_ratio_and_flags_a_skewed_posterior():
    # Source: the normal and lognormal distributions (scipy.stats): Gaussian draws around
    # the mode agree with the Laplace summary; a lognormal (sigma 0.5) posterior whose mode
    # exp(-0.25) lies 0.35 of its sd below its median does not
    rng = np.random.default_rng(9)
    quick = {"available": True, "parameters": {"g": {"median": 1.0, "sd": 0.2, "units": "meV"}}}
    same = compare_with_mcmc(quick, {"g": rng.normal(1.0, 0.2, 200_000)})
    assert abs(same["parameters"]["g"]["shift_in_sd"]) < 0.02
    assert same["parameters"]["g"]["sd_ratio"] == pytest.approx(1.0, abs=0.02)
    assert same["gaussian_enough"]
    shifted = compare_with_mcmc(quick, {"g": rng.normal(1.1, 0.2, 200_000)})
    assert shifted["parameters"]["g"]["shift_in_sd"] == pytest.approx(0.5, abs=0.02)
    assert not shifted["gaussian_enough"]
    draws = rng.lognormal(0.0, 0.5, 200_000)
    mode = float(np.exp(-0.25))
    skew = {"available": True, "parameters": {"g": {"median": mode, "sd": 0.5 * mode,
                                                    "units": "meV"}}}
    res = compare_with_mcmc(skew, {"g": draws})
    assert res["parameters"]["g"]["shift_in_sd"] > 0.3 and not res["gaussian_enough"]


def test_cli_quick_writes_only_the_labelled_quick_summary(tmp_path, capsys):
    # common practice, no published source: --quick stops at the mode, exit status 0, no
    # chains; the invented demo map's peak table constrains every physics parameter
    out = tmp_path / "q"
    status = main(["dispersion", str(DEMO / "ds1_p2_emission_nm.txt"), "--peaks-only",
                   "--quick", "--seed", "1", "--quiet", "--out", str(out)])
    assert status == 0
    text = capsys.readouterr().out
    assert "approximate (Laplace, before MCMC)" in text and "quick_summary.json" in text
    assert sorted(p.name for p in out.iterdir() if not p.name.startswith(".")) == [
        "quick_summary.json"]
    summary = json.loads((out / "quick_summary.json").read_text())
    assert summary["available"] and summary["method"] == LABEL
    rabi = summary["parameters"]["rabi_splitting"]
    assert rabi["units"] == "meV" and 0 < rabi["sd"] < 0.1 * rabi["median"]
    assert "noise_scale" not in summary["parameters"]


def test_fit_power_quick_returns_the_quick_answer_without_chains(tmp_path):
    # common practice, no published source: quick=True stops at the mode of the invented
    # demo power series; the curvature there identifies every physics parameter
    from polkit.jobs.power.run import fit_power

    out = tmp_path / "p"
    summary = fit_power(DEMO / "ds1_p1_power_coherent.csv", model="coherent", seed=1,
                        out=out, sampler={"progress": False}, quick=True)
    assert summary["available"] and summary["method"] == LABEL
    assert not (out / "chains.h5").exists() and (out / "quick_summary.json").exists()
    for v in summary["parameters"].values():
        assert v["units"] and v["sd"] > 0 and v["q2_5"] < v["median"] < v["q97_5"]

"""The power-series model check, and the Gaussian-spot fit on loops made without polkit.

The loops come from tests/coherent_loops.py (the cubic solved by numpy, each sweep and each
radius following its own history, the spot integrated over radius there), with 3 % noise
plus a floor and jittered power readings.  Every number is invented.  The fits run short
chains to keep the file fast, so the convergence warning is silenced where they run.
"""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from coherent_loops import centre_thresholds, gaussian_loop, loop_powers, noisy_series, point_loop

from polkit.cli import EXIT_MODEL_CHECK, main
from polkit.errors import ConvergenceWarning
from polkit.inference import SamplerSettings
from polkit.jobs.power.check import _runs, noise_floor
from polkit.jobs.power.options import PowerCalibration
from polkit.jobs.power.problem import PowerProblem
from polkit.jobs.power.run import fit_power

# invented sample: Delta = 0.5 meV, gamma = 0.2 meV (Delta/gamma = 2.5), alpha kappa = 0.006
# meV^3/mW, 2000 counts per meV of blueshift
D, G, F1, S = 0.5, 0.2, 0.006, 2000.0
POWERS = loop_powers(0.3, 12.0, 20)


def _fit(series, spot, *, max_steps=300, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # short chains on purpose
        return fit_power(series, model="coherent", calibration=PowerCalibration(spot=spot),
                         seed=3, sampler=SamplerSettings(max_steps=max_steps, n_walkers=16,
                                                         progress=False),
                         figures=False, **kwargs)


@pytest.fixture(scope="module")
def gaussian_data():
    return noisy_series(POWERS, gaussian_loop(D, G, F1, POWERS), scale=S * G, seed=2)


@pytest.fixture(scope="module")
def gaussian_fit(gaussian_data):
    return _fit(gaussian_data, "gaussian")


def test_point_loop_passes_with_an_error_column_and_with_the_data_alone():
    y = point_loop(D, G, F1, POWERS)
    with_errors = _fit(noisy_series(POWERS, y, scale=S * G, seed=1), "point")
    check = with_errors.summary()["model_check"]
    assert check["passed"] and check["ran"], check
    assert check["noise_floor"]["intensity"]["source"] == "error column"
    assert check["noise_floor"]["intensity"]["units"] == "counts"
    alone = _fit(noisy_series(POWERS, y, scale=S * G, seed=1, errors=False, rel=0.0,
                              floor=15.0), "point")
    check = alone.summary()["model_check"]
    assert check["passed"], check
    floor = check["noise_floor"]["intensity"]
    assert floor["source"] == "neighbouring points"
    # the true noise is 15 counts; curvature can only raise the estimate (lenient side)
    assert 10.0 < floor["value"] < 25.0


def test_point_model_fails_the_check_on_a_gaussian_spot_loop(gaussian_data):
    result = _fit(gaussian_data, "point")
    check = result.summary()["model_check"]
    assert not check["passed"]
    assert check["statistic"] > check["threshold"]
    assert "--spot gaussian" in check["advice"]
    assert all(w["units"] == "mW" for w in check["worst"])
    # the symptom: the single-mode up threshold is far off the centre's
    p_up = centre_thresholds(D, G, F1)[0]
    assert result.summary()["parameters"]["power_up_threshold"]["median"] > 1.2 * p_up


def test_point_model_fails_without_an_error_column_too():
    series = noisy_series(POWERS, gaussian_loop(D, G, F1, POWERS), scale=S * G, seed=5,
                          errors=False, rel=0.0, floor=15.0)
    check = _fit(series, "point").summary()["model_check"]
    assert not check["passed"]
    assert check["noise_floor"]["intensity"]["source"] == "neighbouring points"


def test_gaussian_fit_recovers_detuning_and_centre_thresholds(gaussian_fit):
    s = gaussian_fit.summary()
    assert s["model_check"]["passed"], s["model_check"]
    p_up, p_down = centre_thresholds(D, G, F1)  # Source: Baas et al., PRA 69, 023809 (2004)
    for name, truth in (("detuning_ratio", D / G), ("power_up_threshold", p_up),
                        ("power_down_threshold", p_down)):
        e = s["parameters"][name]
        sd = 0.5 * (e["q84"] - e["q16"])
        assert abs(e["median"] - truth) < 3.0 * sd, (name, truth, e)
    assert s["provenance"]["spot"] == "gaussian"
    jumps = s["provenance"]["observed_jumps"]
    assert [j["sweep"] for j in jumps] == ["up", "down"] and jumps[0]["units"] == "mW"


def test_model_check_survives_save_and_load(gaussian_fit, tmp_path):
    from polkit.inference import FitResult
    from polkit.jobs.power.run import PowerFit

    gaussian_fit.save(tmp_path)
    on_disk = json.loads((tmp_path / "summary.json").read_text())
    assert on_disk["model_check"]["passed"] is True
    assert FitResult.load(tmp_path).summary()["model_check"] == on_disk["model_check"]
    assert PowerFit.load(tmp_path).problem().spot == "gaussian"


def test_cli_exits_4_when_the_model_check_fails(gaussian_data, tmp_path, capsys):
    path = tmp_path / "loop.nc"
    gaussian_data.to_netcdf(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        status = main(["power", str(path), "--model", "coherent", "--spot", "point",
                       "--seed", "3", "--max-steps", "300", "--walkers", "16", "--quiet",
                       "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    # 3 (not converged) takes precedence; these short chains may not pass the gate
    assert status in (EXIT_MODEL_CHECK, 3)
    assert "model check failed" in err and "--spot gaussian" in err
    summary = json.loads((tmp_path / "out" / "summary.json").read_text())
    assert summary["model_check"]["passed"] is False
    if summary["diagnostics"]["converged"]:
        assert status == EXIT_MODEL_CHECK


def test_noise_floor_from_the_data_alone_is_unbiased_on_a_straight_line():
    # Source: Satterthwaite, Biometrics Bulletin 2, 110 (1946) for the effective degrees of
    # freedom nu; on a straight line a second difference is pure noise, so the estimate is
    # unbiased for the variance and its relative spread is about 1 / sqrt(2 nu)
    from polkit.data import make_series

    rng = np.random.default_rng(0)
    p = np.sort(rng.uniform(0.5, 10.0, 200))
    est, nus = [], []
    for _ in range(40):
        y = 100.0 + 30.0 * p + 4.0 * rng.standard_normal(p.size)
        prob = PowerProblem.from_series(make_series(p, y, units="counts", sweep=["up"] * 200),
                                        "coherent")
        fl = noise_floor(prob)["intensity"]
        assert fl.source == "neighbouring points"
        est.append(fl.data_estimate)
        nus.append(fl.dof)
    est = np.array(est)
    expected_sd = 4.0 / np.sqrt(2.0 * np.mean(nus))
    assert abs(np.mean(est) - 4.0) < 3.0 * expected_sd / np.sqrt(est.size) + 0.02
    assert 0.6 < np.std(est) / expected_sd < 1.5


def test_runs_count_matches_wald_wolfowitz():
    # Source: Wald and Wolfowitz, Ann. Math. Stat. 11, 147 (1940):
    # E[R] = 2 n+ n- / n + 1, Var[R] = 2 n+ n- (2 n+ n- - n) / (n^2 (n - 1))
    signs = np.array([1, 1, -1, -1, -1, 1, -1, 1, 1, 1], dtype=float)
    runs, mean, var = _runs(signs, [(0, 10, "none")])
    assert runs == 5
    assert mean == pytest.approx(2 * 6 * 4 / 10 + 1)
    assert var == pytest.approx(2 * 6 * 4 * (2 * 6 * 4 - 10) / (100 * 9))

"""Model comparison of dispersion models: weak coupling, two and three oscillators."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest
from scipy import integrate, stats

from polkit.cli import EXIT_NOT_CONVERGED, main
from polkit.data import make_map
from polkit.errors import ConfigError, ConvergenceWarning, DataWarning
from polkit.inference import SamplerSettings
from polkit.jobs.dispersion.compare import _split_priors, compare_models
from polkit.jobs.dispersion.comparison import COMPARISON_FILE, ModelComparison, ModelScore
from polkit.jobs.dispersion.criteria import information_criteria, pointwise_log_likelihood
from polkit.jobs.dispersion.parameters import default_space
from polkit.jobs.dispersion.problem import DispersionProblem
from polkit.models.bare_modes import bare_mode_basis
from polkit.models.simulate import simulate_map
from polkit.models.spectral import emission_basis
from polkit.numerics.projection import project_linear

MEV = 1e-3
#: no progress bars, the job's default step limits
QUIET = SamplerSettings(progress=False)
ANGLES = np.linspace(-20.0, 20.0, 17)
ENERGY = np.linspace(1.5320, 1.5610, 110)
TRUTH = dict(e_c0=1.5420, n_eff=3.4, e_x=1.5450, gamma_c=0.25 * MEV, gamma_x=0.6 * MEV)


def _strong_map(seed=5):
    """Invented GaAs-like map with a 10 meV Rabi splitting (the project's own forward model)."""
    rng = np.random.default_rng(seed)
    phys = dict(TRUTH, g=5.0 * MEV)
    unit = simulate_map(ANGLES, ENERGY, kind="emission", amplitudes=[1.0, 0.3], **phys)
    scale = 2000.0 / unit.signal.max()
    mean = simulate_map(ANGLES, ENERGY, kind="emission", amplitudes=[scale, 0.3 * scale],
                        background=50.0, **phys).signal
    y = rng.poisson(mean) + rng.normal(0.0, 3.0, mean.shape)
    return make_map(y, angle=ANGLES, energy=ENERGY, units="counts", kind="emission", gain=1.0,
                    read_noise=3.0)


def _weak_map(seed=6):
    """Invented map of an uncoupled cavity mode crossing a flat exciton line (g = 0)."""
    rng = np.random.default_rng(seed)
    b = np.asarray(bare_mode_basis(ANGLES, ENERGY, e_c0=1.5420, n_eff=3.4, e_x=1.5450,
                                   gamma_c=0.4 * MEV, gamma_x=0.8 * MEV))
    mean = b[:, 0] + 0.5 * b[:, 1]
    mean = mean * 2000.0 / mean.max() + 50.0
    y = rng.poisson(mean) + rng.normal(0.0, 3.0, mean.shape)
    return make_map(y, angle=ANGLES, energy=ENERGY, units="counts", kind="emission", gain=1.0,
                    read_noise=3.0)


def _problem(da, model="two"):
    y = np.asarray(da.values, float)
    inv = 1.0 / (np.clip(y, 0, None) + 9.0)
    guess = {"exciton_energy": 1.545, "cavity_energy": 1.542, "rabi_splitting": 10.0,
             "cavity_linewidth": 0.25, "exciton_linewidth": 0.6}
    space = default_space(ENERGY, guess, coupling="weak" if model == "weak" else "strong")
    return DispersionProblem(axis="angle", in_plane=ANGLES, energy=ENERGY, y=y, inv_var=inv,
                             space=space, coupling="weak" if model == "weak" else "strong")


def _theta(problem, **values):
    base = {"exciton_energy": 1.545, "cavity_energy": 1.542, "n_eff": 3.4,
            "rabi_splitting": 10.0, "cavity_linewidth": 0.25, "exciton_linewidth": 0.6,
            "noise_scale": 1.0, **values}
    return np.array([base[n] for n in problem.space.names])


# --------------------------------------------------------------------------------------
# the weak-coupling basis
# --------------------------------------------------------------------------------------
def test_bare_mode_columns_are_unit_lorentzians_and_the_g0_limit_of_the_coupled_basis():
    # Source: a Lorentzian (gamma/2/pi) / ((E - E0)^2 + (gamma/2)^2) has unit area
    # (any table of integrals); at g -> 0 the photon spectral function of the coupled modes
    # is the bare cavity Lorentzian (the exciton carries no photon weight).
    energy = np.linspace(1.40, 1.70, 200001)
    b = np.asarray(bare_mode_basis([0.0, 10.0], energy, e_c0=1.542, n_eff=3.4, e_x=1.545,
                                   gamma_c=0.5 * MEV, gamma_x=0.9 * MEV))
    for col in range(2):
        area = integrate.trapezoid(b[0, col], energy)
        # the tails beyond the window hold (gamma/pi) / distance ~ 1e-3 of the area
        assert area == pytest.approx(1.0, abs=2e-3)
    coupled = np.asarray(emission_basis([0.0, 10.0], energy, e_c0=1.542, n_eff=3.4, e_x=1.545,
                                        g=1e-9, gamma_c=0.5 * MEV, gamma_x=0.9 * MEV))
    # E_C < E_X at both angles: the lower branch is the cavity
    np.testing.assert_allclose(coupled[:, 0], b[:, 0], rtol=1e-6, atol=1e-6 * b.max())


def test_bare_reflectance_dip_depth_follows_the_mirror_share():
    # Source: input-output theory of a one-sided cavity, r = 1 - i kappa / (E - E_C + i gamma/2);
    # at resonance R = (1 - 2 kappa / gamma)^2, zero at critical coupling (Haus, Waves and
    # Fields in Optoelectronics, 1984, ch. 7; value from memory)
    gamma = 0.4 * MEV
    for share in (0.2, 0.5, 0.9):
        b = np.asarray(bare_mode_basis([0.0], [1.542], e_c0=1.542, n_eff=3.4, e_x=1.60,
                                       gamma_c=gamma, gamma_x=gamma, kappa=share * gamma))
        assert b[0, 0, 0] == pytest.approx((1.0 - 2.0 * share) ** 2, rel=1e-12)
        # the exciton column is a dip of unit depth at the exciton energy
        d = np.asarray(bare_mode_basis([0.0], [1.60], e_c0=1.542, n_eff=3.4, e_x=1.60,
                                       gamma_c=gamma, gamma_x=gamma, kappa=share * gamma))
        assert d[0, 1, 0] == pytest.approx(-1.0)


# --------------------------------------------------------------------------------------
# pointwise log-likelihood and the correction for solved amplitudes
# --------------------------------------------------------------------------------------
def test_pointwise_log_likelihood_is_the_gaussian_density_of_each_spectrum():
    # Source: scipy.stats.norm.logpdf summed over the unmasked pixels of each spectrum, with
    # the amplitudes solved by the projection and sigma = noise_scale / sqrt(inverse variance).
    da = _strong_map()
    problem = _problem(da)
    problem.inv_var[3, :20] = 0.0  # masked pixels are left out
    problem.set_noise(problem.inv_var)
    theta = _theta(problem, noise_scale=1.3)
    ll, active = pointwise_log_likelihood(problem, theta[None, :])
    sol = project_linear(problem._weighted, None, problem.basis(theta[None, :]), nonneg=True,
                         return_parts=True)
    model = np.asarray(sol.model)[0]
    used = problem.inv_var > 0
    sigma = 1.3 / np.sqrt(np.where(used, problem.inv_var, 1.0))
    expect = np.where(used, stats.norm.logpdf(problem.y, model, sigma), 0.0).sum(axis=1)
    np.testing.assert_allclose(ll[0], expect, rtol=1e-10)
    # two branch amplitudes (both lit) plus the constant background at every angle
    np.testing.assert_array_equal(active[0], 3)


def test_one_nat_per_solved_coefficient_removes_the_in_sample_optimism():
    # Source: Akaike, IEEE Trans. Autom. Control 19, 716 (1974): for Gaussian noise the
    # in-sample log-likelihood at the least-squares fit exceeds the expected log density of
    # a fresh replicate (same truth, new noise, same fitted coefficients) by the number of
    # fitted coefficients; for non-negative least squares by the number of active ones
    # (Meyer and Woodroofe, Ann. Stat. 28, 1083, 2000).
    rng = np.random.default_rng(3)
    problem = _problem(_strong_map())
    theta = _theta(problem)[None, :]
    mean = np.asarray(project_linear(problem._weighted, None, problem.basis(theta),
                                     return_parts=True).model)[0]
    sigma = 1.0 / np.sqrt(problem.inv_var)
    gaps, corrected = [], []
    for _ in range(300):
        y = mean + rng.normal(0.0, sigma)
        y_rep = mean + rng.normal(0.0, sigma)
        problem.y = y
        problem.set_noise(problem.inv_var)
        ll, active = pointwise_log_likelihood(problem, theta)
        fitted = np.asarray(project_linear(problem._weighted, None, problem.basis(theta),
                                           return_parts=True).model)[0]
        ll_rep = stats.norm.logpdf(y_rep, fitted, sigma).sum()
        gaps.append(ll.sum() - ll_rep)
        corrected.append(ll.sum() - active.sum() - ll_rep)
    gaps, corrected = np.array(gaps), np.array(corrected)
    se = corrected.std(ddof=1) / np.sqrt(gaps.size)
    n_coef = 3 * ANGLES.size
    # the uncorrected optimism is the coefficient count (51 nats) ...
    assert abs(gaps.mean() - n_coef) < 4 * se
    # ... and the corrected in-sample density is unbiased for the replicate's
    assert abs(corrected.mean()) < 4 * se


def test_loo_of_a_normal_mean_matches_the_exact_leave_one_out_density():
    # Source: for y_i ~ N(mu, 1) with a flat prior the posterior is N(mean(y), 1/n) and the
    # exact leave-one-out predictive is N(mean(y_-i), 1 + 1/(n - 1)) (Gelman et al., Bayesian
    # Data Analysis, 3rd ed., section 2.5).
    rng = np.random.default_rng(11)
    y = rng.normal(0.3, 1.0, 40)
    mu = rng.normal(y.mean(), 1.0 / np.sqrt(y.size), (4, 2000))
    ll = stats.norm.logpdf(y[None, None, :], mu[..., None], 1.0)
    crit = information_criteria(ll, np.zeros_like(ll), {"mu": mu})
    loo_mean = (y.sum() - y) / (y.size - 1)
    exact = stats.norm.logpdf(y, loo_mean, np.sqrt(1.0 + 1.0 / (y.size - 1))).sum()
    assert crit["elpd_loo"] == pytest.approx(exact, abs=0.05)
    assert crit["elpd_waic"] == pytest.approx(exact, abs=0.05)
    # effective parameters: sum_i var_post(-(y_i - mu)^2 / 2) = sum_i (y_i - ybar)^2 / n
    # + 1 / (2 n) for mu ~ N(ybar, 1/n) (variance of a quadratic in a normal variable);
    # about one, the single sampled parameter
    p_exact = np.sum((y - y.mean()) ** 2) / y.size + 0.5 / y.size
    assert crit["p_loo"] == pytest.approx(p_exact, abs=0.05)
    assert crit["n_high_k"] == 0


# --------------------------------------------------------------------------------------
# the verdict
# --------------------------------------------------------------------------------------
def _score(model, elpd_i):
    elpd_i = np.asarray(elpd_i, float)
    return ModelScore(model=model, elpd_loo=float(elpd_i.sum()), elpd_loo_se=1.0, p_loo=1.0,
                      elpd_waic=float(elpd_i.sum()), elpd_waic_se=1.0, p_waic=1.0,
                      linear_per_spectrum=2.0, n_parameters=6, max_pareto_k=0.2, n_high_k=0,
                      converged=True, elpd_i=elpd_i, pareto_k=np.zeros(elpd_i.size))


def test_a_tie_goes_to_the_simpler_model_and_a_clear_loss_is_named():
    # common practice, no published source (parsimony on a tie; the 4-nat and 2-SE threshold
    # is from Sivula, Magnusson and Vehtari, arXiv:2008.10296, value from memory)
    rng = np.random.default_rng(0)
    base = rng.normal(-100.0, 5.0, 30)
    scores = {"two": _score("two", base), "three": _score("three", base + 0.05),
              "weak": _score("weak", base - 3.0)}
    comp = ModelComparison(scores, {}, "two", "shared", "angle", np.arange(30.0))
    assert comp.ranking == ["three", "two", "weak"]
    assert comp.preferred() == "two"  # three is better by 1.5 nat only
    d, se = comp.difference("weak", "two")
    assert d == pytest.approx(-90.0) and se == pytest.approx(0.0, abs=1e-9)
    assert "weak: -90.0" in comp.verdict() and "clearly worse" in comp.verdict()
    summary = comp.summary()
    assert summary["preferred"] == "two"
    assert summary["models"]["weak"]["elpd_loo"]["units"] == "nat"
    assert json.loads(json.dumps(summary))["caveats"]


def test_priors_naming_a_parameter_no_model_has_are_refused():
    problem = _problem(_strong_map())
    spaces = {"two": problem.space, "weak": _problem(_strong_map(), "weak").space}
    split = _split_priors({"rabi_splitting": {"prior": "uniform", "low": 1, "high": 20,
                                              "units": "meV"}}, spaces)
    assert split["two"] is not None and split["weak"] is None
    with pytest.raises(ConfigError, match="rabi_splitting9"):
        _split_priors({"rabi_splitting9": {"prior": "uniform", "low": 1, "high": 2}}, spaces)


# --------------------------------------------------------------------------------------
# whole comparisons on simulated maps
# --------------------------------------------------------------------------------------
def test_a_strongly_coupled_map_rejects_weak_coupling(tmp_path):
    # Self-consistency check: polkit's own forward model (a 10 meV Rabi splitting with 0.25 and 0.6
    # meV
    # linewidths, far in the strong-coupling regime); the comparison must prefer the
    # two-oscillator model by a wide margin and write its files.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)  # Pareto k of a few spectra
        comp = compare_models(_strong_map(), models=("weak", "two"), seed=1,
                              sampler=QUIET, out=tmp_path)
    assert comp.converged
    assert comp.preferred() == "two"
    d, se = comp.difference("weak", "two")
    assert d < -10 * max(se, 1.0)
    assert comp.fits["two"].summary()["parameters"]["rabi_splitting"]["median"] == pytest.approx(
        10.0, abs=0.2)
    saved = json.loads((tmp_path / COMPARISON_FILE).read_text())
    assert saved["preferred"] == "two" and saved["converged"] is True
    assert (tmp_path / "weak" / "summary.json").exists()
    assert json.loads((tmp_path / "weak" / "summary.json").read_text())["model"] == "weak_coupling"


@pytest.mark.slow
def test_an_uncoupled_map_prefers_weak_coupling(tmp_path):
    # Self-consistency check: polkit's own forward model (g = 0: a cavity mode crossing a flat
    # exciton
    # line); the two-oscillator model cannot draw an uncoupled exciton line and must lose.
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", DataWarning)
        comp = compare_models(_weak_map(), models=("weak", "two"), seed=2, sampler=QUIET)
    assert comp.converged
    assert comp.preferred() == "weak"


@pytest.mark.slow
def test_a_second_exciton_that_is_not_there_is_not_preferred():
    # Source: simulated two-oscillator data; the three-oscillator model nests it (g2 -> 0),
    # so it may tie but must not be preferred (parsimony on a tie, see above).  With no
    # second exciton in the data its energy and width are not identified and the chain may
    # not converge; the comparison must then say so rather than hide it.
    with warnings.catch_warnings(record=True) as seen:
        warnings.simplefilter("always")
        comp = compare_models(_strong_map(), models=("two", "three"), seed=3, sampler=QUIET)
    assert comp.preferred() == "two"
    assert comp.scores["two"].converged
    warned = any(issubclass(w.category, ConvergenceWarning) for w in seen)
    assert warned == (not comp.converged)
    assert comp.summary()["converged"] is comp.converged


def test_cli_compare_marks_an_unconverged_comparison(tmp_path, capsys):
    # common practice, no published source: a run cut short is written, marked, exit 3
    path = tmp_path / "map.nc"
    _strong_map().to_netcdf(path)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        code = main(["compare", str(path), "--models", "weak,two", "--max-steps", "500",
                     "--seed", "4", "--out", str(tmp_path / "cmp"), "--quiet"])
    assert code == EXIT_NOT_CONVERGED
    out = capsys.readouterr().out
    assert "elpd_loo" in out and "nat" in out
    saved = json.loads((tmp_path / "cmp" / COMPARISON_FILE).read_text())
    assert saved["converged"] is False


def test_a_comparison_resumed_with_other_camera_steps_is_refused(tmp_path):
    # common practice, no published source: the camera steps decide which pixels are fitted,
    # so a chain drawn under one set must not be continued under another
    from polkit.data import CameraOptions, ExcludeWindow, LoadOptions
    from polkit.inference.identity import CheckpointMismatch

    da = _strong_map()
    masked = LoadOptions(camera=CameraOptions(exclude=(ExcludeWindow((1.5330, 1.5345)),)))
    short = SamplerSettings(max_steps=200, min_steps=200, progress=False)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        compare_models(da, models=("weak", "two"), seed=7, sampler=short, load=masked,
                       out=tmp_path)
        with pytest.raises(CheckpointMismatch, match="preprocessing"):
            compare_models(da, models=("weak", "two"), seed=7, sampler=short, out=tmp_path,
                           resume=True)

"""Priors and parameter spaces, checked against scipy.stats and numerical integration."""

from __future__ import annotations

import json
import math

import numpy as np
import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
from scipy import integrate, stats

from polkit.config.priors import apply_priors
from polkit.errors import ConfigError
from polkit.inference import Parameter, ParameterSpace, Prior

# (polkit prior, independent scipy.stats distribution)
CASES = [
    (Prior.uniform(5.0, 20.0), stats.uniform(loc=5.0, scale=15.0)),
    (Prior.normal(1.55, 0.01), stats.norm(loc=1.55, scale=0.01)),
    (Prior.loguniform(0.01, 10.0), stats.loguniform(0.01, 10.0)),
    (Prior.truncnormal(3.4, 0.2, 3.0, 4.0),
     stats.truncnorm((3.0 - 3.4) / 0.2, (4.0 - 3.4) / 0.2, loc=3.4, scale=0.2)),
    # far-tail truncation: the support holds ~1e-15 of the untruncated mass
    (Prior.truncnormal(0.0, 1.0, 8.0, 9.0), stats.truncnorm(8.0, 9.0)),
]
IDS = ["uniform", "normal", "loguniform", "truncnormal", "truncnormal_tail"]


@pytest.mark.parametrize(("prior", "ref"), CASES, ids=IDS)
def test_logpdf_matches_scipy_stats(prior, ref):
    # Source: scipy.stats distributions as an independent implementation
    lo, hi = ref.ppf(1e-6), ref.ppf(1 - 1e-6)
    x = np.concatenate([np.linspace(lo, hi, 101), [lo - 1.0, hi + 1.0]])
    expected = ref.logpdf(x)
    got = prior.logpdf(x)
    inside = np.isfinite(expected)
    np.testing.assert_allclose(got[inside], expected[inside], rtol=1e-9, atol=1e-9)
    assert np.all(got[~inside] == -np.inf)


@pytest.mark.parametrize(("prior", "ref"), CASES, ids=IDS)
def test_density_integrates_to_one(prior, ref):
    # Source: normalisation of a probability density (numerical quadrature, scipy.integrate)
    lo, hi = prior.bounds
    if not math.isfinite(lo):
        lo, hi = prior.mu - 12 * prior.sigma, prior.mu + 12 * prior.sigma
    pts = [ref.median()] if prior.kind != "uniform" else None
    total, _ = integrate.quad(lambda v: math.exp(float(prior.logpdf(v))), lo, hi, points=pts,
                              limit=200)
    assert total == pytest.approx(1.0, abs=1e-7)


@pytest.mark.parametrize(("prior", "ref"), CASES, ids=IDS)
def test_samples_follow_the_distribution(prior, ref):
    # Source: Kolmogorov-Smirnov test against the scipy.stats CDF
    draws = prior.sample(np.random.default_rng(11), 4000)
    lo, hi = prior.bounds
    assert np.all((draws >= lo) & (draws <= hi))
    assert stats.kstest(draws, ref.cdf).pvalue > 1e-3


def test_truncnormal_mean_matches_closed_form():
    # Source: mean of the truncated normal, mu + sigma (phi(a) - phi(b)) / (Phi(b) - Phi(a))
    # (Johnson, Kotz and Balakrishnan, Continuous Univariate Distributions vol. 1, ch. 13)
    mu, sigma, low, high = 3.4, 0.2, 3.0, 3.5
    a, b = (low - mu) / sigma, (high - mu) / sigma
    phi = stats.norm.pdf
    mean = mu + sigma * (phi(a) - phi(b)) / (stats.norm.cdf(b) - stats.norm.cdf(a))
    draws = Prior.truncnormal(mu, sigma, low, high).sample(np.random.default_rng(2), 20000)
    assert draws.mean() == pytest.approx(mean, abs=4 * draws.std() / math.sqrt(draws.size))


@settings(max_examples=40, deadline=None)
@given(
    mu=st.floats(-5, 5),
    sigma=st.floats(0.05, 3),
    low=st.floats(-6, 4),
    width=st.floats(0.1, 5),
)
def test_truncnormal_property_against_scipy(mu, sigma, low, width):
    # Source: scipy.stats.truncnorm as an independent implementation
    high = low + width
    a, b = (low - mu) / sigma, (high - mu) / sigma
    ref = stats.truncnorm(a, b, loc=mu, scale=sigma)
    prior = Prior.truncnormal(mu, sigma, low, high)
    x = np.linspace(low, high, 7)
    np.testing.assert_allclose(prior.logpdf(x), ref.logpdf(x), rtol=1e-7, atol=1e-7)


def test_nan_is_outside_every_support():
    # common practice, no published source: NaN must never get a finite prior density
    for prior, _ in CASES:
        assert prior.logpdf(np.nan) == -np.inf


def test_from_dict_round_trip():
    # common practice, no published source: to_dict/from_dict are inverses
    for prior, _ in CASES:
        d = {**prior.to_dict(), "units": "meV"}
        assert Prior.from_dict(d, units="meV") == prior


# -- refusals ------------------------------------------------------------------------------
SPACE = ParameterSpace(
    [
        Parameter("rabi_splitting", "meV", Prior.uniform(1.0, 30.0), "Rabi splitting 2g"),
        Parameter("exciton_energy", "eV", Prior.normal(1.55, 0.02)),
    ]
)

BAD = [
    ({"rabi_splitting": {"prior": "uniform", "low": 5, "high": 20, "units": "meV", "lo": 1}},
     "rabi_splitting.lo", "unknown key"),
    ({"rabi_splitting": {"prior": "uniform", "low": 5, "high": 20}},
     "rabi_splitting.units", "missing 'units'"),
    ({"rabi_splitting": {"prior": "uniform", "low": 5, "high": 20, "units": "eV"}},
     "rabi_splitting.units", "expected|match"),
    ({"rabi_splitting": {"prior": "uniform", "low": 5, "high": 20, "units": "mev"}},
     "rabi_splitting.units", "'meV'"),
    ({"rabi_splitting": {"prior": "uniform", "low": 20, "high": 5, "units": "meV"}},
     "rabi_splitting.low", "low must be < high"),
    ({"rabi_splitting": {"prior": "uniform", "low": 5, "high": 5, "units": "meV"}},
     "rabi_splitting.low", "low must be < high"),
    ({"exciton_energy": {"prior": "normal", "mu": 1.55, "sigma": -0.01, "units": "eV"}},
     "exciton_energy.sigma", "sigma must be > 0"),
    ({"exciton_energy": {"prior": "normal", "mu": float("nan"), "sigma": 0.01, "units": "eV"}},
     "exciton_energy.mu", "NaN"),
    ({"rabi_splitting": {"prior": "loguniform", "low": 0, "high": 20, "units": "meV"}},
     "rabi_splitting.low", "low > 0"),
    ({"rabi_splitting": {"prior": "cauchy", "low": 0, "high": 20, "units": "meV"}},
     "rabi_splitting.prior", "unknown prior kind"),
    ({"rabi_splitting": {"prior": "uniform", "low": "5", "high": 20, "units": "meV"}},
     "rabi_splitting.low", "expected a number"),
    ({"rabi_splitting": {"prior": "uniform", "low": 5, "units": "meV"}},
     "rabi_splitting.high", "missing"),
    ({"rabi_spliting": {"prior": "uniform", "low": 5, "high": 20, "units": "meV"}},
     "rabi_spliting", "known parameters are"),
]


@pytest.mark.parametrize(("source", "key", "message"), BAD)
def test_bad_prior_dicts_name_the_key(source, key, message):
    # common practice, no published source: every refusal names the offending key
    with pytest.raises(ConfigError, match=message) as info:
        apply_priors(SPACE, source)
    assert info.value.key == key
    assert f"key '{key}'" in str(info.value)


def test_toml_file_is_applied_and_errors_name_the_file(tmp_path):
    # Source: TOML v1.0 specification (tables, key = value), read with tomllib
    good = tmp_path / "priors.toml"
    good.write_text(
        '[rabi_splitting]\nprior = "uniform"\nlow = 5\nhigh = 20\nunits = "meV"\n\n'
        '[exciton_energy]\nprior = "truncnormal"\nmu = 1.55\nsigma = 0.01\nlow = 1.5\n'
        'high = 1.6\nunits = "eV"\n'
    )
    space = apply_priors(SPACE, good)
    assert space["rabi_splitting"].prior == Prior.uniform(5.0, 20.0)
    assert space["exciton_energy"].prior == Prior.truncnormal(1.55, 0.01, 1.5, 1.6)
    assert space["rabi_splitting"].description == "Rabi splitting 2g"
    assert SPACE["rabi_splitting"].prior == Prior.uniform(1.0, 30.0)  # input untouched

    bad = tmp_path / "bad.toml"
    bad.write_text('[rabi_splitting]\nprior = "uniform"\nlow = 5\nhigh = 20\n')
    with pytest.raises(ConfigError, match="missing 'units'") as info:
        apply_priors(SPACE, bad)
    assert str(bad) in str(info.value)

    broken = tmp_path / "broken.toml"
    broken.write_text("[rabi_splitting\nprior = uniform\n")
    with pytest.raises(ConfigError, match="not valid TOML"):
        apply_priors(SPACE, broken)
    with pytest.raises(ConfigError, match="not found"):
        apply_priors(SPACE, tmp_path / "absent.toml")


def test_toml_text_is_never_evaluated(tmp_path):
    # common practice, no published source: text values are refused, not evaluated
    f = tmp_path / "p.toml"
    f.write_text('[rabi_splitting]\nprior = "uniform"\nlow = "__import__(\'os\')"\n'
                 'high = 20\nunits = "meV"\n')
    with pytest.raises(ConfigError, match="expected a number"):
        apply_priors(SPACE, f)


# -- parameter space -----------------------------------------------------------------------
def test_space_log_prior_is_the_sum_of_scipy_logpdfs():
    # Source: independence of the priors; scipy.stats as the reference densities
    rng = np.random.default_rng(5)
    theta = np.column_stack([rng.uniform(0, 32, 50), rng.normal(1.55, 0.03, 50)])
    expected = stats.uniform(1.0, 29.0).logpdf(theta[:, 0]) + stats.norm(1.55, 0.02).logpdf(
        theta[:, 1]
    )
    np.testing.assert_allclose(SPACE.log_prior(theta), expected, rtol=1e-12)
    draws = SPACE.sample_prior(rng, 100)
    assert draws.shape == (100, 2) and np.all(np.isfinite(SPACE.log_prior(draws)))


def test_space_json_round_trip_and_bounds():
    # common practice, no published source
    text = SPACE.to_json()
    assert json.loads(text)["rabi_splitting"] == {
        "prior": "uniform", "low": 1.0, "high": 30.0, "units": "meV",
        "description": "Rabi splitting 2g",
    }
    assert ParameterSpace.from_json(text) == SPACE
    np.testing.assert_array_equal(SPACE.bounds, [[1.0, 30.0], [-np.inf, np.inf]])
    assert SPACE.names == ["rabi_splitting", "exciton_energy"]
    assert SPACE.units == ["meV", "eV"]


def test_space_refuses_duplicates_and_missing_units():
    # common practice, no published source
    p = Parameter("a", "meV", Prior.normal(0, 1))
    with pytest.raises(ConfigError, match="duplicate"):
        ParameterSpace([p, p])
    with pytest.raises(ConfigError, match="needs units"):
        Parameter("a", "", Prior.normal(0, 1))


def test_joint_log_prior_is_the_sum_of_scipy_log_densities():
    # Source: scipy.stats (uniform, loguniform, norm, truncnorm logpdf), an independent
    # implementation of each density; the joint prior of independent parameters is their sum
    import numpy as np
    from scipy import stats

    from polkit.inference.priors import Parameter, ParameterSpace, Prior

    sp = ParameterSpace([
        Parameter("a", "1", Prior.uniform(0.0, 2.0)),
        Parameter("b", "1", Prior.loguniform(0.1, 10.0)),
        Parameter("c", "1", Prior.normal(1.0, 2.0)),
        Parameter("d", "1", Prior.truncnormal(0.0, 1.0, -1.0, 2.0)),
    ])
    rng = np.random.default_rng(0)
    theta = rng.uniform(-1.5, 3.0, (2000, 4))
    theta[5, 1] = np.nan
    expect = (stats.uniform(0.0, 2.0).logpdf(theta[:, 0])
              + stats.loguniform(0.1, 10.0).logpdf(theta[:, 1])
              + stats.norm(1.0, 2.0).logpdf(theta[:, 2])
              + stats.truncnorm(-1.0, 2.0, loc=0.0, scale=1.0).logpdf(theta[:, 3]))
    expect = np.where(np.isnan(expect), -np.inf, expect)
    got = sp.log_prior(theta)
    assert np.array_equal(np.isfinite(got), np.isfinite(expect))
    ok = np.isfinite(expect)
    np.testing.assert_allclose(got[ok], expect[ok], rtol=1e-12, atol=1e-12)

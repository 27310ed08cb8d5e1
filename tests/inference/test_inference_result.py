"""FitResult: summary layout, units, and the netCDF + JSON round trip."""

from __future__ import annotations

import json

import numpy as np
import pytest
import xarray as xr
from scipy import stats

from polkit.errors import ConfigError, ConvergenceWarning, DataError
from polkit.inference import (
    FitResult,
    Parameter,
    ParameterSpace,
    Prior,
    SamplerOutput,
    SamplerSettings,
    run_ensemble,
)

SPACE = ParameterSpace(
    [
        Parameter("rabi_splitting", "meV", Prior.uniform(0, 30), "Rabi splitting 2g"),
        Parameter("exciton_energy", "eV", Prior.normal(1.55, 0.05), "exciton energy"),
    ]
)
MEAN, SD = np.array([12.0, 1.55]), np.array([0.5, 0.002])
N_ENS, N_STEPS, N_WALK = 1, 500, 8


def synthetic_output(converged=True) -> SamplerOutput:
    """Independent Gaussian draws with known mean and spread standing in for a run."""
    rng = np.random.default_rng(21)
    chains = MEAN + SD * rng.standard_normal((N_ENS, N_STEPS, N_WALK, 2))
    log_prob = -0.5 * np.sum(((chains - MEAN) / SD) ** 2, axis=-1)
    diagnostics = {
        "converged": converged, "steps": N_STEPS, "walkers": N_WALK, "n_ensembles": N_ENS,
        "max_autocorr_time": 1.0, "min_ess_bulk": 4000.0, "min_ess_tail": 3900.0,
        "max_rhat": 1.001, "nested_rhat": None, "acceptance_fraction": 0.4,
        "reasons": [] if converged else ["stopped at max_steps = 500"],
    }
    return SamplerOutput(
        space=SPACE, chains=chains, log_prob=log_prob, acceptance=np.full((N_ENS, N_WALK), 0.4),
        autocorr_time=np.ones((N_ENS, 2)), burn_in=0, thin=1, converged=converged,
        reasons=list(diagnostics["reasons"]), diagnostics=diagnostics, seed_entropy=123456789,
        seed_spawn_key=(4,),
    )


def make_result(converged=True, **kw) -> FitResult:
    out = synthetic_output(converged)
    post = out.posterior_draws()
    detuning = (post["rabi_splitting"].values - 10.0) * 1.0  # any per-draw function
    derived = {
        "detuning": (detuning, "meV", "cavity-exciton detuning"),
        "half_splitting": ((post["rabi_splitting"].values / 2).ravel(), "meV", "coupling g"),
        "strong": (post["rabi_splitting"].values > 12.0, "1", "2g above 12 meV"),
        "claim_probability": (np.asarray(0.25), "1", "probability that a claim holds"),
    }
    observed = xr.Dataset(
        {"peak_energy": (("angle",), np.linspace(1.54, 1.56, 5), {"units": "eV"})},
        coords={"angle": ("angle", np.arange(5.0), {"units": "degree"})},
    )
    return FitResult.from_samples(
        out, SPACE, derived=derived, model="coupled_oscillator", kind="dispersion",
        observed=observed, provenance={"input_sha256": "ab" * 32, "input": "invented.nc"},
        extra_attrs={"fit_path": "map", "n_excitons": 1, "options": {"x": 1}, "flag": True},
        **kw,
    )


def test_summary_layout_and_quantiles_against_the_normal_distribution():
    # Source: quantiles of the normal distribution (scipy.stats.norm.ppf) for draws with
    # known mean and spread; tolerance 5 standard errors of a sample quantile
    res = make_result()
    s = res.summary()
    assert list(s) == ["model", "kind", "parameters", "probabilities", "diagnostics",
                       "provenance"]
    assert s["model"] == "coupled_oscillator" and s["kind"] == "dispersion"
    assert list(s["parameters"]) == ["rabi_splitting", "exciton_energy", "detuning",
                                     "half_splitting"]
    n = N_ENS * N_STEPS * N_WALK
    for j, name in enumerate(SPACE.names):
        entry = s["parameters"][name]
        assert set(entry) == {"median", "q16", "q84", "q2_5", "q97_5", "units"}
        assert entry["units"] == SPACE.units[j]
        for key, p in (("median", 0.5), ("q16", 0.16), ("q84", 0.84), ("q2_5", 0.025),
                       ("q97_5", 0.975)):
            expected = stats.norm.ppf(p, MEAN[j], SD[j])
            se = np.sqrt(p * (1 - p) / n) / stats.norm.pdf(stats.norm.ppf(p)) * SD[j]
            assert entry[key] == pytest.approx(expected, abs=5 * se)
    assert s["parameters"]["detuning"]["median"] == pytest.approx(
        s["parameters"]["rabi_splitting"]["median"] - 10.0, abs=1e-12)
    # flags and 0-d probabilities
    strong = s["probabilities"]["strong"]
    assert strong["units"] == "1"
    assert strong["value"] == pytest.approx(stats.norm.sf(12.0, MEAN[0], SD[0]), abs=0.03)
    assert s["probabilities"]["claim_probability"]["value"] == 0.25
    d = s["diagnostics"]
    for key in ("converged", "steps", "walkers", "max_autocorr_time", "min_ess_bulk",
                "max_rhat", "acceptance_fraction"):
        assert key in d
    p = s["provenance"]
    for key in ("polkit_version", "input_sha256", "seed", "created", "priors", "libraries"):
        assert key in p
    assert p["seed"] == 123456789 and p["input_sha256"] == "ab" * 32
    assert p["priors"]["rabi_splitting"]["units"] == "meV"
    json.dumps(s, allow_nan=False)  # JSON-ready


def test_tree_layout_units_and_attributes():
    # common practice, no published source: ArviZ-style groups, units on every variable,
    # netCDF-safe attributes (flags as int, metadata as JSON text)
    res = make_result()
    tree = res.tree
    assert {"posterior", "sample_stats", "observed_data", "probabilities"} <= set(tree.children)
    for name, var in tree["posterior"].data_vars.items():
        assert var.dims == ("chain", "draw"), name
        assert var.attrs["units"] and var.attrs["long_name"], name
    assert tree["posterior"]["strong"].dtype == np.int8
    assert tree.attrs["converged"] == 1 and isinstance(tree.attrs["diagnostics"], str)
    assert tree.attrs["flag"] == 1 and json.loads(tree.attrs["options"]) == {"x": 1}
    assert set(tree["sample_stats"].data_vars) == {"lp", "acceptance"}
    np.testing.assert_array_equal(
        res.draws("rabi_splitting"),
        np.moveaxis(synthetic_output().chains[0], 1, 0)[:, :, 0].reshape(-1),
    )


def test_save_load_round_trip_keeps_values_units_and_summary(tmp_path):
    # common practice, no published source
    res = make_result()
    folder = res.save(tmp_path / "fit")
    assert sorted(p.name for p in folder.iterdir()) == ["posterior.nc", "summary.json"]
    back = FitResult.load(folder)
    assert back.summary() == res.summary()
    assert json.loads((folder / "summary.json").read_text()) == res.summary()
    for name in res.posterior.data_vars:
        np.testing.assert_array_equal(back.draws(name), res.draws(name))
        assert back.posterior[name].attrs["units"] == res.posterior[name].attrs["units"]
    obs = back.tree["observed_data"].to_dataset()
    assert obs["peak_energy"].attrs["units"] == "eV"
    assert obs["angle"].attrs["units"] == "degree"
    assert back.converged is True and back.space == SPACE
    assert back.tree.attrs["fit_path"] == "map"


def test_subclasses_load_as_themselves(tmp_path):
    # common practice, no published source: workflow result classes reuse load/save
    class Special(FitResult):
        pass

    make_result().save(tmp_path)
    assert type(Special.load(tmp_path)) is Special


def test_load_refuses_folders_that_are_not_results(tmp_path):
    # common practice, no published source: DataError naming the missing file
    with pytest.raises(DataError, match="not a folder"):
        FitResult.load(tmp_path / "absent")
    make_result().save(tmp_path / "a")
    (tmp_path / "a" / "summary.json").unlink()
    with pytest.raises(DataError, match="missing summary.json") as info:
        FitResult.load(tmp_path / "a")
    assert "summary.json" in str(info.value.path)
    (tmp_path / "b").mkdir()
    (tmp_path / "b" / "summary.json").write_text("{}")
    with pytest.raises(DataError, match="missing posterior.nc"):
        FitResult.load(tmp_path / "b")
    (tmp_path / "b" / "posterior.nc").write_bytes(b"not netcdf")
    with pytest.raises(DataError, match="cannot read the posterior"):
        FitResult.load(tmp_path / "b")
    xr.Dataset({"x": ("t", [1.0])}).to_netcdf(tmp_path / "b" / "posterior.nc",
                                             engine="h5netcdf")
    with pytest.raises(DataError, match="not a polkit result"):
        FitResult.load(tmp_path / "b")
    (tmp_path / "a" / "summary.json").write_text('{"model": "m"}')
    with pytest.raises(DataError, match="summary lacks"):
        FitResult.load(tmp_path / "a")


BAD_DERIVED = [
    ({"x": (np.ones(7), "meV", "wrong size")}, "expected the draws' shape"),
    ({"x": (np.ones((8, 500)), "", "no units")}, "needs units"),
    ({"rabi_splitting": (np.ones((8, 500)), "meV", "clash")}, "clashes"),
    ({"x": (np.asarray(3.0), "meV", "scalar")}, "probability"),
    ({"x": (np.ones((8, 500)) > 0, "meV", "flag")}, "a flag has units '1'"),
    ({"x": np.ones((8, 500))}, "expected \\(values, units, long_name\\)"),
]


@pytest.mark.parametrize(("derived", "message"), BAD_DERIVED)
def test_bad_derived_quantities_are_refused(derived, message):
    # common practice, no published source
    with pytest.raises(ConfigError, match=message):
        FitResult.from_samples(synthetic_output(), SPACE, derived=derived, model="m", kind="k")


def test_table_and_html_show_units_and_status():
    # common practice, no published source
    res = make_result()
    text = res.table()
    lines = text.splitlines()
    assert lines[0].startswith("coupled_oscillator (dispersion) -- converged")
    assert lines[1].split() == ["parameter", "units", "median", "-68%", "+68%", "95%",
                                "interval"]
    row = next(line for line in lines if line.startswith("exciton_energy"))
    assert " eV " in row
    assert "P(strong)" in text
    html = res._repr_html_()
    assert "<table>" in html and "meV" in html and "converged" in html
    bad = make_result(converged=False)
    assert "NOT converged" in bad._repr_html_() and "max_steps" in bad.table()


def test_result_from_a_real_run(tmp_path):
    # common practice, no published source: the sampler output feeds the result unchanged
    def loglike(theta):
        return -0.5 * ((theta[:, 0] - 12.0) / 0.5) ** 2 - 0.5 * ((theta[:, 1] - 1.55) / 0.002) ** 2

    with pytest.warns(ConvergenceWarning):
        out = run_ensemble(loglike, SPACE, np.array([12.0, 1.55]),
                           SamplerSettings(n_walkers=8, max_steps=60, progress=False), seed=3)
    res = FitResult.from_samples(out, SPACE, model="m", kind="k", provenance={})
    assert res.converged is False
    assert res.summary()["diagnostics"]["converged"] is False
    assert res.summary()["provenance"]["input_sha256"] is None
    back = FitResult.load(res.save(tmp_path))
    assert back.summary() == res.summary()
    assert back.posterior["exciton_energy"].attrs["long_name"] == "exciton energy"


def test_model_check_is_a_top_level_summary_entry_that_survives_save_and_load(tmp_path):
    # common practice, no published source
    check = {"passed": False, "statistic": 3.2, "threshold": 1.3, "advice": "another line?"}
    out = synthetic_output()
    res = FitResult.from_samples(out, SPACE, model="m", kind="dispersion",
                                 provenance={"input_sha256": "ab" * 32},
                                 extra_attrs={"model_check": check})
    assert res.summary()["model_check"] == check
    back = FitResult.load(res.save(tmp_path / "fit"))
    assert back.model_check == check and back.summary()["model_check"]["passed"] is False
    assert "model_check" not in make_result().summary()  # absent when no check ran


def test_shared_files_name_inputs_by_file_name_not_absolute_path(tmp_path):
    # common practice, no published source: results travel; a machine's folders do not
    out = synthetic_output()
    observed = xr.Dataset({"map": (("angle",), np.arange(3.0),
                                   {"units": "counts", "source": "/home/someone/maps/p1.nc",
                                    "history": "loaded /home/someone/maps/p1.nc: nm -> eV"})},
                          attrs={"source": "/home/someone/maps/p1.nc"})
    res = FitResult.from_samples(out, SPACE, model="m", kind="dispersion", observed=observed,
                                 provenance={"input_sha256": "ab" * 32,
                                             "input": "/home/someone/maps/p1.nc"})
    folder = res.save(tmp_path / "fit")
    text = (folder / "summary.json").read_text() + str(FitResult.load(folder).tree)
    assert "/home/someone" not in text and "someone" not in text
    assert res.provenance["input"] == "p1.nc"
    obs = res.tree["observed_data"]
    assert obs.attrs["source"] == "p1.nc"
    assert obs["map"].attrs["history"] == "loaded p1.nc: nm -> eV"
    assert observed.attrs["source"] == "/home/someone/maps/p1.nc"  # the caller's data untouched

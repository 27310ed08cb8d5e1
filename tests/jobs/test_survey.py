"""The wafer survey: a simulated wafer with a known linear detuning gradient, failures that
stay local, resumable reruns, seeds independent of the worker count, folders of maps and
the embedded cluster.  Manifests: test_survey_manifest.py; the detuning surface:
test_survey_surface.py.

Every wafer here is invented (simulated with polkit's own forward model and seeded noise).
"""

from __future__ import annotations

import json
import os
import shutil

import numpy as np
import pytest
import xarray as xr

from polkit import ConfigError, DataError
from polkit.config.manifest import read_manifest
from polkit.data import make_map
from polkit.inference.settings import SamplerSettings
from polkit.jobs.survey.result import SurveyResult
from polkit.jobs.survey.run import run_survey
from polkit.jobs.survey.tasks import fit_position
from polkit.models.simulate import simulate_map

MEV = 1e-3
E_X = 1.545  # exciton energy, eV
RABI = 10.0  # meV
N_EFF = 3.4
GAMMA_C, GAMMA_X = 0.4, 0.9  # meV (FWHM)
GRADIENT = 0.30  # d(detuning)/dx in meV/mm; none along y
DETUNING_0 = -1.5  # meV at x = 0: zero detuning at x = 5 mm
XS = (-10.0, 0.0, 10.0)
YS = (-8.0, 8.0)
ANGLES = np.linspace(-20.0, 20.0, 11)
ENERGY = np.linspace(E_X - 0.012, E_X + 0.014, 80)
SEED = 11
QUIET = SamplerSettings(progress=False)  # no bar over positions


def _detuning(x_mm: float) -> float:
    return DETUNING_0 + GRADIENT * x_mm


def _map(x_mm: float, rng: np.random.Generator, *, peak: float = 600.0) -> xr.DataArray:
    """Emission counts at position x of the invented wafer (known truth, seeded noise)."""
    phys = dict(e_c0=E_X + _detuning(x_mm) * MEV, n_eff=N_EFF, e_x=E_X, g=0.5 * RABI * MEV,
                gamma_c=GAMMA_C * MEV, gamma_x=GAMMA_X * MEV)
    unit = simulate_map(ANGLES, ENERGY, kind="emission", amplitudes=[1.0, 0.3], **phys).signal
    scale = peak / unit.max()
    mean = simulate_map(ANGLES, ENERGY, kind="emission", amplitudes=[scale, 0.3 * scale],
                        background=50.0, **phys).signal
    counts = rng.poisson(mean) + rng.normal(0.0, 3.0, mean.shape)
    return make_map(counts, angle=ANGLES, energy=ENERGY, units="counts", kind="emission",
                    gain=1.0, read_noise=3.0)


def _save(da: xr.DataArray, path, **attrs) -> None:
    ds = da.rename("signal").to_dataset()
    ds.attrs.update(attrs)
    ds.to_netcdf(path, engine="h5netcdf")


def _write_wafer(folder):
    """Six good maps on a 3 x 2 grid, one corrupt file and one map with no branch."""
    maps = folder / "maps"
    maps.mkdir(parents=True)
    seeds = np.random.SeedSequence(2024).spawn(len(XS) * len(YS) + 1)
    rows = ["# invented test wafer; simulated", "file,x [mm],y [mm],kind"]
    k = 0
    for y in YS:
        for x in XS:
            name = f"m{k}.nc"
            _save(_map(x, np.random.default_rng(seeds[k])), maps / name)
            rows.append(f"maps/{name},{x:g},{y:g},emission")
            k += 1
    (maps / "broken.nc").write_bytes(b"\x89HDF\r\n\x1a\n" + b"not really HDF5" * 20)
    rows.append("maps/broken.nc,5,0,emission")
    noise = np.random.default_rng(seeds[k]).normal(100.0, 3.0, (ANGLES.size, ENERGY.size))
    _save(make_map(noise, angle=ANGLES, energy=ENERGY, units="counts", kind="emission"),
          maps / "dark.nc")
    rows.append("maps/dark.nc,-5,0,")
    manifest = folder / "manifest.csv"
    manifest.write_text("\n".join(rows) + "\n")
    return manifest


@pytest.fixture(scope="module")
def surveyed(tmp_path_factory):
    folder = tmp_path_factory.mktemp("wafer")
    manifest = _write_wafer(folder)
    out = folder / "survey"
    result = run_survey(manifest, out=out, workers=2, seed=SEED, sampler=QUIET)
    return manifest, out, result


# ------------------------------------------------------------------------------------------
# the survey end to end (one shared run on an embedded two-worker cluster)
# ------------------------------------------------------------------------------------------
def test_known_gradient_and_zero_line_lie_within_their_intervals(surveyed):
    # Self-consistency check (maps from polkit's own forward model) -- detuning(x) = -1.5 meV +
    # 0.30 meV/mm * x,
    # nothing along y; the zero-detuning line is x = 5 mm.
    # The maps peak at 600 counts, where the statistical error of a quick-mode detuning
    # (about 0.03 meV) exceeds the offset of the peak-table path (0.01-0.02 meV, measured
    # on maps of 2e5 counts; the whole-map path showed none above 0.004 meV). On much
    # cleaner maps, quick-mode intervals are too narrow for that offset.
    _, _, result = surveyed
    surface = result.surface
    assert surface is not None, result.surface_note
    assert surface.degree == 1 and len(surface.values) == 6
    g = surface.gradient_summary()
    assert g["units"] == "meV/mm"
    assert g["x"]["low"] <= GRADIENT <= g["x"]["high"], g["x"]
    assert g["y"]["low"] <= 0.0 <= g["y"]["high"], g["y"]
    # resolved: the interval is far narrower than the gradient itself
    assert g["x"]["high"] - g["x"]["low"] < 0.1 * GRADIENT
    # the true zero line runs inside the band (zero within the pointwise 95 % interval)
    x_zero = -DETUNING_0 / GRADIENT
    ys = np.linspace(min(YS), max(YS), 7)
    assert surface.contains_level(np.full_like(ys, x_zero), ys).all()
    # and the band is narrow: 1 mm away from the true line, zero is excluded
    assert not surface.contains_level(np.full_like(ys, x_zero + 1.0), ys).any()
    line = surface.level_line(0.0)
    assert len(line) == 1
    xs_line = np.asarray(line[0]["x"])
    sig = np.asarray(line[0]["sigma_mm"])
    assert np.all(np.abs(xs_line - x_zero) <= surface.z * sig / np.abs(
        np.cos(np.radians(g["direction"]["value"]))))


def test_failures_are_recorded_and_the_rest_finish(surveyed):
    manifest, out, result = surveyed
    ds = result.dataset
    status = dict(zip(ds["file"].values.tolist(), ds["status"].values.tolist(), strict=True))
    reason = dict(zip(ds["file"].values.tolist(), ds["reason"].values.tolist(), strict=True))
    assert status.pop("maps/broken.nc") == "failed"
    assert "broken.nc" in reason["maps/broken.nc"]
    assert status.pop("maps/dark.nc") == "failed"
    assert "no branch" in reason["maps/dark.nc"]
    assert set(status.values()) == {"ok"}
    assert result.counts == {"ok": 6, "not_converged": 0, "failed": 2}
    assert not result.all_ok
    table = result.table()
    assert "failed" in table and "broken.nc" in table
    # each position wrote its own folder, its done-file last
    for pid in ds["position"].values:
        done = json.loads((out / "positions" / str(pid) / "done.json").read_text())
        assert done["status"] in ("ok", "failed")
    # failed positions keep their place but no values
    bad = ds["status"] == "failed"
    assert np.isnan(ds["detuning"].where(bad, drop=True).values).all()


def test_combined_files_carry_units(surveyed):
    _, out, result = surveyed
    again = SurveyResult.load(out)
    ds = again.dataset
    assert ds["x"].attrs["units"] == "mm" and ds["y"].attrs["units"] == "mm"
    assert ds["detuning"].attrs["units"] == "meV"
    assert ds["rabi_splitting"].attrs["units"] == "meV"
    assert ds["exciton_energy"].attrs["units"] == "eV"
    assert list(ds["statistic"].values) == ["median", "q16", "q84", "q2_5", "q97_5"]
    assert ds.attrs["seed_entropy"] == str(SEED)
    np.testing.assert_array_equal(ds["detuning"].values, result.dataset["detuning"].values)
    assert again.surface is not None
    np.testing.assert_allclose(again.surface.coefficients, result.surface.coefficients)
    header = (out / "survey.csv").read_text().splitlines()[0].split(",")
    assert header[:4] == ["position", "file", "x [mm]", "y [mm]"]
    assert "detuning_median [meV]" in header and "rabi_splitting_q97_5 [meV]" in header
    assert len((out / "survey.csv").read_text().splitlines()) == 1 + ds.sizes["position"]
    surface = json.loads((out / "surface.json").read_text())
    assert surface["gradient"]["x"]["units"] == "meV/mm"
    for name in ("wafer_maps.png", "wafer_detuning.png"):
        assert (out / name).stat().st_size > 1000


def test_rerun_refits_only_interrupted_positions_identically_on_one_worker(surveyed, tmp_path):
    # Seeds are spawned per position in manifest order, so a position refitted alone on one
    # worker must reproduce, bit for bit, what the two-worker run computed.
    manifest, out, first = surveyed
    out2 = tmp_path / "survey"
    shutil.copytree(out, out2)
    ids = [str(p) for p in first.dataset["position"].values]
    ok_ids = [p for p, s in zip(ids, first.dataset["status"].values, strict=True) if s == "ok"]
    interrupted = [ok_ids[len(ok_ids) // 2]]
    before = {p: (out2 / "positions" / p / "done.json").stat().st_mtime_ns for p in ids}
    for p in interrupted:
        shutil.rmtree(out2 / "positions" / p)
    second = run_survey(manifest, out=out2, workers=1, sampler=QUIET, figures=False)
    assert sorted(second.fitted) == sorted(interrupted)
    assert sorted(second.reused) == sorted(set(ids) - set(interrupted))
    for p in set(ids) - set(interrupted):
        assert (out2 / "positions" / p / "done.json").stat().st_mtime_ns == before[p]
    for p in interrupted:
        a = json.loads((out / "positions" / p / "summary.json").read_text())["parameters"]
        b = json.loads((out2 / "positions" / p / "summary.json").read_text())["parameters"]
        assert a == b
    xr.testing.assert_identical(first.dataset.drop_attrs(), second.dataset.drop_attrs())
    # failed positions are finished too, unless asked to retry them; this time on an
    # existing cluster, which the survey uses but does not close
    from dask.distributed import LocalCluster

    failed = [p for p, s in zip(ids, first.dataset["status"].values, strict=True)
              if s == "failed"]
    with LocalCluster(n_workers=1, threads_per_worker=1, processes=True, host="127.0.0.1",
                      dashboard_address=None) as cluster:
        third = run_survey(manifest, out=out2, scheduler=cluster.scheduler_address,
                           sampler=QUIET, figures=False, retry_failed=True)
        assert sorted(third.fitted) == sorted(failed)
        assert cluster.status.name == "running" and len(cluster.workers) == 1  # still up


def test_an_existing_survey_folder_refuses_another_seed_or_mode(surveyed):
    manifest, out, _ = surveyed
    with pytest.raises(ConfigError, match="seeded with entropy 11"):
        run_survey(manifest, out=out, seed=12, sampler=QUIET)
    with pytest.raises(ConfigError, match="mode = 'quick'"):
        run_survey(manifest, out=out, mode="full", sampler=QUIET)
    with pytest.raises(ConfigError, match="workers"):
        run_survey(manifest, out=out, workers=2, scheduler="tcp://127.0.0.1:1", sampler=QUIET)


def test_a_position_short_of_its_gate_is_not_converged(tmp_path):
    # the task itself, in this process: a chain far shorter than 50 autocorrelation times
    # cannot pass the convergence gate (50 autocorrelation times and more)
    path = tmp_path / "m.nc"
    _save(_map(0.0, np.random.default_rng(3)), path)
    seed = np.random.SeedSequence(5).spawn(1)[0]
    task = {"position_id": "000_m", "folder": str(tmp_path / "pos"), "file": str(path),
            "mode": "quick", "model": "two", "kind": None, "energy_window": None,
            "wavelength_medium": None, "priors": None, "seed": seed, "max_steps": 150,
            "key": {"test": 1}}
    record = fit_position(task)
    assert record["status"] == "not_converged"
    assert record["reason"]
    assert any("ConvergenceWarning" in w for w in record["warnings"])
    assert (tmp_path / "pos" / "summary.json").is_file()
    assert json.loads((tmp_path / "pos" / "done.json").read_text())["status"] == "not_converged"
    # an unreadable file: failed with the file named, nothing raised
    (tmp_path / "bad.npz").write_bytes(b"PK\x03\x04 truncated")
    record = fit_position(dict(task, file=str(tmp_path / "bad.npz"),
                               folder=str(tmp_path / "bad")))
    assert record["status"] == "failed" and "bad.npz" in record["reason"]


def test_sampler_settings_the_survey_would_not_use_are_refused(tmp_path):
    # common practice, no published source: a setting that would be silently ignored is
    # refused, before any cluster or output
    (tmp_path / "a.nc").write_bytes(b"invented")
    path = tmp_path / "manifest.csv"
    path.write_text("file,x [mm],y [mm]\na.nc,1,2\n")
    with pytest.raises(ConfigError, match="found n_walkers set"):
        run_survey(path, out=tmp_path / "out", sampler=SamplerSettings(n_walkers=64))
    for bad in (0, "many", 2.5):
        with pytest.raises(ConfigError, match=f"max_steps >= 1; found {bad!r}"):
            run_survey(path, out=tmp_path / "out", sampler={"max_steps": bad, "progress": False})
    assert not (tmp_path / "out").exists()


# ------------------------------------------------------------------------------------------
# positions from a folder of maps; the embedded cluster
# ------------------------------------------------------------------------------------------
def test_folder_of_maps_with_position_attributes(tmp_path):
    da = _map(0.0, np.random.default_rng(1))
    _save(da, tmp_path / "p1.nc", x="2.5 mm", y="-1 mm")
    _save(da, tmp_path / "p2.nc", x=1500.0, y=0.0, position_units="um")
    (tmp_path / "p3.nc").write_bytes(b"garbage, not a map")
    (tmp_path / "notes.md").write_text("not a map")
    specs = read_manifest(tmp_path)
    assert [s.file_label for s in specs] == ["p1.nc", "p2.nc", "p3.nc"]
    assert (specs[0].x_mm, specs[0].y_mm) == (2.5, -1.0)
    assert (specs[1].x_mm, specs[1].y_mm) == (1.5, 0.0)
    assert np.isnan(specs[2].x_mm)  # unreadable: kept, fails when fitted
    _save(da, tmp_path / "p4.nc", x="3 mm")
    with pytest.raises(DataError, match=r"p4.nc: field 'y': expected a 'y' attribute"):
        read_manifest(tmp_path)
    (tmp_path / "p4.nc").unlink()
    _save(da, tmp_path / "p4.nc", x=3.0, y=1.0)
    with pytest.raises(DataError, match=r"p4.nc: field 'x': expected the position in length"):
        read_manifest(tmp_path)


def test_embedded_cluster_listens_on_loopback_without_dashboard(monkeypatch):
    # common practice, no published source: a survey's cluster is not reachable from the
    # network (no 0.0.0.0, no dashboard) and its scratch folder is stated
    import dask.distributed

    from polkit.jobs.survey import scheduler

    seen = {}

    class FakeCluster:
        def __init__(self, **kwargs):
            seen.update(kwargs)

        def close(self):
            seen["closed"] = True

    class FakeClient:
        def __init__(self, cluster):
            pass

        def close(self):
            pass

    monkeypatch.setattr(dask.distributed, "LocalCluster", FakeCluster)
    monkeypatch.setattr(dask.distributed, "Client", FakeClient)
    with scheduler.client_for(None, 1):
        pass
    assert seen["host"] == "127.0.0.1" and seen["dashboard_address"] is None
    assert seen["closed"] and os.path.isdir(seen["local_directory"])
    assert "0.0.0.0" not in json.dumps({k: str(v) for k, v in seen.items()})


@pytest.mark.parametrize("state", ['{"format": 1, "mode": "quick", "model": "two"}',
                                   '{"format": 1, "seed_entropy": "not a number"}', "[1, 2]"])
def test_a_state_file_without_a_readable_seed_is_refused_by_name(tmp_path, state):
    # common practice, no published source: a damaged survey_state.json is named with its
    # fix, never a bare KeyError, and never silently replaced by a fresh seed
    from polkit.jobs.survey.state import open_state

    (tmp_path / "survey_state.json").write_text(state, encoding="utf-8")
    with pytest.raises(ConfigError, match="survey_state.json is unreadable"):
        open_state(tmp_path, "quick", "two", None, None)

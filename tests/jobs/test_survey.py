"""The wafer survey: a simulated wafer with a known linear detuning gradient, failures that
stay local, resumable reruns, seeds independent of the worker count, the detuning surface
and bad manifests.

Every wafer here is invented (simulated with polkit's own forward model and seeded noise).
"""

from __future__ import annotations

import json
import os
import shutil

import numpy as np
import pytest
import xarray as xr

from polkit import ConfigError, DataError, FitError
from polkit.config.manifest import read_manifest
from polkit.data import make_map
from polkit.inference.settings import SamplerSettings
from polkit.jobs.survey.result import SurveyResult
from polkit.jobs.survey.run import run_survey
from polkit.jobs.survey.surface import fit_surface
from polkit.jobs.survey.tasks import fit_position
from polkit.models.spectral import simulate_map

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


# ------------------------------------------------------------------------------------------
# manifests
# ------------------------------------------------------------------------------------------
def _manifest(tmp_path, text, files=("a.nc", "b.nc")):
    for f in files:
        (tmp_path / f).write_bytes(b"placeholder")
    path = tmp_path / "manifest.csv"
    path.write_text(text)
    return path


def test_manifest_units_options_and_relative_paths(tmp_path):
    path = _manifest(tmp_path, "# invented\nfile,x [um],y [cm],energy_min [meV],energy_max [eV],"
                               "kind,label\n"
                               "a.nc,1500,0.5,1530,1.56,reflectance,edge\nb.nc,0,0,,,,\n")
    a, b = read_manifest(path)
    assert (a.x_mm, a.y_mm) == (1.5, 5.0)
    assert a.energy_window == pytest.approx((1.530, 1.56))
    assert a.kind == "reflectance" and a.position_id == "000_edge"
    assert a.file == (tmp_path / "a.nc").resolve()
    assert b.energy_window is None and b.kind is None and b.position_id == "001_b"


@pytest.mark.parametrize(
    ("text", "match"),
    [
        ("file,x [mm]\na.nc,1\n", r"field 'y \[mm\]'.*expected a column 'y \[mm\]'"),
        ("file,x [mm],y\na.nc,1,2\n", r"field 'y'.*expected units of a length"),
        ("file,x [furlong],y [mm]\na.nc,1,2\n", r"found units 'furlong'"),
        ("file,x [mm],y [mm],colour\na.nc,1,2,red\n", r"unknown column 'colour'"),
        ("file,x [mm],y [mm]\na.nc,1,2\nb.nc,abc,2\n",
         r"field 'x \[mm\]': row 2 \(line 3\), column 'x \[mm\]': expected a number; found 'abc'"),
        ("file,x [mm],y [mm]\na.nc,1,\n", r"row 1 \(line 2\), column 'y \[mm\]'.*empty cell"),
        ('file,x [mm],y [mm]\na.nc,"1,5",2\n', r"decimal comma"),
        ("file,x [mm],y [mm]\na.nc,1,2\na.nc,3,4\n",
         r"row 2 .*'a.nc' is the same map as 'a.nc' in row 1 \(line 2\)"),
        ("file,x [mm],y [mm],kind\na.nc,1,2,absorption\n",
         r"field 'kind': row 1 \(line 2\), column 'kind': expected one of emission"),
        ("file,x [mm],y [mm],energy_min [eV],energy_max [eV]\na.nc,1,2,1.56,1.53\n",
         r"row 1 \(line 2\): expected energy_min < energy_max"),
        ("file,x [mm],y [mm]\na.nc,1\n", r"row 1 \(line 2\): expected 3 cells"),
        ("file,x [mm],y [mm]\n", r"found none"),
        ("# only a comment\n", r"expected a header line"),
        ("file,x [mm],y [mm],priors\na.nc,1,2,missing.toml\n", r"expected a priors file"),
    ],
    ids=["no-y", "no-units", "bad-units", "unknown-column", "not-a-number", "empty-cell",
         "decimal-comma", "duplicate-file", "bad-kind", "empty-window", "short-row", "no-rows",
         "no-header", "missing-priors"],
)
def test_bad_manifests_name_file_row_and_column(tmp_path, text, match):
    path = _manifest(tmp_path, text)
    with pytest.raises(DataError, match=match) as info:
        read_manifest(path)
    assert str(info.value).startswith(str(path))


def test_bad_manifest_stops_before_any_cluster_or_output(tmp_path):
    path = _manifest(tmp_path, "file,x [mm],y [mm]\na.nc,1,oops\n")
    with pytest.raises(DataError, match="row 1"):
        run_survey(path, out=tmp_path / "out", sampler=QUIET)
    assert not (tmp_path / "out").exists()
    with pytest.raises(DataError, match="found nothing at this path"):
        read_manifest(tmp_path / "nowhere.csv")


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


# ------------------------------------------------------------------------------------------
# the detuning surface
# ------------------------------------------------------------------------------------------
def _grid(n=5, span=10.0):
    g = np.linspace(-span, span, n)
    xx, yy = np.meshgrid(g, g)
    return xx.ravel(), yy.ravel()


def test_surface_recovers_a_plane_and_its_zero_line_exactly():
    # Source: analytic -- v = a + b x + c y vanishes on x = -(a + c y) / b.
    x, y = _grid()
    a, b, c = -1.2, 0.4, 0.05
    v = a + b * x + c * y
    fit = fit_surface(x, y, v, np.full_like(v, 0.02))
    np.testing.assert_allclose(fit.coefficients, [a, b, c], atol=1e-12)  # centre is (0, 0)
    (seg,) = fit.level_line(0.0)
    np.testing.assert_allclose(np.asarray(seg["x"]), -(a + c * np.asarray(seg["y"])) / b,
                               atol=1e-9)
    g, cov = fit.gradient()
    np.testing.assert_allclose(g, [b, c], atol=1e-12)


def test_surface_recovers_a_quadric_and_its_local_gradient():
    # Source: analytic derivatives of v = 1 + 0.2 x - 0.1 y + 0.01 x^2 + 0.02 x y - 0.03 y^2
    x, y = _grid(6)
    x, y = x + 3.0, y - 2.0  # off-centre: the fit works about the centroid (3, -2)
    v = 1 + 0.2 * x - 0.1 * y + 0.01 * x**2 + 0.02 * x * y - 0.03 * y**2
    fit = fit_surface(x, y, v, np.full_like(v, 0.01), degree=2)
    mean, _ = fit.evaluate(np.array([0.0, 4.0]), np.array([0.0, 1.0]))
    np.testing.assert_allclose(mean, [1.0, 1 + 0.8 - 0.1 + 0.16 + 0.08 - 0.03], atol=1e-10)
    g, _ = fit.gradient(4.0, 1.0)
    np.testing.assert_allclose(g, [0.2 + 2 * 0.01 * 4 + 0.02 * 1, -0.1 + 0.02 * 4 - 2 * 0.03 * 1],
                               atol=1e-10)


def test_surface_covariance_matches_an_independent_least_squares_library():
    # Source: scipy.optimize.curve_fit, absolute_sigma=True (covariance of the weights
    # alone) and absolute_sigma=False (scaled by chi2/dof) -- the latter is what the survey
    # reports when the scatter exceeds the per-position intervals.
    from scipy.optimize import curve_fit

    rng = np.random.default_rng(8)
    x, y = _grid()
    sig = rng.uniform(0.01, 0.05, x.size)

    def plane(xy, a, b, c):
        return a + b * xy[0] + c * xy[1]

    for inflate in (0.5, 3.0):  # scatter below, then above the stated uncertainties
        v = -1 + 0.3 * x + 0.02 * y + inflate * sig * rng.standard_normal(x.size)
        fit = fit_surface(x, y, v, sig)
        absolute = fit.chi2 / fit.dof <= 1
        popt, pcov = curve_fit(plane, (x, y), v, sigma=sig, absolute_sigma=absolute)
        np.testing.assert_allclose(fit.coefficients, popt, rtol=1e-8, atol=1e-12)
        np.testing.assert_allclose(fit.covariance, pcov, rtol=1e-6)
        assert (fit.scale_factor > 1) == (not absolute)


def test_surface_gradient_intervals_cover_the_truth_at_their_level():
    # common practice, no published source: simulated Gaussian errors of known size, so the 95 %
    # intervals must cover the true gradient in about 95 % of 400 wafers (binomial sd 1.1 %;
    # the scale factor can only widen them).
    rng = np.random.default_rng(21)
    x, y = _grid(5)
    hits = 0
    n = 400
    for _ in range(n):
        sig = rng.uniform(0.02, 0.06, x.size)
        v = -1.5 + 0.3 * x + rng.normal(0.0, sig)
        g = fit_surface(x, y, v, sig).gradient_summary()["x"]
        hits += g["low"] <= 0.3 <= g["high"]
    assert 0.92 <= hits / n <= 0.99


def test_zero_line_band_matches_a_monte_carlo_of_the_coefficients():
    # Source: the delta-method width of the zero line checked by sampling the coefficients
    # from their Gaussian and solving a + b (x - x0) = 0 for each draw (gradient along x).
    rng = np.random.default_rng(4)
    x, y = _grid(4)
    sig = np.full(x.size, 0.05)
    v = -1.0 + 0.25 * x + rng.normal(0.0, sig)
    fit = fit_surface(x, y, v, sig)
    draws = rng.multivariate_normal(fit.coefficients, fit.covariance, 200_000)
    y0 = 0.0
    x_cross = fit.centre_mm[0] - (draws[:, 0] + draws[:, 2] * (y0 - fit.centre_mm[1])) / draws[:, 1]
    (seg,) = fit.level_line(0.0)
    i = int(np.argmin(np.abs(np.asarray(seg["y"]) - y0)))
    assert seg["sigma_mm"][i] == pytest.approx(np.std(x_cross), rel=0.03)


def test_surface_refuses_too_few_or_collinear_positions():
    with pytest.raises(FitError, match="at least 3 positions"):
        fit_surface([0, 1], [0, 1], [1, 2], [0.1, 0.1])
    with pytest.raises(FitError, match="lie on a line"):
        fit_surface([0, 1, 2, 3], [0, 1, 2, 3], [1, 2, 3, 4], [0.1] * 4)
    with pytest.raises(ConfigError, match="degree of 1 or 2"):
        fit_surface([0, 1, 2], [0, 1, 0], [1, 2, 3], [0.1] * 3, degree=3)


def test_no_worker_pool_is_needed_to_read_the_demo_manifest():
    # the bundled demo wafer (invented) is a valid manifest with a 3 x 3 grid
    demo = os.path.join(os.path.dirname(__file__), "..", "..", "data_examples", "wafer",
                        "manifest.csv")
    specs = read_manifest(demo)
    assert len(specs) == 9
    assert sorted({s.x_mm for s in specs}) == [-12.0, 0.0, 12.0]
    assert all(s.file.is_file() for s in specs)


@pytest.mark.parametrize("second", ["absolute", "dotdot", "symlink"])
def test_the_same_map_under_two_names_is_refused_naming_both_rows(tmp_path, second):
    # common practice, no published source: one map is one position, however it is named
    (tmp_path / "maps").mkdir()
    (tmp_path / "maps" / "a.nc").write_bytes(b"invented")
    (tmp_path / "other").mkdir()
    name = {"absolute": str(tmp_path / "maps" / "a.nc"),
            "dotdot": "other/../maps/a.nc",
            "symlink": "link.nc"}[second]
    if second == "symlink":
        os.symlink(tmp_path / "maps" / "a.nc", tmp_path / "link.nc")
    path = _manifest(tmp_path, f"file,x [mm],y [mm]\nmaps/a.nc,1,2\n{name},3,4\n")
    with pytest.raises(DataError, match=r"row 2 \(line 3\).*is the same map as 'maps/a.nc' "
                       r"in row 1 \(line 2\)"):
        read_manifest(path)


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

"""Smoke test of the benchmarks in tests/benchmarks: every one runs with tiny sizes.

Nothing here asserts on time.  Each benchmark is run once on a tiny problem so that it
cannot rot, and the parts that compute something other than a time are checked against
a reference outside the benchmark: the floor Lorentzian against its closed form, the
lmfit user's residual (written independently, with numpy's eigen-solver) against
polkit's likelihood, and the Cramer-Rao bound (Schur complement of the nuisance
amplitudes) against the full inverse Fisher matrix from SciPy's numerical Jacobian.
"""

from __future__ import annotations

import importlib
import json
import math
import sys
from pathlib import Path

import numpy as np
import pytest

BENCH = Path(__file__).resolve().parent / "benchmarks"
DEMO = Path(__file__).resolve().parents[1] / "data_examples"


@pytest.fixture(scope="module")
def bench():
    """Import a benchmark module by name (the folder is put on sys.path for the module)."""
    added = str(BENCH) not in sys.path
    if added:
        sys.path.insert(0, str(BENCH))
    try:
        yield importlib.import_module
    finally:
        if added:
            sys.path.remove(str(BENCH))


@pytest.fixture(scope="module")
def tiny_results(bench) -> dict:
    """Every benchmark of this folder run once with tiny sizes (the lmfit part if installed)."""
    results = {
        "hot_path": bench("bench_hot_path").run(True, n_angles=6, n_energies=40, n_walkers=4,
                                                repeats=2, measure_compile=False),
        "peer": bench("bench_peer").run(True, n_angles=5, n_energies=60, n_walkers=12,
                                        steps=30, loop_baseline=False),
        "scaling": bench("bench_scaling").run(True, angles=(3, 6), n_energies=50, n_walkers=4,
                                              repeats=1),
        "efficiency": bench("bench_efficiency").run(True, n_angles=10, n_energies=160,
                                                    n_maps=1, n_repeats=1, steps=30,
                                                    n_walkers=16),
        "end_to_end": bench("bench_end_to_end").run(
            True, demo=False, survey=False,
            commands=[("peak-table fit", [
                "dispersion", str(DEMO / "ds1_p2_emission_nm.txt"), "--peaks-only",
                "--out", "{out}/fit", "--quiet", "--max-steps", "30", "--seed", "3"])]),
    }
    return results


# ----------------------------------------------------------------------------------------
# the floor and the hot path
# ----------------------------------------------------------------------------------------
def test_floor_lorentzian_matches_closed_form(bench):
    hp = bench("bench_hot_path")
    energy = np.linspace(-1.0, 1.0, 201)
    centre = np.array([[[0.0]], [[0.3]]])
    half = np.array([[[0.1]], [[0.2]]])
    plain = hp.floor_plain(energy, centre, half)
    in_place = hp.floor_in_place(energy, centre, half)
    # Source: Lorentzian h / ((E - x)^2 + h^2) equals 1/h at its centre and 1/(2h) at
    # E = x +/- h (half maximum: h is the half width)
    np.testing.assert_allclose(plain[0, 0, 100], 1.0 / 0.1, rtol=1e-12)  # E = 0
    np.testing.assert_allclose(plain[0, 0, 110], 1.0 / 0.2, rtol=1e-12)  # E = 0.1
    np.testing.assert_allclose(plain[1, 0, 130], 1.0 / 0.2, rtol=1e-12)  # E = 0.3
    np.testing.assert_allclose(plain[1, 0, 150], 1.0 / 0.4, rtol=1e-12)  # E = 0.5
    np.testing.assert_allclose(in_place, plain, rtol=1e-14)
    out = np.empty_like(plain)
    assert hp.floor_in_place(energy, centre, half, out=out) is out
    np.testing.assert_allclose(out, plain, rtol=1e-14)


def test_hot_path_benchmark_runs(tiny_results):
    r = tiny_results["hot_path"]
    assert r["log_likelihood_finite"]
    for key in ("hot_path_ms", "hot_path_ratio"):
        assert math.isfinite(r[key]) and r[key] > 0, key
    assert set(r["floor_ms"]) == {"plain", "in_place", "preallocated", "preallocated_float32"}
    assert r["floor_used"] in r["hot_path_ratio_by_floor"]
    assert r["hot_path_ratio"] == max(r["hot_path_ratio_by_floor"].values())
    assert r["grid"] == {"walkers": 4, "angles": 6, "energies": 40}
    assert any(name in row["function"] for row in r["profile_top"]
               for name in ("spectral.py", "projection.py", "kernels.py"))
    assert math.isfinite(r["numpy_path_ms"]) and r["numpy_path_ms"] > 0
    # the compiled and numpy paths agree (tolerance argued in/numerics/test_spectral_kernels.py)
    assert r["compiled_minus_numpy_max_abs"] < 1e-6
    if r["compiled_path"]:
        assert r["numba"] is not None
        assert "error" not in r["first_call"], r["first_call"]
        assert set(r["first_call"]) == {"cache_load_s"}
    else:
        assert r["first_call"] is None


# ----------------------------------------------------------------------------------------
# against the peer
# ----------------------------------------------------------------------------------------
def test_user_residual_has_the_same_physics(bench):
    """The peer's residual, written without polkit, gives polkit's chi^2 at any point."""
    bp, hp = bench("bench_peer"), bench("bench_hot_path")
    da, inv_var, _ = hp.simulated_map(7, 90, seed=5)
    space = bp.flat_space()
    problem = hp.problem_for(da, inv_var, space=space)
    rng = np.random.default_rng(11)
    truth = np.array([hp.TRUTH[n] for n in space.names])
    width = space.bounds[:, 1] - space.bounds[:, 0]
    points = truth + 0.03 * width * rng.uniform(-1.0, 1.0, (3, truth.size))
    chi2_polkit = -2.0 * problem.log_likelihood(points)
    args = (problem.in_plane, problem.energy, problem.y, np.sqrt(inv_var))
    for fn in (bp.user_residual, bp.user_residual_per_angle):
        chi2 = [np.sum(fn(dict(zip(space.names, p, strict=True)), *args) ** 2) for p in points]
        # Source: the same model written independently (numpy.linalg.eigvals of the 2x2
        # Hamiltonian, partial fractions of G_CC, least squares per angle); the amplitudes
        # are positive here, so polkit's non-negativity constraint is inactive
        np.testing.assert_allclose(chi2, chi2_polkit, rtol=1e-9)


def test_peer_benchmark_polkit_side_runs(tiny_results):
    r = tiny_results["peer"]
    assert r["same_physics_chi2_max_rel_diff"] < 1e-9
    assert r["polkit"]["min_ess_bulk"] > 0 and r["polkit"]["wall_s"] > 0
    assert set(r["polkit"]["median"]) == set(r["parameters"])
    assert set(r["one_time_costs_s"]) == {"polkit_first_call_s", "arviz_first_diagnostics_s"}
    assert all(v >= 0 for v in r["one_time_costs_s"].values())


def test_peer_benchmark_lmfit_side_runs(tiny_results):
    pytest.importorskip("lmfit", reason="lmfit is a benchmark-only dependency "
                                        "(pip install -e \".[bench]\"); the peer side is skipped")
    r = tiny_results["peer"]
    assert r["lmfit"]["min_ess_bulk"] > 0
    assert math.isfinite(r["ess_per_second_ratio"]) and r["ess_per_second_ratio"] > 0
    assert set(r["median_difference_in_sd"]) == set(r["parameters"])
    # a fresh process adds the one-time costs to polkit's time, never the other way
    assert 0 < r["ess_per_second_ratio_fresh_process"] <= r["ess_per_second_ratio"]


def test_peer_benchmark_says_why_without_lmfit(bench, monkeypatch):
    """Without lmfit the benchmark still runs polkit's side and says what to install."""
    monkeypatch.setitem(sys.modules, "lmfit", None)  # makes `import lmfit` fail
    r = bench("bench_peer").run(True, n_angles=4, n_energies=40, n_walkers=12, steps=12,
                                loop_baseline=False)
    assert "pip install" in r["lmfit"]["skipped"]
    assert r["ess_per_second_ratio"] is None


# ----------------------------------------------------------------------------------------
# scaling
# ----------------------------------------------------------------------------------------
def test_scaling_benchmark_runs(tiny_results):
    r = tiny_results["scaling"]
    assert [s["pixels"] for s in r["sizes"]] == [150, 300]
    for s in r["sizes"]:
        assert s["ms_per_call"] > 0
        # the problem holds the map, so set-up plus call holds at least the map's bytes
        assert s["setup_and_call_peak_MiB"] >= s["map_MiB"]
        assert s["call_peak_MiB"] > 0
    assert math.isfinite(r["time_exponent"])


# ----------------------------------------------------------------------------------------
# statistical efficiency
# ----------------------------------------------------------------------------------------
def test_cramer_rao_bound_matches_full_fisher_inverse(bench):
    """Schur-complement bound == diagonal of the full inverse Fisher (SciPy's Jacobian)."""
    from scipy.differentiate import jacobian

    from polkit.models.simulate import simulate_map

    be, hp = bench("bench_efficiency"), bench("bench_hot_path")
    n_angles, n_energies = 4, 120
    da, inv_var, _ = hp.simulated_map(n_angles, n_energies, seed=2)
    problem = hp.problem_for(da, inv_var, sample_noise=False)
    names = problem.space.names
    truth = hp.truth_vector(problem.space)
    occ = np.broadcast_to(np.asarray(hp.OCCUPATION), (n_angles, 2))
    ours = be.cramer_rao(problem, truth, occ)["bound"]

    angles, energy = problem.in_plane, problem.energy
    sqrt_w = np.sqrt(inv_var).ravel()
    scale = np.array([2e-4, 2e-4, 0.02, 0.2, 0.05, 0.05])  # O(1) variables for SciPy
    n_phys = len(names)

    def whitened_model(x):  # x: (P_all, ...) -> (pixels, ...)
        flat = x.reshape(x.shape[0], -1)
        out = np.empty((n_angles * n_energies, flat.shape[1]))
        for j in range(flat.shape[1]):
            t = dict(zip(names, truth + scale * flat[:n_phys, j], strict=True))
            amps = occ + flat[n_phys:n_phys + 2 * n_angles, j].reshape(n_angles, 2)
            bg = hp.BACKGROUND + flat[n_phys + 2 * n_angles:, j]
            sim = simulate_map(angles, energy, kind="emission", e_c0=t["cavity_energy"],
                               n_eff=t["n_eff"], e_x=t["exciton_energy"],
                               g=0.5e-3 * t["rabi_splitting"],
                               gamma_c=1e-3 * t["cavity_linewidth"],
                               gamma_x=1e-3 * t["exciton_linewidth"], amplitudes=amps,
                               background=bg)
            out[:, j] = sim.signal.ravel() * sqrt_w
        return out.reshape((-1,) + x.shape[1:])

    n_all = n_phys + 3 * n_angles
    res = jacobian(whitened_model, np.zeros(n_all), initial_step=0.05,
                   tolerances={"atol": 1e-9, "rtol": 1e-7})
    assert np.all(res.success)
    fisher = res.df.T @ res.df
    cov = np.linalg.inv(fisher)[:n_phys, :n_phys] * np.outer(scale, scale)
    full = np.sqrt(np.diag(cov))
    i_c, i_x = names.index("cavity_energy"), names.index("exciton_energy")
    detuning = 1e3 * np.sqrt(cov[i_c, i_c] + cov[i_x, i_x] - 2.0 * cov[i_c, i_x])
    # Source: Cramer-Rao bound = diagonal of the inverse Fisher information, the marginal
    # block by the Schur complement (Kay, Fundamentals of Statistical Signal Processing:
    # Estimation Theory, 1993, ch. 3); here computed by brute force over all parameters
    np.testing.assert_allclose([ours[n] for n in names], full, rtol=1e-6)
    np.testing.assert_allclose(ours["detuning"], detuning, rtol=1e-6)


def test_efficiency_benchmark_runs(tiny_results):
    r = tiny_results["efficiency"]
    assert set(r["efficiency_ratio_targeted"]) == {"rabi_splitting", "detuning",
                                                   "exciton_energy"}
    for name, row in r["parameters"].items():
        assert row["cramer_rao_bound"] > 0, name
        assert math.isfinite(row["efficiency_ratio"]), name
        assert math.isfinite(row["peak_table_rmse_over_whole_map_rmse"]), name


# ----------------------------------------------------------------------------------------
# end to end and the runner
# ----------------------------------------------------------------------------------------
def test_end_to_end_benchmark_runs(tiny_results):
    r = tiny_results["end_to_end"]
    (c,) = r["commands"].values()
    assert c["exit_status"] in (0, 3), c["stderr_tail"]
    assert c["wall_s"] > 0
    assert c["command"].startswith("polkit dispersion data_examples")


def test_runner_figures_are_one_json_object(bench, tiny_results):
    runner = bench("run")
    figures = runner.figures(tiny_results)
    assert {"hot_path_ratio", "ess_per_second_ratio"} <= set(figures)
    assert figures["hot_path_ratio"] > 0
    assert "failed" not in figures
    json.loads(json.dumps(figures))
    info = runner.machine()
    assert info["numpy"] == np.__version__
    assert info["cpu_count"] >= 1


def test_runner_reports_a_failing_benchmark(bench, monkeypatch, capsys):
    runner = bench("run")
    module = bench("bench_hot_path")

    def broken(quick, **kwargs):
        raise ValueError("invented failure")

    monkeypatch.setattr(module, "run", broken)
    status = runner.main(["--only", "hot_path"])
    out = capsys.readouterr().out
    assert status == 1
    figures = json.loads(out[out.index("\n{") + 1:])
    assert figures["failed"] == {"hot_path": "ValueError: invented failure"}
    assert figures["hot_path_ratio"] is None

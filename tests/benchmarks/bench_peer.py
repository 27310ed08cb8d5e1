"""Against the peer: effective samples per second, polkit versus a careful lmfit user.

    python tests/benchmarks/bench_peer.py [--quick]

Both sides sample the same posterior of the same (small, invented) emission map: six
physics parameters (exciton and cavity energies, n_eff, Rabi splitting, two linewidths)
with flat priors on the same bounds, the noise known (no noise scale), the same 32 walkers
started from the same ensemble and run for the same number of steps.

* polkit: :func:`polkit.inference.run_ensemble` on
  :meth:`DispersionProblem.log_likelihood` (one vectorised call per ensemble step,
  differential-evolution moves, its own convergence report included in the time).
* the peer: what a careful user writes with general-purpose tools -- an lmfit
  ``Minimizer`` over a residual function and ``Minimizer.emcee`` (lmfit's defaults:
  emcee's stretch move, one residual call per walker).  The per-angle branch occupations
  and background (3 per angle) are **solved inside the residual** by weighted linear least
  squares, batched over the angles of the map; making them lmfit parameters instead would
  give 3 x (angles) more sampled dimensions, which 32 walkers cannot explore, so the
  comparison would not be about the same walkers.  The residual writes the physics
  independently of polkit (the 2 x 2 non-Hermitian Hamiltonian diagonalised with
  ``numpy.linalg.eigvals`` per angle, the photon Green's function split into its poles);
  its chi^2 equals polkit's to rounding (checked and reported).  The amplitudes are not
  constrained to be >= 0 there; at this map's occupations they are far from zero, so the
  two likelihoods coincide on the posterior.

Effective samples per second: the minimum ArviZ bulk ESS over the parameters (walkers as
chains, the first third of the steps discarded on both sides) divided by the sampling
wall time.  The posteriors must agree: every median within one posterior standard
deviation.  The script prints numbers and never asserts on them.

One-time costs of a process are paid before either side is timed, as the imports are:
polkit's compiled kernels are loaded (from numba's cache, or compiled) by the first
likelihood call of the same-physics check, and ArviZ's own numba functions (compiled by
ArviZ on its first diagnostic call whenever numba is installed) by one diagnostic call on
a dummy chain.  Both one-time costs are measured and reported, and the ratio a fresh
process would see (polkit's wall time plus both costs) is reported beside the headline.
"""

from __future__ import annotations

import argparse
import contextlib
import io
import json
import time
import warnings

import numpy as np
from bench_hot_path import SEED, TRUTH, problem_for, simulated_map

#: flat prior bounds shared by both sides, in the sampled units
BOUNDS = {
    "exciton_energy": (1.535, 1.555),
    "cavity_energy": (1.530, 1.552),
    "n_eff": (2.5, 4.5),
    "rabi_splitting": (4.0, 20.0),
    "cavity_linewidth": (0.05, 2.0),
    "exciton_linewidth": (0.05, 3.0),
}
LMFIT_MISSING = ("lmfit is not installed; it is a benchmark-only dependency: "
                 "pip install -e \".[bench]\"")


def flat_space():
    """The six physics parameters with flat priors on :data:`BOUNDS` (no noise scale)."""
    from polkit.inference import Parameter, ParameterSpace, Prior

    units = {"exciton_energy": "eV", "cavity_energy": "eV", "n_eff": "1",
             "rabi_splitting": "meV", "cavity_linewidth": "meV", "exciton_linewidth": "meV"}
    return ParameterSpace([Parameter(n, units[n], Prior.uniform(*BOUNDS[n])) for n in BOUNDS])


def user_residual(values: dict, angle_deg: np.ndarray, energy: np.ndarray, y: np.ndarray,
                  sqrt_w: np.ndarray) -> np.ndarray:
    """Weighted residual of the whole map for one parameter set, as a user would write it.

    ``values`` holds the six parameters (eV, 1, meV).  Per angle: the cavity
    ``E_C = E_C0 / sqrt(1 - sin^2(theta) / n_eff^2)``, the Hamiltonian
    ``[[E_C - i gC/2, g], [g, E_X - i gX/2]]`` (g = Rabi / 2) diagonalised with
    ``numpy.linalg.eigvals``, the photon residue of each pole ``r = (eps - E_X + i gX/2) /
    (eps - eps')``, branch lines ``-Im(r / (E - eps)) / pi``, and the two branch
    occupations plus a constant background solved by weighted least squares (normal
    equations, batched over angles).  Returns ``sqrt(w) (y - model)`` flattened.
    """
    ex, ec0, n = values["exciton_energy"], values["cavity_energy"], values["n_eff"]
    g = 0.5e-3 * values["rabi_splitting"]
    gc, gx = 1e-3 * values["cavity_linewidth"], 1e-3 * values["exciton_linewidth"]
    s = np.sin(np.deg2rad(angle_deg)) / n
    ec = ec0 / np.sqrt(1.0 - s * s)
    ham = np.empty((angle_deg.size, 2, 2), dtype=complex)
    ham[:, 0, 0] = ec - 0.5j * gc
    ham[:, 0, 1] = ham[:, 1, 0] = g
    ham[:, 1, 1] = ex - 0.5j * gx
    eps = np.linalg.eigvals(ham)
    eps = np.take_along_axis(eps, np.argsort(eps.real, axis=1), axis=1)
    r_lo = (eps[:, 0] - (ex - 0.5j * gx)) / (eps[:, 0] - eps[:, 1])
    res = np.stack([r_lo, 1.0 - r_lo], axis=1)
    lines = -(res[:, :, None] / (energy[None, None, :] - eps[:, :, None])).imag / np.pi
    design = np.concatenate([lines, np.ones((angle_deg.size, 1, energy.size))], axis=1)
    design *= sqrt_w[:, None, :]
    rhs = y * sqrt_w
    gram = design @ design.transpose(0, 2, 1)
    coef = np.linalg.solve(gram, design @ rhs[:, :, None])
    return (rhs - np.sum(coef * design, axis=1)).ravel()


def user_residual_per_angle(values: dict, angle_deg: np.ndarray, energy: np.ndarray,
                            y: np.ndarray, sqrt_w: np.ndarray) -> np.ndarray:
    """The residual of :func:`user_residual` with a loop over angles, the way most scripts go.

    Same physics; each angle builds its own 2 x 2 Hamiltonian and solves its amplitudes
    with :func:`numpy.linalg.lstsq`.
    """
    ex, ec0, n = values["exciton_energy"], values["cavity_energy"], values["n_eff"]
    g = 0.5e-3 * values["rabi_splitting"]
    gc, gx = 1e-3 * values["cavity_linewidth"], 1e-3 * values["exciton_linewidth"]
    out = np.empty_like(y)
    ones = np.ones_like(energy)
    for i, theta in enumerate(angle_deg):
        s = np.sin(np.deg2rad(theta)) / n
        ec = ec0 / np.sqrt(1.0 - s * s)
        ham = np.array([[ec - 0.5j * gc, g], [g, ex - 0.5j * gx]])
        eps = np.sort_complex(np.linalg.eigvals(ham))
        r_lo = (eps[0] - (ex - 0.5j * gx)) / (eps[0] - eps[1])
        lo = -(r_lo / (energy - eps[0])).imag / np.pi
        up = -((1.0 - r_lo) / (energy - eps[1])).imag / np.pi
        design = np.stack([lo, up, ones], axis=1) * sqrt_w[i, :, None]
        rhs = y[i] * sqrt_w[i]
        coef, *_ = np.linalg.lstsq(design, rhs, rcond=None)
        out[i] = rhs - design @ coef
    return out.ravel()


def _warm_diagnostics(n_walkers: int, n_params: int) -> float:
    """Run polkit's ArviZ diagnostics once on a dummy chain; returns the one-time part (s).

    ArviZ compiles some of its functions with numba on first use when numba is installed;
    that cost belongs to the process, not to a sampling run.  The figure is the first
    call's time minus a second call's.
    """
    import xarray as xr

    from polkit.inference.diagnostics import arviz_diagnostics

    dummy = np.random.default_rng(0).standard_normal((n_walkers, 200, n_params))
    ds = xr.Dataset({f"p{j}": (("chain", "draw"), dummy[:, :, j]) for j in range(n_params)})
    t0 = time.perf_counter()
    arviz_diagnostics(ds)
    t1 = time.perf_counter()
    arviz_diagnostics(ds)
    return max((t1 - t0) - (time.perf_counter() - t1), 0.0)


def _ess_and_summary(chain: np.ndarray, names: list[str], discard: int) -> dict:
    import arviz as az
    import xarray as xr

    kept = chain[discard:]  # (steps, walkers, P)
    ds = xr.Dataset({n: (("chain", "draw"), kept[:, :, j].T) for j, n in enumerate(names)})
    with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        ess = az.ess(ds, method="bulk")
    flat = kept.reshape(-1, kept.shape[-1])
    return {
        "ess_bulk": {n: float(ess[n].values) for n in names},
        "min_ess_bulk": float(min(float(ess[n].values) for n in names)),
        "median": {n: float(np.median(flat[:, j])) for j, n in enumerate(names)},
        "sd": {n: float(np.std(flat[:, j], ddof=1)) for j, n in enumerate(names)},
    }


def _run_lmfit(lmfit, user_fn, names, truth, args, start, n_steps, discard, seed) -> dict:
    params = lmfit.Parameters()
    for j, n in enumerate(names):
        params.add(n, value=float(truth[j]), min=BOUNDS[n][0], max=BOUNDS[n][1])

    def residual(p):
        return user_fn(p.valuesdict(), *args)

    mini = lmfit.Minimizer(residual, params)
    n_walkers = start.shape[0]
    captured = io.StringIO()  # lmfit prints emcee's short-chain autocorrelation notice
    with contextlib.redirect_stdout(captured), warnings.catch_warnings():
        warnings.simplefilter("ignore")
        c0, t0 = time.process_time(), time.perf_counter()
        mini.emcee(params=params, steps=n_steps, nwalkers=n_walkers, burn=0, thin=1,
                   pos=start, is_weighted=True, seed=seed, progress=False)
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    summary = _ess_and_summary(mini.sampler.get_chain(), names, discard)
    summary.update(wall_s=wall, cpu_s=cpu, ess_per_s=summary["min_ess_bulk"] / wall,
                   ess_per_cpu_s=summary["min_ess_bulk"] / cpu,
                   ms_per_step=1e3 * wall / n_steps,
                   acceptance=float(np.mean(mini.sampler.acceptance_fraction)),
                   version=lmfit.__version__)
    return summary


def _compare(pk: dict, lm: dict, names: list[str]) -> dict:
    z = {n: abs(pk["median"][n] - lm["median"][n]) / min(pk["sd"][n], lm["sd"][n])
         for n in names}
    return {
        "median_difference_in_sd": z,
        "posteriors_agree": bool(max(z.values()) <= 1.0),
        "sd_ratio_lmfit_over_polkit": {n: lm["sd"][n] / pk["sd"][n] for n in names},
        "time_per_step_ratio": lm["ms_per_step"] / pk["ms_per_step"],
        "ess_per_step_ratio": pk["min_ess_bulk"] / lm["min_ess_bulk"],
        "ess_per_second_ratio": pk["ess_per_s"] / lm["ess_per_s"],
        "ess_per_cpu_second_ratio": pk["ess_per_cpu_s"] / lm["ess_per_cpu_s"],
    }


def run(
    quick: bool = False,
    *,
    n_angles: int = 24,
    n_energies: int = 240,
    n_walkers: int = 32,
    steps: int | None = None,
    loop_baseline: bool = True,
) -> dict:
    """Sample the same posterior with polkit and with lmfit + emcee; returns the figures.

    Parameters
    ----------
    quick
        800 steps instead of 3000.
    n_angles, n_energies, n_walkers, steps
        Map size, walkers and steps (``steps`` overrides ``quick``).
    loop_baseline
        Also run the lmfit baseline whose residual loops over angles
        (:func:`user_residual_per_angle`).
    """
    import arviz  # noqa: F401  (imported before timing: polkit's report uses it)

    from polkit.errors import ConvergenceWarning
    from polkit.inference import SamplerSettings, run_ensemble

    n_steps = steps if steps is not None else (800 if quick else 3000)
    rng = np.random.default_rng(SEED + 1)
    da, inv_var, _ = simulated_map(n_angles, n_energies, seed=rng.integers(2**32))
    space = flat_space()
    problem = problem_for(da, inv_var, space=space)
    names = space.names
    args = (problem.in_plane, problem.energy, problem.y, np.sqrt(inv_var))

    # the same physics on both sides: chi^2 of the user's residuals against polkit's
    truth = np.array([TRUTH[n] for n in names])
    probe = truth + 0.02 * (space.bounds[:, 1] - space.bounds[:, 0]) * rng.uniform(
        -1, 1, (4, truth.size))
    probe[0] = truth
    one_time = {}
    t0 = time.perf_counter()
    chi2_polkit = -2.0 * problem.log_likelihood(probe)  # first call: loads the kernels
    t1 = time.perf_counter()
    problem.log_likelihood(probe)
    one_time["polkit_first_call_s"] = max((t1 - t0) - (time.perf_counter() - t1), 0.0)
    one_time["arviz_first_diagnostics_s"] = _warm_diagnostics(n_walkers, len(names))
    rel = []
    for fn in (user_residual, user_residual_per_angle):
        chi2 = np.array([np.sum(fn(dict(zip(names, p, strict=True)), *args) ** 2)
                         for p in probe])
        rel.append(float(np.max(np.abs(chi2 - chi2_polkit) / chi2_polkit)))

    # per-call cost of one walker's residual (context for the per-step times)
    per_call = {}
    values = dict(zip(names, truth, strict=True))
    for label, fn in (("batched_ms", user_residual), ("per_angle_ms", user_residual_per_angle)):
        reps = []
        for _ in range(7):
            t0 = time.perf_counter()
            fn(values, *args)
            reps.append(time.perf_counter() - t0)
        per_call[label] = 1e3 * float(np.median(reps))

    # one shared starting ensemble: a small ball around the truth inside the bounds
    scale = 1e-3 * (space.bounds[:, 1] - space.bounds[:, 0])
    start = truth + scale * rng.standard_normal((n_walkers, truth.size))
    discard = n_steps // 3
    seed = int(rng.integers(2**31))
    out: dict = {
        "map": {"angles": n_angles, "energies": n_energies, "pixels": n_angles * n_energies},
        "walkers": n_walkers,
        "steps": n_steps,
        "discarded_steps": discard,
        "parameters": names,
        "same_physics_chi2_max_rel_diff": max(rel),
        "linear_parameters": "solved inside the residual (2 occupations + background per "
                             "angle), not sampled",
        "user_residual_per_call": per_call,
        "one_time_costs_s": one_time,
        "target_ratio": 20.0,
    }

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        c0, t0 = time.process_time(), time.perf_counter()
        run = SamplerSettings(n_walkers=n_walkers, max_steps=n_steps, min_steps=n_steps,
                              check_every=n_steps, progress=False)
        result = run_ensemble(problem.log_likelihood, space, start, run, seed=seed)
        wall, cpu = time.perf_counter() - t0, time.process_time() - c0
    pk = _ess_and_summary(result.chains[0], names, discard)
    pk.update(wall_s=wall, cpu_s=cpu, ess_per_s=pk["min_ess_bulk"] / wall,
              ess_per_cpu_s=pk["min_ess_bulk"] / cpu, ms_per_step=1e3 * wall / n_steps,
              acceptance=float(np.mean(result.acceptance)))
    out["polkit"] = pk

    try:
        import lmfit
    except ImportError:
        out["lmfit"] = {"skipped": LMFIT_MISSING}
        out["ess_per_second_ratio"] = None
        return out

    lm = _run_lmfit(lmfit, user_residual, names, truth, args, start, n_steps, discard, seed)
    out["lmfit"] = lm
    out.update(_compare(pk, lm, names))
    # what a fresh process sees: polkit's one-time costs added to its wall time
    cold_wall = pk["wall_s"] + sum(one_time.values())
    out["ess_per_second_ratio_fresh_process"] = (pk["min_ess_bulk"] / cold_wall) / lm["ess_per_s"]
    if loop_baseline:
        lm2 = _run_lmfit(lmfit, user_residual_per_angle, names, truth, args, start, n_steps,
                         discard, seed)
        out["lmfit_per_angle_loop"] = lm2
        out["per_angle_loop_comparison"] = _compare(pk, lm2, names)
    return out


def print_report(r: dict) -> None:
    """Readable summary of :func:`run`'s figures."""
    m = r["map"]
    print(f"against the peer: {m['angles']} x {m['energies']} map, {r['walkers']} walkers, "
          f"{r['steps']} steps (first {r['discarded_steps']} discarded)")
    print(f"  same physics: chi^2 of the user's residuals vs polkit, max rel. diff "
          f"{r['same_physics_chi2_max_rel_diff']:.1e}; one residual call "
          f"{r['user_residual_per_call']['batched_ms']:.2f} ms batched over angles, "
          f"{r['user_residual_per_call']['per_angle_ms']:.2f} ms looping over angles")
    rows = [("polkit run_ensemble", r["polkit"])]
    if "skipped" in r["lmfit"]:
        print(f"  lmfit part skipped: {r['lmfit']['skipped']}")
    else:
        rows.append(("lmfit emcee (batched)", r["lmfit"]))
        if "lmfit_per_angle_loop" in r:
            rows.append(("lmfit emcee (loop)", r["lmfit_per_angle_loop"]))
    print(f"  {'':22s} {'wall s':>8s} {'cpu s':>8s} {'ms/step':>8s} {'min ESS':>8s} "
          f"{'ESS/s':>8s} {'accept':>7s}")
    for label, s in rows:
        print(f"  {label:22s} {s['wall_s']:8.1f} {s['cpu_s']:8.1f} {s['ms_per_step']:8.2f} "
              f"{s['min_ess_bulk']:8.0f} {s['ess_per_s']:8.2f} {s['acceptance']:7.2f}")
    comparisons = [("batched residual", r)] if r.get("ess_per_second_ratio") else []
    if "per_angle_loop_comparison" in r:
        comparisons.append(("per-angle loop", r["per_angle_loop_comparison"]))
    if r.get("ess_per_second_ratio_fresh_process") is not None:
        ot = r["one_time_costs_s"]
        print(f"  one-time costs of the process, paid before timing: polkit kernels "
              f"{ot['polkit_first_call_s']:.2f} s, ArviZ first diagnostics "
              f"{ot['arviz_first_diagnostics_s']:.2f} s; counted in polkit's time, the "
              f"ratio would be {r['ess_per_second_ratio_fresh_process']:.1f}")
    for label, c in comparisons:
        zmax = max(c["median_difference_in_sd"].values())
        print(f"  vs {label}: ESS/s ratio {c['ess_per_second_ratio']:.1f} (per CPU second "
              f"{c['ess_per_cpu_second_ratio']:.1f}; target >= {r['target_ratio']:g}) = time "
              f"per step x{c['time_per_step_ratio']:.1f} times ESS per step "
              f"x{c['ess_per_step_ratio']:.2f}; posteriors agree: {c['posteriors_agree']} "
              f"(largest median difference {zmax:.2f} sd)")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="800 steps instead of 3000")
    result = run(parser.parse_args().quick)
    print_report(result)
    print(json.dumps(result, indent=2))

"""Hot path against the floor: one whole-map log-likelihood call versus one numpy Lorentzian pass.

    python tests/benchmarks/bench_hot_path.py [--quick]

The hot path of a whole-map dispersion fit is
:meth:`polkit.jobs.dispersion.problem.DispersionProblem.log_likelihood` called on the
whole ensemble at once (``theta`` of shape ``(W, P)``): the branch bases of every walker
and angle, the weighted Gram blocks, the background eliminated per angle and the
non-negative amplitudes solved in closed form.  The floor is the time numpy needs for one
pass of a single Lorentzian ``h / ((E - x)^2 + h^2)`` over the same ``W x A x E`` grid
(the least work any evaluation of a line-shape model on that grid must do).  Both are timed
in the same process, repetitions interleaved, medians taken.  The floor is timed in three
float64 spellings -- the plain expression (fresh temporaries), in place into a fresh
output, and in place into a preallocated output (no allocation, no page faults: the
arithmetic and memory traffic alone) -- and the ratio is taken against the fastest, the
strictest reading of "the time numpy needs".  The preallocated floor in float32 is printed
as context (what single precision could gain at most; polkit evaluates in float64).
Besides the medians, the ratio of the minima (the least disturbed repetition of each) is
reported: on a loaded machine the short, memory-bound floor is stretched more than the
hot path, so the medians flatter the ratio and the minima are the check.
A cProfile summary shows where the time goes.  The script prints numbers and never
asserts on them.

The hot path runs polkit's compiled kernels (:mod:`polkit.numerics.kernels`, numba) when
they are available; the same call on the pure-numpy path is timed beside it (interleaved)
as context, and the cost of the first compiled call in a fresh state (numba compiling, or
loading its on-disk cache) is measured in a separate interpreter and reported apart: a
one-time cost per machine (compile) or per process (cache load), not part of a call.

The map is invented: a GaAs-like two-oscillator emission map simulated with polkit's own
model (seeded), in counts with Gaussian noise of the CCD variance ``counts / gain +
read_noise^2``.  This module also provides that map to the other benchmarks.
"""

from __future__ import annotations

import argparse
import cProfile
import gc
import json
import os
import pstats
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import numpy as np
import xarray as xr

#: the invented sample's parameters, in the units polkit samples (eV, meV, 1)
TRUTH = {
    "exciton_energy": 1.545,
    "cavity_energy": 1.541,
    "n_eff": 3.4,
    "rabi_splitting": 12.0,
    "cavity_linewidth": 0.3,
    "exciton_linewidth": 0.8,
}
#: branch occupations (lower, upper) in counts x eV, background in counts
OCCUPATION = (3.0, 0.36)
BACKGROUND = 60.0
GAIN = 1.0  # electrons per count
READ_NOISE = 4.0  # counts
ENERGY_WINDOW = (1.528, 1.562)  # eV
ANGLE_SPAN = 24.0  # degree, symmetric about normal incidence
SEED = 20261208


def simulated_map(
    n_angles: int,
    n_energies: int,
    *,
    seed: int | np.random.SeedSequence = SEED,
    truth: dict | None = None,
    energy_window: tuple[float, float] = ENERGY_WINDOW,
) -> tuple[xr.DataArray, np.ndarray, np.ndarray]:
    """An invented emission map with known truth and Gaussian CCD noise.

    Returns
    -------
    (map, inverse_variance, noiseless)
        The canonical map (counts, with ``gain`` and ``read_noise`` attrs), the true
        inverse variance per pixel (1/counts^2) and the noiseless signal.
    """
    from polkit.models.simulate import simulate_map

    t = dict(TRUTH if truth is None else truth)
    angles = np.linspace(-ANGLE_SPAN, ANGLE_SPAN, n_angles)
    energy = np.linspace(*energy_window, n_energies)
    sim = simulate_map(
        angles, energy, kind="emission",
        e_c0=t["cavity_energy"], n_eff=t["n_eff"], e_x=t["exciton_energy"],
        g=0.5e-3 * t["rabi_splitting"], gamma_c=1e-3 * t["cavity_linewidth"],
        gamma_x=1e-3 * t["exciton_linewidth"],
        amplitudes=np.broadcast_to(np.asarray(OCCUPATION), (n_angles, 2)),
        background=BACKGROUND,
    )
    clean = np.asarray(sim.signal, dtype=float)
    variance = np.clip(clean, 0.0, None) / GAIN + READ_NOISE**2
    rng = np.random.default_rng(seed)
    counts = clean + np.sqrt(variance) * rng.standard_normal(clean.shape)
    da = xr.DataArray(
        counts, dims=("angle", "energy"),
        coords={"angle": ("angle", angles, {"units": "degree", "long_name": "emission angle"}),
                "energy": ("energy", energy, {"units": "eV", "long_name": "photon energy"})},
        attrs={"units": "counts", "kind": "emission", "gain": GAIN, "read_noise": READ_NOISE,
               "sample": "invented benchmark map (simulated)", "masked": 0},
    )
    return da, 1.0 / variance, clean


def problem_for(da: xr.DataArray, inv_var: np.ndarray, *, space=None, table=None,
                sample_noise: bool = True):
    """The :class:`DispersionProblem` of a simulated map (default priors around the truth)."""
    from polkit.jobs.dispersion.parameters import default_space
    from polkit.jobs.dispersion.problem import DispersionProblem

    energy = da["energy"].values.astype(float)
    if space is None:
        space = default_space(energy, TRUTH, sample_noise=sample_noise)
    return DispersionProblem(
        axis="angle", in_plane=da["angle"].values.astype(float), energy=energy,
        y=np.asarray(da.values, dtype=float), inv_var=inv_var, space=space, table=table,
    )


def truth_vector(space) -> np.ndarray:
    """The truth in the order of ``space`` (noise scale 1, mirror share 0.5)."""
    extra = {"noise_scale": 1.0, "mirror_fraction": 0.5}
    return np.array([TRUTH.get(n, extra.get(n, np.nan)) for n in space.names])


def walker_ball(space, n_walkers: int, rng: np.random.Generator, rel: float = 2e-4) -> np.ndarray:
    """``n_walkers`` points in a small ball around the truth (a posterior-sized spread)."""
    x = truth_vector(space)
    scale = np.maximum(np.abs(x), 1e-3) * rel
    return x + scale * rng.standard_normal((n_walkers, x.size))


# --------------------------------------------------------------------------------------
# the floor
# --------------------------------------------------------------------------------------
def floor_plain(energy: np.ndarray, centre: np.ndarray, half: np.ndarray,
                out: np.ndarray | None = None) -> np.ndarray:
    """One Lorentzian ``h / ((E - x)^2 + h^2)`` as the plain numpy expression (``out`` unused)."""
    return half / ((energy - centre) ** 2 + half * half)


def floor_in_place(energy: np.ndarray, centre: np.ndarray, half: np.ndarray,
                   out: np.ndarray | None = None) -> np.ndarray:
    """The same Lorentzian, every step in place in ``out`` (a fresh array when None)."""
    u = np.subtract(energy, centre, out=out)
    np.multiply(u, u, out=u)
    u += half * half
    np.divide(half, u, out=u)
    return u


def _numba_version() -> str | None:
    try:
        import numba
    except Exception:  # not installed, or does not import against this numpy
        return None
    return numba.__version__


_FIRST_CALL = """
import sys, time, json
t0 = time.perf_counter()
sys.path.insert(0, {here!r})
import numpy as np
from bench_hot_path import SEED, problem_for, simulated_map, walker_ball
rng = np.random.default_rng(SEED)
da, inv_var, _ = simulated_map({n_angles}, {n_energies}, seed=rng.integers(2**32))
problem = problem_for(da, inv_var)
theta = walker_ball(problem.space, {n_walkers}, rng)
t1 = time.perf_counter()
problem.log_likelihood(theta)
t2 = time.perf_counter()
problem.log_likelihood(theta)
t3 = time.perf_counter()
print(json.dumps({{"first_s": t2 - t1, "second_s": t3 - t2}}))
"""


def first_call_cost(n_angles: int, n_energies: int, n_walkers: int, *,
                    compile: bool = True) -> dict:
    """One-time cost of the first compiled call, measured in fresh interpreters.

    With ``compile`` the first run points numba at an empty cache folder
    (``NUMBA_CACHE_DIR``), so it compiles (``compile_s``); a second run reuses that folder
    and only loads the machine code (``cache_load_s``).  Without it, one run uses the
    usual cache (``cache_load_s``; it compiles if that cache is cold).  Each figure is the
    first call's time minus the second call's, so it holds importing numba plus compiling
    or loading, not the work of a call.
    """
    code = _FIRST_CALL.format(here=str(Path(__file__).resolve().parent), n_angles=n_angles,
                              n_energies=n_energies, n_walkers=n_walkers)
    out = {}
    with tempfile.TemporaryDirectory() as cache:
        env = dict(os.environ, NUMBA_CACHE_DIR=cache) if compile else dict(os.environ)
        for label in ("compile_s", "cache_load_s") if compile else ("cache_load_s",):
            done = subprocess.run([sys.executable, "-c", code], env=env, capture_output=True,
                                  text=True, timeout=600)
            if done.returncode != 0:
                return {"error": " ".join(done.stderr.strip().splitlines()[-1:])}
            r = json.loads(done.stdout.strip().splitlines()[-1])
            out[label] = r["first_s"] - r["second_s"]
    return out


def _profile_summary(func, n_calls: int, top: int = 8) -> list[dict]:
    prof = cProfile.Profile()
    prof.enable()
    for _ in range(n_calls):
        func()
    prof.disable()
    stats = pstats.Stats(prof)
    total = sum(v[2] for v in stats.stats.values())  # total own time
    rows = []
    for (filename, line, name), (_, ncalls, tottime, cumtime, _) in stats.stats.items():
        path = Path(filename)
        short = "/".join(path.parts[-2:]) if path.suffix == ".py" else filename
        rows.append({
            "function": f"{short}:{line}({name})",
            "calls_per_eval": ncalls / n_calls,
            "own_ms_per_eval": 1e3 * tottime / n_calls,
            "cum_ms_per_eval": 1e3 * cumtime / n_calls,
            "own_share": tottime / total if total > 0 else float("nan"),
        })
    rows.sort(key=lambda r: r["own_ms_per_eval"], reverse=True)
    return rows[:top]


def run(
    quick: bool = False,
    *,
    n_angles: int = 80,
    n_energies: int = 600,
    n_walkers: int = 32,
    repeats: int | None = None,
    measure_compile: bool = True,
) -> dict:
    """Time the whole-map log-likelihood and the Lorentzian floor; returns the figures.

    Parameters
    ----------
    quick
        Fewer repetitions (7 instead of 21).
    n_angles, n_energies, n_walkers
        Grid of the benchmark (80 x 600 map, 32 walkers by default).
    repeats
        Interleaved repetitions (overrides ``quick``).
    measure_compile
        Also time a first call that compiles the kernels from scratch (a few seconds);
        otherwise only the first call that loads them from numba's cache.
    """
    reps = repeats if repeats is not None else (7 if quick else 21)
    rng = np.random.default_rng(SEED)
    da, inv_var, _ = simulated_map(n_angles, n_energies, seed=rng.integers(2**32))
    problem = problem_for(da, inv_var)
    theta = walker_ball(problem.space, n_walkers, rng)
    energy = problem.energy
    centre = rng.uniform(energy[0], energy[-1], size=(n_walkers, n_angles, 1))
    half = np.full((n_walkers, n_angles, 1), 0.5e-3 * TRUTH["cavity_linewidth"])

    e32, c32, h32 = (a.astype(np.float32) for a in (energy, centre, half))
    grid = (n_walkers, n_angles, n_energies)
    # floor spellings: (function, arguments, preallocated output)
    floors = {
        "plain": (floor_plain, (energy, centre, half), None),
        "in_place": (floor_in_place, (energy, centre, half), None),
        "preallocated": (floor_in_place, (energy, centre, half), np.empty(grid)),
        "preallocated_float32": (floor_in_place, (e32, c32, h32),
                                 np.empty(grid, dtype=np.float32)),
    }
    from polkit.numerics import kernels as _kernels

    compiled = _kernels.enabled()
    first = problem.log_likelihood(theta)  # warm-up (and a check that it is finite)
    previous = _kernels.use_compiled(False)
    try:
        numpy_value = problem.log_likelihood(theta)
    finally:
        _kernels.use_compiled(previous)
    for fn, args, buf in floors.values():
        fn(*args, out=buf)
    times: dict[str, list[float]] = {"hot": [], "numpy_path": [], **{k: [] for k in floors}}
    for _ in range(reps):
        gc.collect()
        t0 = time.perf_counter()
        problem.log_likelihood(theta)
        times["hot"].append(time.perf_counter() - t0)
        if compiled:
            previous = _kernels.use_compiled(False)
            try:
                t0 = time.perf_counter()
                problem.log_likelihood(theta)
                times["numpy_path"].append(time.perf_counter() - t0)
            finally:
                _kernels.use_compiled(previous)
        for name, (fn, args, buf) in floors.items():
            t0 = time.perf_counter()
            fn(*args, out=buf)
            times[name].append(time.perf_counter() - t0)
    if not compiled:
        times["numpy_path"] = times["hot"]
    med = {k: float(np.median(v)) for k, v in times.items()}
    low = {k: float(np.min(v)) for k, v in times.items()}
    t_hot = med["hot"]
    float64 = ("plain", "in_place", "preallocated")
    strictest = min(float64, key=lambda k: med[k])
    strictest_low = min(float64, key=lambda k: low[k])
    profile = _profile_summary(lambda: problem.log_likelihood(theta), max(2, reps // 3))
    n_elem = n_walkers * n_angles * n_energies
    return {
        "grid": {"walkers": n_walkers, "angles": n_angles, "energies": n_energies},
        "repeats": reps,
        "parameters": problem.space.names,
        "log_likelihood_finite": bool(np.all(np.isfinite(first))),
        "compiled_path": compiled,
        "numba": _numba_version(),
        "compiled_minus_numpy_max_abs": float(np.max(np.abs(first - numpy_value))),
        "numpy_path_ms": 1e3 * med["numpy_path"],
        "numpy_path_ms_min": 1e3 * low["numpy_path"],
        "numpy_path_ratio": med["numpy_path"] / med[strictest],
        "first_call": (first_call_cost(n_angles, n_energies, n_walkers, compile=measure_compile)
                       if compiled else None),
        "hot_path_ms": 1e3 * t_hot,
        "hot_path_ms_iqr": [1e3 * float(np.percentile(times["hot"], q)) for q in (25, 75)],
        "hot_path_ns_per_walker_pixel": 1e9 * t_hot / n_elem,
        "floor_ms": {k: 1e3 * med[k] for k in floors},
        "floor_used": strictest,
        "hot_path_ratio": t_hot / med[strictest],
        "hot_path_ratio_by_floor": {k: t_hot / med[k] for k in float64},
        # minima: the least disturbed repetition of each (a check on a loaded machine)
        "hot_path_ms_min": 1e3 * low["hot"],
        "floor_ms_min": {k: 1e3 * low[k] for k in floors},
        "hot_path_ratio_of_minima": low["hot"] / low[strictest_low],
        "hot_path_ratio_of_minima_by_floor": {k: low["hot"] / low[k] for k in float64},
        "target_ratio": 3.0,
        "profile_top": profile,
    }


def print_report(r: dict) -> None:
    """Readable summary of :func:`run`'s figures."""
    g = r["grid"]
    print(f"hot path: one log-likelihood call, {g['walkers']} walkers x {g['angles']} x "
          f"{g['energies']} map ({r['repeats']} interleaved repetitions, medians)")
    print(f"  {'':37s}{'median':>9s}    {'ratio':>5s}   {'minimum':>9s}    {'ratio':>5s}")
    print(f"  log-likelihood {'':22s}{r['hot_path_ms']:9.2f} ms {'':8s} "
          f"{r['hot_path_ms_min']:9.2f} ms   "
          f"({r['hot_path_ns_per_walker_pixel']:.2f} ns per walker-pixel, median)")
    labels = {"plain": "plain expression", "in_place": "in place, fresh output",
              "preallocated": "in place, preallocated output",
              "preallocated_float32": "the same in float32 (context)"}
    for key, label in labels.items():
        ratio = r["hot_path_ratio_by_floor"].get(key)
        ratio_low = r["hot_path_ratio_of_minima_by_floor"].get(key)
        med = f"{ratio:5.2f}" if ratio is not None else ""
        low = f"{ratio_low:5.2f}" if ratio_low is not None else ""
        print(f"  floor, {label:30s}{r['floor_ms'][key]:9.2f} ms {med:>5s}   "
              f"{r['floor_ms_min'][key]:9.2f} ms {low:>5s}")
    print(f"  hot_path_ratio {r['hot_path_ratio']:.2f} (medians) against the fastest float64 "
          f"floor ({r['floor_used']}); {r['hot_path_ratio_of_minima']:.2f} from the minima; "
          f"target <= {r['target_ratio']:g}")
    if r["compiled_path"]:
        fc = r["first_call"] or {}
        labels = {"compile_s": "compiling", "cache_load_s": "loading from numba's cache"}
        fc_text = ("; ".join(f"{labels[k]} {v:.2f} s" for k, v in fc.items())
                   if "error" not in fc else f"not measured ({fc['error']})")
        print(f"  compiled kernels (numba {r['numba']}); the numpy path takes "
              f"{r['numpy_path_ms']:.2f} ms (ratio {r['numpy_path_ratio']:.2f}); largest "
              f"log-likelihood difference between the paths "
              f"{r['compiled_minus_numpy_max_abs']:.1e}")
        print(f"  one-time cost of the first compiled call (fresh interpreter, numba import "
              f"included): {fc_text}")
    else:
        print("  numpy path (numba not available or POLKIT_COMPILED=0)")
    print("  where the time goes (cProfile, own time per call):")
    for row in r["profile_top"]:
        print(f"    {row['own_ms_per_eval']:8.2f} ms {100 * row['own_share']:5.1f} %  "
              f"x{row['calls_per_eval']:<6g} {row['function']}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repetitions")
    result = run(parser.parse_args().quick)
    print_report(result)
    print(json.dumps(result, indent=2))

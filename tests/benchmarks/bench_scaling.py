"""Scaling: time per whole-map log-likelihood call and peak memory from 1e4 to 1e6 pixels.

    python tests/benchmarks/bench_scaling.py [--quick]

For invented emission maps of 1000 energies and 10 to 1000 angles (1e4 to 1e6 pixels),
with 32 walkers: the median time of one vectorised
:meth:`DispersionProblem.log_likelihood` call, and the peak of the memory numpy and
Python allocate (``tracemalloc``) during the call alone and during the problem's set-up
plus one call (the map itself, held by the problem, is added there).  The time
exponent is the slope of log(time) against log(pixels); linear scaling gives 1.  The
expectation is linear time and a peak under 1 GB at 1e6 pixels.  The script prints
numbers and never asserts on them.  (With the compiled kernels, their only memory not
seen by ``tracemalloc`` is one row buffer of a few kB; the process's maximum resident
size is reported as well.)
"""

from __future__ import annotations

import argparse
import gc
import json
import resource
import sys
import time
import tracemalloc

import numpy as np
import xarray as xr
from bench_hot_path import (
    ANGLE_SPAN,
    ENERGY_WINDOW,
    SEED,
    problem_for,
    simulated_map,
    walker_ball,
)

MIB = 2.0**20
FULL_ANGLES = (10, 32, 100, 316, 1000)
QUICK_ANGLES = (10, 100, 1000)


def _peak_of(func) -> tuple[float, object]:
    """Peak traced allocation (bytes above the level at the start) while ``func`` runs."""
    gc.collect()
    tracemalloc.start()
    tracemalloc.reset_peak()
    base = tracemalloc.get_traced_memory()[0]
    try:
        value = func()
        peak = tracemalloc.get_traced_memory()[1] - base
    finally:
        tracemalloc.stop()
    return float(peak), value


def _max_rss_mib() -> float:
    rss = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
    return rss / MIB if sys.platform == "darwin" else rss / 1024.0  # bytes vs kB


def run(
    quick: bool = False,
    *,
    angles: tuple[int, ...] | None = None,
    n_energies: int = 1000,
    n_walkers: int = 32,
    repeats: int | None = None,
) -> dict:
    """Time and memory of one log-likelihood call over map sizes; returns the figures.

    Parameters
    ----------
    quick
        Three sizes (1e4, 1e5, 1e6 pixels) and 3 repetitions instead of five sizes and 7.
    angles, n_energies
        Map sizes: ``angles`` x ``n_energies`` pixels.
    n_walkers
        Walkers per call.
    repeats
        Timed repetitions per size (overrides ``quick``).
    """
    sizes = angles if angles is not None else (QUICK_ANGLES if quick else FULL_ANGLES)
    reps = repeats if repeats is not None else (3 if quick else 7)
    rng = np.random.default_rng(SEED + 2)
    rows = []
    for n_angles in sizes:
        da, inv_var, _ = simulated_map(int(n_angles), n_energies, seed=rng.integers(2**32))
        y, iv = np.asarray(da.values), inv_var
        del da
        def build_and_call(y=y, iv=iv, n=n_angles):
            problem = _fresh_problem(y, iv, n, n_energies)
            problem.log_likelihood(walker_ball(problem.space, n_walkers, rng))
            return problem

        total_peak, problem = _peak_of(build_and_call)
        theta = walker_ball(problem.space, n_walkers, rng)
        call_peak, _ = _peak_of(lambda p=problem, t=theta: p.log_likelihood(t))
        times = []
        for _ in range(reps):
            t0 = time.perf_counter()
            problem.log_likelihood(theta)
            times.append(time.perf_counter() - t0)
        pixels = int(n_angles) * n_energies
        t = float(np.median(times))
        rows.append({
            "angles": int(n_angles),
            "energies": n_energies,
            "pixels": pixels,
            "ms_per_call": 1e3 * t,
            "ns_per_walker_pixel": 1e9 * t / (pixels * n_walkers),
            "call_peak_MiB": call_peak / MIB,
            "setup_and_call_peak_MiB": (total_peak + y.nbytes) / MIB,
            "map_MiB": y.nbytes / MIB,
        })
        del problem, y, iv
    px = np.array([r["pixels"] for r in rows], dtype=float)
    ts = np.array([r["ms_per_call"] for r in rows])
    exponent = float(np.polyfit(np.log(px), np.log(ts), 1)[0]) if len(rows) > 1 else float("nan")
    upper = px >= 1e5
    exponent_upper = (float(np.polyfit(np.log(px[upper]), np.log(ts[upper]), 1)[0])
                      if upper.sum() > 1 else float("nan"))
    largest = rows[-1]
    return {
        "walkers": n_walkers,
        "repeats": reps,
        "sizes": rows,
        "time_exponent": exponent,
        "time_exponent_from_1e5": exponent_upper,
        "largest_pixels": largest["pixels"],
        "largest_peak_MiB": max(largest["call_peak_MiB"], largest["setup_and_call_peak_MiB"]),
        "memory_limit_MiB": 1024.0,
        "process_max_rss_MiB": _max_rss_mib(),
    }


def _fresh_problem(y, inv_var, n_angles, n_energies):
    """The problem of a map given as arrays (axes rebuilt as in :func:`simulated_map`)."""
    da = xr.DataArray(
        y, dims=("angle", "energy"),
        coords={"angle": np.linspace(-ANGLE_SPAN, ANGLE_SPAN, n_angles),
                "energy": np.linspace(*ENERGY_WINDOW, n_energies)},
    )
    return problem_for(da, inv_var)


def print_report(r: dict) -> None:
    """Readable summary of :func:`run`'s figures."""
    print(f"scaling: one log-likelihood call, {r['walkers']} walkers, median of {r['repeats']}")
    print(f"  {'pixels':>9s} {'map':>10s} {'ms/call':>9s} {'ns/(walker px)':>15s} "
          f"{'call peak MiB':>14s} {'set-up+call MiB':>16s}")
    for row in r["sizes"]:
        print(f"  {row['pixels']:9d} {row['angles']:4d}x{row['energies']:<5d} "
              f"{row['ms_per_call']:9.2f} {row['ns_per_walker_pixel']:15.2f} "
              f"{row['call_peak_MiB']:14.1f} {row['setup_and_call_peak_MiB']:16.1f}")
    print(f"  time exponent {r['time_exponent']:.2f} over all sizes, "
          f"{r['time_exponent_from_1e5']:.2f} from 1e5 pixels (1 = linear); peak at "
          f"{r['largest_pixels']:.0e} pixels {r['largest_peak_MiB']:.0f} MiB (limit "
          f"{r['memory_limit_MiB']:.0f}); process max RSS {r['process_max_rss_MiB']:.0f} MiB")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="three sizes, fewer repetitions")
    result = run(parser.parse_args().quick)
    print_report(result)
    print(json.dumps(result, indent=2))

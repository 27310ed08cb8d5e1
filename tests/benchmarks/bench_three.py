"""Three oscillators against two: one whole-map log-likelihood call on the same map.

    python tests/benchmarks/bench_three.py [--quick]

The same invented emission map (:func:`bench_hot_path.simulated_map`, 80 x 600 by default)
is fitted by the two-oscillator model (one exciton) and by the three-oscillator model
(a second, weaker exciton above the first); one call of
:meth:`DispersionProblem.log_likelihood` on 32 walkers near the truth is timed for each,
repetitions interleaved, medians and minima taken.  ``three_vs_two_call_ratio`` is the
ratio of the medians (the minima's ratio beside it: on a loaded machine the medians are
disturbed more).  The numpy path (``POLKIT_COMPILED=0``, where three oscillators go
through ``numpy.linalg.eig``) is timed too, as context.  The script prints numbers and
never asserts on them.
"""

from __future__ import annotations

import argparse
import gc
import json
import time

import numpy as np
from bench_hot_path import SEED, TRUTH, problem_for, simulated_map, walker_ball

#: the invented second exciton (eV, meV), added to the benchmark sample for the third oscillator
SECOND_EXCITON = {"exciton2_energy": 1.556, "rabi_splitting2": 6.0, "exciton2_linewidth": 1.0}


def three_problem(da, inv_var):
    """The three-oscillator :class:`DispersionProblem` of the same map (default priors)."""
    from polkit.jobs.dispersion.parameters import default_space
    from polkit.jobs.dispersion.problem import DispersionProblem

    energy = da["energy"].values.astype(float)
    space = default_space(energy, dict(TRUTH, **SECOND_EXCITON), n_excitons=2)
    return DispersionProblem(axis="angle", in_plane=da["angle"].values.astype(float),
                             energy=energy, y=np.asarray(da.values, dtype=float),
                             inv_var=inv_var, space=space, n_excitons=2)


def _ball(space, n_walkers: int, rng: np.random.Generator) -> np.ndarray:
    truth = dict(TRUTH, **SECOND_EXCITON, noise_scale=1.0)
    x = np.array([truth[n] for n in space.names])
    return x + np.maximum(np.abs(x), 1e-3) * 2e-4 * rng.standard_normal((n_walkers, x.size))


def run(quick: bool = False, *, n_angles: int = 80, n_energies: int = 600, n_walkers: int = 32,
        repeats: int | None = None) -> dict:
    """Time one likelihood call with two and with three oscillators; returns the figures."""
    from polkit.numerics import kernels as _kernels

    reps = repeats if repeats is not None else (15 if quick else 41)
    rng = np.random.default_rng(SEED)
    da, inv_var, _ = simulated_map(n_angles, n_energies, seed=rng.integers(2**32))
    two = problem_for(da, inv_var)
    three = three_problem(da, inv_var)
    th2 = walker_ball(two.space, n_walkers, rng)
    th3 = _ball(three.space, n_walkers, rng)
    calls = {"two": (two, th2), "three": (three, th3)}
    compiled = _kernels.enabled()
    paths = (True, False) if compiled else (False,)
    values = {}
    for flag in paths:  # warm-up (compiles or loads the kernels) and the values
        previous = _kernels.use_compiled(flag)
        try:
            for name, (p, th) in calls.items():
                values[(name, flag)] = p.log_likelihood(th)
        finally:
            _kernels.use_compiled(previous)
    times: dict = {(n, f): [] for n in calls for f in paths}
    for _ in range(reps):
        gc.collect()
        for flag in paths:
            previous = _kernels.use_compiled(flag)
            try:
                for name, (p, th) in calls.items():
                    t0 = time.perf_counter()
                    p.log_likelihood(th)
                    times[(name, flag)].append(time.perf_counter() - t0)
            finally:
                _kernels.use_compiled(previous)
    med = {k: float(np.median(v)) for k, v in times.items()}
    low = {k: float(np.min(v)) for k, v in times.items()}
    out = {
        "grid": {"walkers": n_walkers, "angles": n_angles, "energies": n_energies},
        "repeats": reps,
        "compiled_path": compiled,
        "two_ms": 1e3 * med[("two", paths[0])],
        "three_ms": 1e3 * med[("three", paths[0])],
        "two_ms_min": 1e3 * low[("two", paths[0])],
        "three_ms_min": 1e3 * low[("three", paths[0])],
        "three_vs_two_call_ratio": med[("three", paths[0])] / med[("two", paths[0])],
        "three_vs_two_call_ratio_of_minima": low[("three", paths[0])] / low[("two", paths[0])],
        "target_ratio": 2.5,
    }
    if compiled:
        out.update(
            numpy_path_two_ms=1e3 * med[("two", False)],
            numpy_path_three_ms=1e3 * med[("three", False)],
            numpy_path_three_vs_two_call_ratio=med[("three", False)] / med[("two", False)],
            three_compiled_minus_numpy_max_rel=float(np.max(
                np.abs(values[("three", True)] - values[("three", False)])
                / np.abs(values[("three", False)]))),
        )
    return out


def print_report(r: dict) -> None:
    """Readable summary of :func:`run`'s figures."""
    g = r["grid"]
    print(f"three vs two oscillators: one log-likelihood call, {g['walkers']} walkers x "
          f"{g['angles']} x {g['energies']} map ({r['repeats']} interleaved repetitions)")
    print(f"  two oscillators   {r['two_ms']:8.2f} ms median  {r['two_ms_min']:8.2f} ms minimum")
    print(f"  three oscillators {r['three_ms']:8.2f} ms median  {r['three_ms_min']:8.2f} ms "
          f"minimum")
    print(f"  three_vs_two_call_ratio {r['three_vs_two_call_ratio']:.2f} (medians), "
          f"{r['three_vs_two_call_ratio_of_minima']:.2f} (minima); target <= "
          f"{r['target_ratio']:g}")
    if r["compiled_path"]:
        print(f"  numpy path (POLKIT_COMPILED=0): {r['numpy_path_two_ms']:.2f} ms and "
              f"{r['numpy_path_three_ms']:.2f} ms, ratio "
              f"{r['numpy_path_three_vs_two_call_ratio']:.2f}; three-oscillator "
              f"log-likelihood, compiled vs numpy, largest relative difference "
              f"{r['three_compiled_minus_numpy_max_rel']:.1e}")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="fewer repetitions")
    result = run(parser.parse_args().quick)
    print_report(result)
    print(json.dumps(result, indent=2))

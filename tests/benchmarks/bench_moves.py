"""Move sets by effective samples per second: DE alone against DE + snooker (0.8 / 0.2).

    python tests/benchmarks/bench_moves.py [--quick]

Three posteriors: a curved one (the "banana" of Haario et al., Bernoulli 7, 223 (2001),
b = 0.1, in 6 dimensions), a bimodal one (two unit Gaussians 6 sd apart along one axis of
6, equal weights) and the whole-map posterior of the invented demo map
(data_examples/ds1_p1_emission.nc, two-oscillator model).  Each move set runs the same
number of steps from the same start with several seeds; the figure is the smallest bulk
ESS over parameters (ArviZ, walkers as chains, after a burn-in of a quarter) divided by the
wall time of the sampling.  For the bimodal posterior the fraction of draws in the upper
mode (truth 0.5) is printed too.  Benchmarks measure; they never assert on time.
"""

from __future__ import annotations

import argparse
import json
import sys
import time
import warnings
from pathlib import Path

import numpy as np

from polkit.errors import ConvergenceWarning
from polkit.inference import (
    GateSettings,
    Parameter,
    ParameterSpace,
    Prior,
    SamplerSettings,
    run_ensemble,
)
from polkit.inference.diagnostics import arviz_diagnostics

ROOT = Path(__file__).resolve().parents[2]


def _moves(name: str):
    import emcee

    if name == "DE":
        return [(emcee.moves.DEMove(), 1.0)]
    return [(emcee.moves.DEMove(), 0.8), (emcee.moves.DESnookerMove(), 0.2)]


def _space(p: int, half: float) -> ParameterSpace:
    return ParameterSpace([Parameter(f"x{i}", "1", Prior.uniform(-half, half))
                           for i in range(p)])


def banana(theta):
    # Source: Haario, Saksman and Tamminen, Bernoulli 7, 223 (2001), twisted Gaussian
    # with x1 sd 10 and b = 0.1
    y = theta.copy()
    y[:, 1] = theta[:, 1] + 0.1 * theta[:, 0] ** 2 - 100 * 0.1
    return -0.5 * (y[:, 0] ** 2 / 100.0 + np.sum(y[:, 1:] ** 2, axis=1))


def bimodal(theta):
    a = -0.5 * np.sum((theta - np.r_[3.0, np.zeros(theta.shape[1] - 1)]) ** 2, axis=1)
    b = -0.5 * np.sum((theta + np.r_[3.0, np.zeros(theta.shape[1] - 1)]) ** 2, axis=1)
    return np.logaddexp(a, b)


def _demo_problem():
    from polkit.jobs.dispersion.run import prepare_dispersion
    from polkit.jobs.dispersion.stages import table_mode, whole_map_start

    problem, begin = prepare_dispersion(ROOT / "data_examples" / "ds1_p1_emission.nc",
                                        model="two")
    table = table_mode(problem, begin.x0)
    start = whole_map_start(problem, begin.x0, table.x)
    return problem.log_likelihood, problem.space, start


def _measure(like, space, start, moves, steps, seed, walkers=32):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        t = time.perf_counter()
        run = SamplerSettings(n_walkers=walkers, max_steps=steps, min_steps=steps,
                              check_every=steps, progress=False, moves=_moves(moves),
                              gate=GateSettings(ess_rhat=False))
        out = run_ensemble(like, space, start, run, seed=seed)
        wall = time.perf_counter() - t
    kept = out.chains[0, steps // 4:]
    import xarray as xr

    ds = xr.Dataset({n: (("chain", "draw"), kept[:, :, j].T)
                     for j, n in enumerate(space.names)})
    ess = arviz_diagnostics(ds)["min_ess_bulk"]
    upper = float(np.mean(kept[..., 0] > 0))
    return ess, wall, upper


def run(quick: bool = False) -> dict:
    seeds = [1, 2] if quick else [1, 2, 3]
    cases = {
        "banana": (banana, _space(6, 60.0), np.r_[0.0, 10.0, np.zeros(4)] + 0.01, 4000),
        "bimodal": (bimodal, _space(6, 10.0), np.r_[3.0, np.zeros(5)] + 0.01, 4000),
    }
    try:
        like, space, start = _demo_problem()
        cases["demo map"] = (like, space, start, 1000 if quick else 1500)
    except Exception as exc:  # noqa: BLE001 - a benchmark reports and goes on
        print(f"demo map posterior not available: {exc}", file=sys.stderr)
    figures = {}
    print(f"{'posterior':10s} {'moves':11s} {'ESS/s':>8s} {'min ESS':>8s} {'wall s':>7s} "
          f"{'upper mode':>10s}")
    for name, (like, space, start, steps) in cases.items():
        for moves in ("DE", "DE+snooker"):
            rows = [_measure(like, space, start, moves, steps, s) for s in seeds]
            ess = float(np.mean([r[0] for r in rows]))
            wall = float(np.mean([r[1] for r in rows]))
            upper = float(np.mean([r[2] for r in rows]))
            figures[f"{name}|{moves}"] = {"ess_per_s": ess / wall, "min_ess_bulk": ess,
                                          "wall_s": wall, "upper_mode_fraction": upper,
                                          "steps": steps, "seeds": seeds}
            print(f"{name:10s} {moves:11s} {ess / wall:8.1f} {ess:8.0f} {wall:7.2f} "
                  f"{upper:10.2f}")
    return figures


if __name__ == "__main__":
    ap = argparse.ArgumentParser()
    ap.add_argument("--quick", action="store_true")
    print(json.dumps(run(ap.parse_args().quick)))

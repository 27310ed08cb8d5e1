"""Throughput of the wafer survey in quick mode: positions per minute with 1 and 2 workers.

    python tests/benchmarks/bench_survey.py [--quick]

Simulates an invented wafer (the demo wafer's model from ``data_examples/make_wafer.py``,
seeded; 4 positions with ``--quick``, 12 otherwise), surveys it in quick mode on an
embedded LocalCluster with 1 and then 2 worker processes (fresh output folders, same
seed), and prints positions per minute -- over the whole call, cluster start included, and
over the fits alone (from the per-position fit times and the wall time of the task phase).
Close to linear scaling is expected on 2 free cores; on a shared machine the numbers
follow the load, which is printed beside them.  This script never asserts on time.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import tempfile
import time
from pathlib import Path

import numpy as np

import polkit

SEED = 20261207
GRID = (-12.0, -4.0, 4.0, 12.0)


def _wafer_model():
    path = Path(__file__).resolve().parents[2] / "data_examples" / "make_wafer.py"
    spec = importlib.util.spec_from_file_location("polkit_demo_wafer", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


def write_wafer(folder: Path, n_positions: int) -> Path:
    """An invented wafer of ``n_positions`` maps (detuning gradient along x) and its manifest."""
    import xarray as xr

    model = _wafer_model()
    seeds = np.random.SeedSequence(SEED).spawn(n_positions)
    rows = ["# invented benchmark wafer; simulated", "file,x [mm],y [mm]"]
    folder.mkdir(parents=True, exist_ok=True)
    for i in range(n_positions):
        x, y = GRID[i % len(GRID)], GRID[(i // len(GRID)) % len(GRID)]
        signal = model.simulate_position(x, np.random.default_rng(seeds[i]))
        da = xr.DataArray(
            signal, dims=("angle", "energy"),
            coords={"angle": ("angle", model.ANGLES, {"units": "degree"}),
                    "energy": ("energy", model.ENERGY, {"units": "eV"})},
            name="signal", attrs={"units": "counts", "kind": "emission", "gain": model.GAIN,
                                  "read_noise": model.READ_NOISE},
        )
        da.to_dataset().to_netcdf(folder / f"p{i:02d}.nc", engine="h5netcdf")
        rows.append(f"p{i:02d}.nc,{x:g},{y:g}")
    manifest = folder / "manifest.csv"
    manifest.write_text("\n".join(rows) + "\n")
    return manifest


def _one(manifest: Path, out: Path, workers: int) -> dict:
    from polkit.jobs.survey.run import run_survey

    t0 = time.perf_counter()
    result = run_survey(manifest, out=out, workers=workers, seed=SEED,
                        sampler=polkit.SamplerSettings(progress=False),
                        figures=False)
    wall = time.perf_counter() - t0
    seconds, finished = [], []
    for pid in result.dataset["position"].values:
        done = json.loads((out / "positions" / str(pid) / "done.json").read_text())
        seconds.append(done["seconds"])
        finished.append(done["finished"])
    n = result.dataset.sizes["position"]
    return {
        "workers": workers,
        "positions": n,
        "ok": result.counts["ok"],
        "wall_s": wall,
        "positions_per_min": 60.0 * n / wall,
        "mean_fit_s": float(np.mean(seconds)),
        # each worker fits back to back, so the fits alone give workers / mean fit time
        "fit_positions_per_min": 60.0 * workers / float(np.mean(seconds)),
    }


def run(quick: bool = False) -> dict:
    """Survey an invented wafer with 1 and 2 workers; returns the figures (no assertions)."""
    n = 4 if quick else 12
    with tempfile.TemporaryDirectory(prefix="polkit-bench-survey-") as tmp:
        tmp = Path(tmp)
        manifest = write_wafer(tmp / "wafer", n)
        one = _one(manifest, tmp / "out1", 1)
        two = _one(manifest, tmp / "out2", 2)
    load = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    return {
        "mode": "quick",
        "positions": n,
        "one_worker": one,
        "two_workers": two,
        "speedup": two["positions_per_min"] / one["positions_per_min"],
        "speedup_fits_only": two["fit_positions_per_min"] / one["fit_positions_per_min"],
        "load_average_1min": load,
        "cpu_count": os.cpu_count(),
    }


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="4 positions instead of 12")
    args = parser.parse_args()
    r = run(quick=args.quick)
    print(f"wafer survey, quick mode, {r['positions']} positions "
          f"(load average {r['load_average_1min']:.1f} on {r['cpu_count']} cores)")
    for key in ("one_worker", "two_workers"):
        e = r[key]
        print(f"  {e['workers']} worker(s): {e['positions_per_min']:.1f} positions/min overall "
              f"({e['wall_s']:.1f} s, cluster start included); mean fit {e['mean_fit_s']:.1f} s "
              f"-> {e['fit_positions_per_min']:.1f} positions/min from the fits alone")
    print(f"  speed-up 2 vs 1 workers: {r['speedup']:.2f} overall, "
          f"{r['speedup_fits_only']:.2f} from the fits alone")


if __name__ == "__main__":
    main()

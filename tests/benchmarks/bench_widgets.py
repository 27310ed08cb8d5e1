"""Responsiveness of the dispersion panel: time from a slider move to the redrawn overlay.

    python tests/benchmarks/bench_widgets.py [--quick]

Builds the panel on an invented 80 x 600 emission map (simulated with polkit's own model,
seeded), moves the Rabi-splitting and cavity-energy sliders, and prints the latency of
each move: setting ``slider.value`` runs the observers synchronously (branch curves,
readout, blitted overlay, PNG encoding into the image widget), so the time around the
assignment is the whole update.  The target is under 100 ms; this script prints numbers
and never asserts on them.
"""

from __future__ import annotations

import argparse
import json
import time

import numpy as np
import xarray as xr

N_ANGLES, N_ENERGIES = 80, 600
SEED = 20261202


def simulated_map(n_angles: int = N_ANGLES, n_energies: int = N_ENERGIES,
                  seed: int = SEED) -> xr.DataArray:
    """An invented emission map in counts (GaAs-like numbers, not a measurement)."""
    from polkit.models.simulate import simulate_map

    rng = np.random.default_rng(seed)
    angles = np.linspace(-24.0, 24.0, n_angles)
    energy = np.linspace(1.528, 1.562, n_energies)
    occ = np.stack([np.full(n_angles, 3.0), np.full(n_angles, 0.36)], axis=-1)
    sim = simulate_map(angles, energy, kind="emission", e_c0=1.541, n_eff=3.4, e_x=1.545,
                       g=0.006, gamma_c=0.0003, gamma_x=0.0008, amplitudes=occ, background=60.0)
    counts = rng.poisson(np.clip(sim.signal, 0, None)) + rng.normal(0.0, 4.0, sim.signal.shape)
    return xr.DataArray(
        counts, dims=("angle", "energy"),
        coords={"angle": ("angle", angles, {"units": "degree", "long_name": "emission angle"}),
                "energy": ("energy", energy, {"units": "eV", "long_name": "photon energy"})},
        attrs={"units": "counts", "kind": "emission", "gain": 1.0, "read_noise": 4.0,
               "sample": "invented benchmark map", "masked": 0},
    )


def run(quick: bool = False) -> dict:
    """Build the panel on an 80 x 600 map and time slider moves; returns the numbers (ms)."""
    import warnings

    from polkit.widgets import dispersion_panel

    da = simulated_map()
    t0 = time.perf_counter()
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        panel = dispersion_panel(da, seed=1)
    build = time.perf_counter() - t0
    moves = 10 if quick else 60
    rabi = np.linspace(10.0, 14.0, moves)
    cavity = np.linspace(1.539, 1.543, moves)
    latency = []
    for k in range(moves):
        slider = panel.sliders["rabi_splitting" if k % 2 == 0 else "cavity_energy"]
        value = rabi[k] if k % 2 == 0 else cavity[k]
        t = time.perf_counter()
        slider.value = float(value)
        latency.append(time.perf_counter() - t)
    ms = np.array(latency) * 1e3
    return {
        "map_shape": [N_ANGLES, N_ENERGIES],
        "moves": moves,
        "panel_build_s": round(build, 2),
        "overlay_update_ms_median": round(float(np.median(ms)), 1),
        "overlay_update_ms_p90": round(float(np.percentile(ms, 90)), 1),
        "overlay_update_ms_max": round(float(ms.max()), 1),
        "png_bytes": len(panel.map_image.value),
        "target_ms": 100,
    }


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true")
    print(json.dumps(run(parser.parse_args().quick), indent=2))

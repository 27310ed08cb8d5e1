"""Regenerate the invented wafer survey in ``data_examples/wafer/`` from polkit's own model.

    python data_examples/make_wafer.py          # writes wafer/ beside this script

Everything is simulated with a fixed seed (ROOT_SEED below): no measured data.  The
scenario is invented: "W-0", a GaAs-like planar microcavity wafer whose spacer thickness
changes linearly across x, measured at a 3 x 3 grid of positions (13 angles x 90
energies each, emission in counts).  The cavity energy, and with it the detuning, follows
``detuning(x) = DETUNING_CENTRE_MEV + GRADIENT_MEV_PER_MM * x``; everything else is the same
at every position.  The truths are written to ``wafer/truth.json``.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import xarray as xr

from polkit.models.dispersion import cavity_energy, two_mode_eigenvalues
from polkit.models.simulate import simulate_map

ROOT_SEED = 20261207
HERE = Path(__file__).resolve().parent
OUT = HERE / "wafer"
MEV = 1e-3

GRID_MM = (-12.0, 0.0, 12.0)  # x and y of the measured positions, mm from the wafer centre
DETUNING_CENTRE_MEV = -1.5  # detuning at x = 0
GRADIENT_MEV_PER_MM = 0.30  # d(detuning)/dx; none along y
EXCITON_EV = 1.5450
RABI_MEV = 10.0
N_EFF = 3.4
GAMMA_C_MEV = 0.40
GAMMA_X_MEV = 0.90
ANGLES = np.linspace(-20.0, 20.0, 13)
ENERGY = np.linspace(EXCITON_EV - 0.012, EXCITON_EV + 0.014, 90)
PEAK_COUNTS = 2000.0
UPPER_RATIO = 0.3
DARK = 60.0  # counts per pixel
GAIN = 1.0  # electrons per count
READ_NOISE = 4.0  # counts rms


def detuning_mev(x_mm: float) -> float:
    """The simulated detuning E_C0 - E_X at position x (meV)."""
    return DETUNING_CENTRE_MEV + GRADIENT_MEV_PER_MM * x_mm


def simulate_position(x_mm: float, rng: np.random.Generator) -> np.ndarray:
    """Emission counts (angle x energy) at wafer position x."""
    e_c0 = EXCITON_EV + detuning_mev(x_mm) * MEV
    phys = dict(e_c0=e_c0, n_eff=N_EFF, e_x=EXCITON_EV, g=0.5 * RABI_MEV * MEV,
                gamma_c=GAMMA_C_MEV * MEV, gamma_x=GAMMA_X_MEV * MEV)
    # a thermal-like lower branch, brighter near its bottom, and a dimmer upper branch
    lower, _ = two_mode_eigenvalues(cavity_energy(e_c0, N_EFF, angle_deg=ANGLES), EXCITON_EV,
                                    phys["g"])
    occ = 0.5 + 0.5 * np.exp(-(lower.real - lower.real.min()) / (3.0 * MEV))
    amps = np.stack([occ, UPPER_RATIO * occ], axis=-1)
    unit = simulate_map(ANGLES, ENERGY, kind="emission", amplitudes=amps, **phys).signal
    amps = amps * PEAK_COUNTS / unit.max()
    mean = simulate_map(ANGLES, ENERGY, kind="emission", amplitudes=amps, background=DARK,
                        **phys).signal
    return rng.poisson(np.clip(mean, 0, None) * GAIN) / GAIN + rng.normal(0, READ_NOISE,
                                                                          mean.shape)


def main() -> None:
    maps = OUT / "maps"
    maps.mkdir(parents=True, exist_ok=True)
    seeds = np.random.SeedSequence(ROOT_SEED).spawn(len(GRID_MM) ** 2)
    rows = [
        "# invented wafer W-0 (simulated by data_examples/make_wafer.py; not a measurement)",
        "# positions in mm from the wafer centre; files relative to this manifest",
        "file,x [mm],y [mm],kind",
    ]
    truth = {
        "note": "invented wafer; every map is simulated",
        "root_seed": ROOT_SEED,
        "detuning_centre": {"value": DETUNING_CENTRE_MEV, "units": "meV"},
        "gradient_x": {"value": GRADIENT_MEV_PER_MM, "units": "meV/mm"},
        "gradient_y": {"value": 0.0, "units": "meV/mm"},
        "zero_detuning_x": {"value": -DETUNING_CENTRE_MEV / GRADIENT_MEV_PER_MM, "units": "mm"},
        "exciton_energy": {"value": EXCITON_EV, "units": "eV"},
        "rabi_splitting": {"value": RABI_MEV, "units": "meV"},
        "cavity_linewidth": {"value": GAMMA_C_MEV, "units": "meV"},
        "exciton_linewidth": {"value": GAMMA_X_MEV, "units": "meV"},
        "n_eff": {"value": N_EFF, "units": "1"},
        "positions": {},
    }
    k = 0
    for row, y in enumerate(GRID_MM):
        for col, x in enumerate(GRID_MM):
            name = f"w0_r{row + 1}c{col + 1}.nc"
            signal = simulate_position(x, np.random.default_rng(seeds[k]))
            k += 1
            da = xr.DataArray(
                np.round(signal, 2),
                dims=("angle", "energy"),
                coords={
                    "angle": ("angle", ANGLES, {"units": "degree",
                                                "long_name": "emission angle"}),
                    "energy": ("energy", ENERGY, {"units": "eV", "long_name": "photon energy"}),
                },
                name="signal",
                attrs={"units": "counts"},
            )
            ds = da.to_dataset()
            ds.attrs.update({
                "kind": "emission",
                "temperature": 4.0,
                "sample": "W-0 (invented demo wafer)",
                "position": f"r{row + 1}c{col + 1}",
                "x": f"{x:g} mm",
                "y": f"{y:g} mm",
                "gain": GAIN,
                "read_noise": READ_NOISE,
                "comment": "simulated by data_examples/make_wafer.py; not a measurement",
            })
            ds.to_netcdf(maps / name, engine="h5netcdf")
            rows.append(f"maps/{name},{x:g},{y:g},emission")
            truth["positions"][name] = {"x_mm": x, "y_mm": y,
                                        "detuning_meV": round(detuning_mev(x), 6)}
    (OUT / "manifest.csv").write_text("\n".join(rows) + "\n")
    (OUT / "truth.json").write_text(json.dumps(truth, indent=2) + "\n")


if __name__ == "__main__":
    main()

"""Coverage of the peak-table path's intervals on invented demo-like maps.

Each map is simulated by tests/realistic_maps.py (its own coupled-oscillator formulas, a
camera with shot and read noise and a background; it does not import polkit's models) for a
4 K sample like the invented demo sample (2g = 12 meV, detuning -4 meV, cavity FWHM 0.3 meV,
exciton FWHM 0.8 meV), fitted with ``fit_dispersion(..., peaks_only=True)``, and the truth
is checked against the 68 % and 95 % central intervals of each parameter.  Nothing here is
measured.

    python tests/table_coverage.py [N_MAPS] [MAX_STEPS]

prints a table and one JSON object (a measurement, like the benchmarks: it asserts nothing;
the numbers go to the README and to the caveat of the peak-table path's results,
``polkit/jobs/dispersion/caveats.py``).
"""

from __future__ import annotations

import json
import math
import sys
import tempfile
import warnings
from pathlib import Path

import numpy as np
from realistic_maps import Camera, Truth, simulate

import polkit
from polkit.errors import PolkitWarning

#: parameters whose coverage is measured (truth names as in Truth.as_dict)
NAMES = ("rabi_splitting", "detuning", "exciton_energy", "cavity_energy", "cavity_linewidth",
         "exciton_linewidth")


def demo_like(seed: int):
    """One invented demo-like raw frame (49 angles x 340 wavelength pixels)."""
    truth = Truth(e_x=1.545, e_c0=1.541, n_eff=3.4, rabi_mev=12.0, gamma_c_mev=0.3,
                  gamma_x_mev=0.8)
    cam = Camera(peak_counts=3000.0, upper_ratio=0.3, gain=1.0, read_noise=4.0,
                 background=(20.0, 0.0), medium="vacuum")
    return simulate(truth, cam, angles=np.arange(-24.0, 24.5, 1.0),
                    energy_range=(1.528, 1.562), n_pixels=340, seed=seed)


def coverage(n_maps: int = 20, max_steps: int = 4000, first_seed: int = 100) -> dict:
    """Fit ``n_maps`` maps on the peak-table path; fraction of truths inside each interval.

    Returns a dict with, per parameter, the 68 % and 95 % coverage, their binomial standard
    errors, the mean z-score (bias) and the RMS z-score (interval scale; 1 when calibrated),
    and how many runs passed the convergence gate.
    """
    hits = {n: {"68": [], "95": [], "z": []} for n in NAMES}
    converged = 0
    with tempfile.TemporaryDirectory() as tmp:
        for k in range(n_maps):
            raw = demo_like(first_seed + k)
            path = raw.write_txt(Path(tmp) / f"map{k}.txt")
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", PolkitWarning)
                run = polkit.SamplerSettings(max_steps=max_steps, progress=False)
                fit = polkit.fit_dispersion(path, peaks_only=True, seed=k + 1, sampler=run,
                                            figures=False)
            s = fit.summary()
            converged += bool(s["diagnostics"]["converged"])
            truth = raw.truth.as_dict()
            for n in NAMES:
                e = s["parameters"][n]
                t = truth[n]
                hits[n]["68"].append(e["q16"] <= t <= e["q84"])
                hits[n]["95"].append(e["q2_5"] <= t <= e["q97_5"])
                sd = 0.5 * (e["q84"] - e["q16"])
                hits[n]["z"].append((e["median"] - t) / sd if sd > 0 else math.inf)
            print(f"map {k}: converged={s['diagnostics']['converged']}", file=sys.stderr)
    out = {"maps": n_maps, "converged": converged, "max_steps": max_steps, "parameters": {}}
    for n in NAMES:
        z = np.asarray(hits[n]["z"])
        row = {}
        for level, nominal in (("68", 0.6827), ("95", 0.9545)):
            f = float(np.mean(hits[n][level]))
            # binomial standard error at the nominal level  # Source: binomial variance p(1-p)/n
            row[f"coverage_{level}"] = f
            row[f"se_{level}"] = math.sqrt(nominal * (1 - nominal) / n_maps)
        row["mean_z"] = float(np.mean(z))
        row["rms_z"] = float(np.sqrt(np.mean(z**2)))
        out["parameters"][n] = row
    return out


if __name__ == "__main__":
    n = int(sys.argv[1]) if len(sys.argv) > 1 else 20
    steps = int(sys.argv[2]) if len(sys.argv) > 2 else 4000
    res = coverage(n, steps)
    print(f"{'parameter':20s} {'68%':>6s} {'95%':>6s} {'mean z':>8s} {'rms z':>7s}")
    for name, row in res["parameters"].items():
        print(f"{name:20s} {row['coverage_68']:6.2f} {row['coverage_95']:6.2f} "
              f"{row['mean_z']:8.2f} {row['rms_z']:7.2f}")
    print(json.dumps(res))

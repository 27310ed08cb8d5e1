"""``polkit demo``: the whole job on the bundled, invented demo sample DS-1.

Stages: the data stage (every demo file loaded, validated and drawn), the dispersion fits,
the power-series fits and the energy budget with a claim check.  Results go to ``out``.
"""

from __future__ import annotations

import logging
import time
import warnings
from pathlib import Path

from polkit.errors import ConvergenceWarning
from polkit.safety import SAFETY_LINE

log = logging.getLogger(__name__)

#: the demo files and how each is read
MAP_FILES = {
    "ds1_p1_emission.nc": {},
    "ds1_p2_emission_nm.txt": {},
    "ds1_p1_reflectance.npz": {},
    "ds1_p1_fourier.nc": {},
}
SERIES_FILES = ["ds1_p1_power_nonresonant.csv", "ds1_p1_power_coherent.csv"]


def demo_folder() -> Path:
    """The bundled demo data: ``data_examples/`` beside the installed package (editable install)."""
    here = Path(__file__).resolve().parent.parent / "data_examples"
    return here


def _say(text: str) -> None:
    print(text, flush=True)


def run_demo(
    *,
    data: str | Path | None = None,
    out: str | Path = "polkit-out/demo",
    seed: int = 20261202,
    quick: bool = False,
    progress: bool = True,
) -> int:
    """Run every stage on the demo sample; return the command's exit status.

    ``quick`` uses short chains (a smoke run; its fits are reported as not converged
    when the gate is not passed, never as converged).
    """
    from polkit.errors import DataError
    from polkit.inference.settings import SamplerSettings

    folder = Path(data) if data is not None else demo_folder()
    if not folder.is_dir():
        raise DataError(
            "demo data folder not found; pass --data DIR (the data_examples folder of "
            "a polkit clone).",
            path=folder,
        )
    out = Path(out)
    t_start = time.perf_counter()
    _say("polkit demo on the invented sample DS-1 (simulated data; see data_examples/README.md)")
    _say(SAFETY_LINE)
    _data_stage(folder, out)
    steps = {"max_steps": 600, "min_steps": 200} if quick else {}
    fit = SamplerSettings(progress=progress, **steps)
    results = {**_dispersion_stage(folder, out, seed, fit), **_power_stage(folder, out, seed, fit)}
    _budget_stage(folder, out, seed)

    _say(f"\nresults in {out}; total {time.perf_counter() - t_start:.0f} s")
    not_converged = [label for label, result in results.items() if not result.converged]
    if not_converged:
        _say(
            "NOT converged: "
            + ", ".join(not_converged)
            + (" (quick mode uses short chains)" if quick else "")
        )
        return 3
    return 0


def _data_stage(folder: Path, out: Path) -> None:
    """Stage 1: every demo file loaded, validated and drawn."""
    from polkit.plotting.inspect import inspect_file

    _say("\n== 1. data stage: load, validate, quick-look ==")
    for name in [*MAP_FILES, *SERIES_FILES]:
        path = folder / name
        text = inspect_file(path, png=out / "inspect" / f"{name}.png")
        _say(text)


def _dispersion_stage(folder: Path, out: Path, seed: int, fit) -> dict:
    """Stage 2: the whole-map fit of P1 and the peak-table fit of P2; their detunings."""
    from polkit.jobs.dispersion.run import fit_dispersion

    _say("\n== 2. dispersion: whole-map fit of position P1 ==")
    with warnings.catch_warnings():
        warnings.simplefilter("default", ConvergenceWarning)
        r = fit_dispersion(folder / "ds1_p1_emission.nc", model="two", seed=seed,
                           out=out / "dispersion_p1", sampler=fit)
    _say(r.table())

    _say("\n== 2b. dispersion: peak-table fit of position P2 (air-wavelength file) ==")
    r2 = fit_dispersion(folder / "ds1_p2_emission_nm.txt", model="two", seed=seed + 1,
                        peaks_only=True, out=out / "dispersion_p2", sampler=fit)
    _say(r2.table())
    for label, res in (("P1", r), ("P2", r2)):
        d = res.summary()["parameters"]["detuning"]
        _say(
            f"detuning at {label}: {d['median']:+.3f} meV "
            f"(68 %: {d['q16']:+.3f} .. {d['q84']:+.3f})"
        )
    return {"dispersion_p1": r, "dispersion_p2": r2}


def _power_stage(folder: Path, out: Path, seed: int, fit) -> dict:
    """Stage 3: the coherent (calibrated) and the nonresonant power series."""
    from polkit.jobs.power.run import fit_power

    _say("\n== 3. power series: coherent drive (up and down sweeps), calibrated ==")
    with warnings.catch_warnings():
        warnings.simplefilter("default", ConvergenceWarning)
        pc = fit_power(folder / "ds1_p1_power_coherent.csv", model="coherent",
                       calibration=folder / "ds1_calibration.toml",
                       dispersion=out / "dispersion_p1", seed=seed + 2,
                       out=out / "power_coherent", sampler=fit)
    _say(pc.table())

    _say("\n== 3b. power series: nonresonant drive, condensation threshold ==")
    pr = fit_power(folder / "ds1_p1_power_nonresonant.csv", model="reservoir", seed=seed + 3,
                   out=out / "power_nonresonant", sampler=fit)
    _say(pr.table())
    return {"power_coherent": pc, "power_nonresonant": pr}


def _budget_stage(folder: Path, out: Path, seed: int) -> None:
    """Stage 4: the energy budget of a device built from DS-1, with a claim check."""
    from polkit.jobs.budget.run import energy_budget

    _say("\n== 4. energy budget of a device built from DS-1, with a claim check ==")
    budget = energy_budget(out / "dispersion_p1", out / "power_coherent",
                           folder / "ds1_device.toml",
                           claims=["energy_per_operation < 10 fJ"], seed=seed + 4,
                           out=out / "budget")
    _say(budget.table())

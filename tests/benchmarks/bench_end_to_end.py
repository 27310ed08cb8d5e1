"""End to end: wall time of ``polkit demo`` and of each command-line fit on the demo sample.

    python tests/benchmarks/bench_end_to_end.py [--quick]

Runs the ``polkit`` command (``python -m polkit.cli``, the same entry point) in a
subprocess on the bundled, invented demo sample DS-1 (``data_examples/``), each command
into a fresh temporary folder, and records its wall time, CPU time (children) and exit
status (0 converged, 3 results written but the convergence gate not passed).  ``--quick``
runs ``polkit demo --quick`` and caps every fit at 600 steps (as the quick demo does);
without it the demo and the fits run with their default step limits.  The wafer survey's
throughput (positions per minute with 1 and 2 workers) comes from ``bench_survey.py``
when it is present.  The script prints numbers and never asserts on them.
"""

from __future__ import annotations

import argparse
import importlib.util
import json
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

REPO = Path(__file__).resolve().parents[2]
DEMO = REPO / "data_examples"
QUICK_STEPS = 600
SEED = 20261209


def fit_commands(quick: bool) -> list[tuple[str, list[str]]]:
    """The command-line fits on the demo sample: ``(label, arguments after 'polkit')``.

    ``{out}`` in an argument is replaced by the run's temporary folder.  The power fit
    with calibration reads the P1 dispersion result of the first command.
    """
    cap = ["--max-steps", str(QUICK_STEPS)] if quick else []
    common = ["--quiet", "--seed", str(SEED), *cap]
    return [
        ("dispersion P1 emission (whole map)",
         ["dispersion", str(DEMO / "ds1_p1_emission.nc"), "--out", "{out}/d_p1", *common]),
        ("dispersion P2 emission (peak table, air wavelengths)",
         ["dispersion", str(DEMO / "ds1_p2_emission_nm.txt"), "--peaks-only",
          "--out", "{out}/d_p2", *common]),
        ("dispersion P1 reflectance (whole map)",
         ["dispersion", str(DEMO / "ds1_p1_reflectance.npz"), "--out", "{out}/d_refl",
          *common]),
        ("power coherent drive (calibrated)",
         ["power", str(DEMO / "ds1_p1_power_coherent.csv"), "--model", "coherent",
          "--calibration", str(DEMO / "ds1_calibration.toml"), "--dispersion", "{out}/d_p1",
          "--out", "{out}/p_coh", *common]),
        ("power nonresonant (reservoir)",
         ["power", str(DEMO / "ds1_p1_power_nonresonant.csv"), "--model", "reservoir",
          "--out", "{out}/p_res", *common]),
        ("energy budget",
         ["budget", "--dispersion", "{out}/d_p1", "--power", "{out}/p_coh",
          "--device", str(DEMO / "ds1_device.toml"), "--seed", str(SEED),
          "--out", "{out}/budget"]),
    ]


def _time_command(args: list[str], out: Path) -> dict:
    argv = [sys.executable, "-m", "polkit.cli", *(a.replace("{out}", str(out)) for a in args)]
    before = os.times()
    t0 = time.perf_counter()
    proc = subprocess.run(argv, cwd=out, capture_output=True, text=True, check=False)
    wall = time.perf_counter() - t0
    after = os.times()
    cpu = (after.children_user - before.children_user
           + after.children_system - before.children_system)
    last = (proc.stderr.strip().splitlines() or [""])[-1]
    return {
        "command": "polkit " + " ".join(a.replace(str(REPO) + os.sep, "")
                                        .replace(str(out), "OUT") for a in args),
        "wall_s": wall,
        "cpu_s": cpu,
        "exit_status": proc.returncode,
        "ok": proc.returncode in (0, 3),
        "stderr_tail": last[-300:] if proc.returncode not in (0, 3) else "",
    }


def _survey(quick: bool) -> dict:
    path = Path(__file__).with_name("bench_survey.py")
    if not path.exists():
        return {"skipped": "tests/benchmarks/bench_survey.py is not present"}
    spec = importlib.util.spec_from_file_location("bench_survey", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module.run(quick)


def run(
    quick: bool = False,
    *,
    demo: bool = True,
    fits: bool = True,
    survey: bool = True,
    commands: list[tuple[str, list[str]]] | None = None,
) -> dict:
    """Time the demo, the command-line fits and the survey; returns the figures.

    Parameters
    ----------
    quick
        ``polkit demo --quick`` and fits capped at 600 steps.
    demo, fits, survey
        Which parts to run.
    commands
        Replace the list of fits (``(label, args)`` as in :func:`fit_commands`).
    """
    out: dict = {"mode": "quick" if quick else "full", "commands": {}}
    load_before = os.getloadavg()[0] if hasattr(os, "getloadavg") else float("nan")
    with tempfile.TemporaryDirectory(prefix="polkit-bench-e2e-") as tmp:
        tmp = Path(tmp)
        if demo:
            args = ["demo", "--quiet", "--out", "{out}/demo", "--seed", str(SEED)]
            if quick:
                args.append("--quick")
            out["demo"] = _time_command(args, tmp)
        if fits:
            for label, args in (commands if commands is not None else fit_commands(quick)):
                out["commands"][label] = _time_command(args, tmp)
    if survey:
        out["survey"] = _survey(quick)
    out["load_average_1min_before"] = load_before
    out["load_average_1min_after"] = os.getloadavg()[0] if hasattr(os, "getloadavg") else None
    return out


def peak_table_seeds(seeds: list[int]) -> dict:
    """The peak-table path (P2 map, ``--peaks-only``) with each seed: wall time and steps.

    The number of steps the convergence gate needs varies with the seed (the estimate
    of the autocorrelation time must settle to 1 %), so one run says little about the
    time a user waits; this runs the same command with several seeds.
    """
    runs = []
    with tempfile.TemporaryDirectory(prefix="polkit-bench-pt-") as tmp:
        tmp = Path(tmp)
        for seed in seeds:
            args = ["dispersion", str(DEMO / "ds1_p2_emission_nm.txt"), "--peaks-only",
                    "--quiet", "--seed", str(seed), "--out", f"{{out}}/s{seed}"]
            timing = _time_command(args, tmp)
            summary = tmp / f"s{seed}" / "summary.json"
            diag = json.loads(summary.read_text())["diagnostics"] if summary.exists() else {}
            runs.append({"seed": seed, "wall_s": timing["wall_s"], "cpu_s": timing["cpu_s"],
                         "steps": diag.get("steps"), "converged": diag.get("converged"),
                         "exit_status": timing["exit_status"]})
    walls = sorted(r["wall_s"] for r in runs)
    return {"runs": runs, "median_wall_s": walls[len(walls) // 2], "max_wall_s": walls[-1],
            "load_average_1min_after": os.getloadavg()[0] if hasattr(os, "getloadavg")
            else None}


def print_peak_table(r: dict) -> None:
    """Readable summary of :func:`peak_table_seeds`."""
    print("peak-table path, polkit dispersion data_examples/ds1_p2_emission_nm.txt --peaks-only")
    for run_ in r["runs"]:
        print(f"  seed {run_['seed']:3d}: {run_['wall_s']:6.1f} s wall {run_['cpu_s']:6.1f} s cpu"
              f"  {run_['steps']} steps, converged {run_['converged']}")
    print(f"  median {r['median_wall_s']:.1f} s, slowest {r['max_wall_s']:.1f} s "
          f"(target: under 20 s)")


def print_report(r: dict) -> None:
    """Readable summary of :func:`run`'s figures."""
    print(f"end to end ({r['mode']} mode; load average {r['load_average_1min_before']:.1f} "
          "before)")
    rows = ([("polkit demo", r["demo"])] if "demo" in r else []) + list(r["commands"].items())
    for label, c in rows:
        status = {0: "converged", 3: "not converged"}.get(c["exit_status"],
                                                          f"FAILED {c['exit_status']}")
        print(f"  {label:55s} {c['wall_s']:8.1f} s wall {c['cpu_s']:8.1f} s cpu  {status}")
        if c["stderr_tail"]:
            print(f"      {c['stderr_tail']}")
    s = r.get("survey")
    if s is None:
        return
    if "skipped" in s:
        print(f"  survey: skipped ({s['skipped']})")
        return
    for key in ("one_worker", "two_workers"):
        e = s[key]
        print(f"  survey, {e['workers']} worker(s): {e['positions_per_min']:.1f} positions/min "
              f"overall, {e['fit_positions_per_min']:.1f} from the fits alone "
              f"({e['positions']} positions)")


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="quick demo, fits capped")
    parser.add_argument("--peak-table-seeds", type=int, default=0, metavar="N",
                        help="only time the peak-table path, with seeds 1..N")
    options = parser.parse_args()
    if options.peak_table_seeds:
        result = peak_table_seeds(list(range(1, options.peak_table_seeds + 1)))
        print_peak_table(result)
    else:
        result = run(options.quick)
        print_report(result)
    print(json.dumps(result, indent=2))

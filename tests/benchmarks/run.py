"""Run polkit's performance benchmarks and print a table and one JSON object of figures.

    python tests/benchmarks/run.py [--quick] [--only NAME ...] [--details FILE]

Benchmarks (each a module here with ``run(quick) -> dict``):

* ``hot_path``    one whole-map log-likelihood call against a numpy Lorentzian pass (ratio)
* ``peer``        effective samples per second, polkit against lmfit + emcee (ratio)
* ``peers``       polkit's default fit against a vectorised emcee script (DE moves, to ESS
                  >= 1000 and R-hat <= 1.01) and a least-squares fit (bench_peers.py)
* ``three``       one whole-map likelihood call, three oscillators against two (bench_three.py)
* ``scaling``     time and peak memory of a log-likelihood call, 1e4 to 1e6 pixels
* ``efficiency``  posterior widths and errors against the Cramer-Rao bound
* ``end_to_end``  ``polkit demo`` and every command-line fit on the demo sample
* ``survey``      wafer-survey positions per minute with 1 and 2 workers (bench_survey.py)
* ``widgets``     dispersion-panel slider latency (bench_widgets.py)

The machine is described first (cores, load, numpy, BLAS).  The figures go to standard
output: a readable table per benchmark, then one JSON object (at least ``hot_path_ratio``,
``ess_per_second_ratio`` (against lmfit), ``ess_per_second_ratio_vs_emcee``,
``time_to_answer_ratio_vs_emcee``, ``time_to_answer_ratio_vs_least_squares`` and
``three_vs_two_call_ratio``) as the last lines; progress goes to standard error.  A
benchmark that fails is reported with its error and the others still run (exit status 1).
Benchmarks measure; they never assert on time.
"""

from __future__ import annotations

import argparse
import contextlib
import importlib
import json
import os
import platform
import sys
import time
import traceback
from pathlib import Path

HERE = Path(__file__).resolve().parent
if str(HERE) not in sys.path:  # the benchmark modules import each other by name
    sys.path.insert(0, str(HERE))

#: benchmark name -> module (in this folder)
BENCHMARKS = {
    "hot_path": "bench_hot_path",
    "peer": "bench_peer",
    "peers": "bench_peers",
    "three": "bench_three",
    "scaling": "bench_scaling",
    "efficiency": "bench_efficiency",
    "end_to_end": "bench_end_to_end",
    "survey": "bench_survey",
    "widgets": "bench_widgets",
}


def machine() -> dict:
    """Cores, load, CPU model, Python and library versions, and the BLAS numpy uses."""
    import numpy as np

    info: dict = {
        "cpu_count": os.cpu_count(),
        "usable_cores": len(os.sched_getaffinity(0)) if hasattr(os, "sched_getaffinity")
        else os.cpu_count(),
        "platform": platform.platform(),
        "machine": platform.machine(),
        "python": platform.python_version(),
        "numpy": np.__version__,
    }
    with contextlib.suppress(OSError):
        for line in Path("/proc/cpuinfo").read_text().splitlines():
            if line.startswith("model name"):
                info["cpu_model"] = line.split(":", 1)[1].strip()
                break
    for name in ("scipy", "emcee", "arviz", "xarray", "lmfit", "numba"):
        try:
            info[name] = importlib.import_module(name).__version__
        except Exception:  # not installed, or (numba) does not import against this numpy
            info[name] = None
    try:
        deps = np.show_config(mode="dicts")["Build Dependencies"]
        blas = deps.get("blas", {})
        info["blas"] = {k: blas.get(k) for k in ("name", "version", "openblas configuration")
                        if blas.get(k) is not None}
    except (TypeError, KeyError, AttributeError):  # older numpy: no dict mode
        info["blas"] = None
    try:
        from threadpoolctl import threadpool_info

        info["threadpools"] = [{k: p.get(k) for k in ("internal_api", "version", "num_threads")}
                               for p in threadpool_info()]
    except ImportError:
        info["threadpools"] = "threadpoolctl not installed"
    if hasattr(os, "getloadavg"):
        info["load_average_1_5_15min"] = [round(v, 2) for v in os.getloadavg()]
    return info


def figures(results: dict) -> dict:
    """The headline figures (one flat-ish JSON object) from the benchmarks' results."""
    out: dict = {"hot_path_ratio": None, "ess_per_second_ratio": None,
                 "ess_per_second_ratio_vs_emcee": None, "time_to_answer_ratio_vs_emcee": None,
                 "time_to_answer_ratio_vs_least_squares": None,
                 "three_vs_two_call_ratio": None}
    r = results.get("hot_path")
    if r and "error" not in r:
        out.update(hot_path_ratio=round(r["hot_path_ratio"], 3),
                   hot_path_ratio_of_minima=round(r["hot_path_ratio_of_minima"], 3),
                   hot_path_floor_used=r["floor_used"],
                   hot_path_ratio_by_floor={k: round(v, 3)
                                            for k, v in r["hot_path_ratio_by_floor"].items()},
                   hot_path_ms=round(r["hot_path_ms"], 3),
                   floor_ms={k: round(v, 3) for k, v in r["floor_ms"].items()},
                   hot_path_grid=r["grid"])
        if "compiled_path" in r:
            out.update(hot_path_compiled=r["compiled_path"],
                       hot_path_numpy_path_ratio=round(r["numpy_path_ratio"], 3),
                       hot_path_first_call_s=r["first_call"])
    r = results.get("peer")
    if r and "error" not in r:
        out["ess_per_second_ratio"] = (None if r.get("ess_per_second_ratio") is None
                                       else round(r["ess_per_second_ratio"], 2))
        out["ess_per_second_ratio_is_against"] = ("lmfit Minimizer.emcee (stretch move, one "
                                                  "residual call per walker)")
        if "skipped" in r.get("lmfit", {}):
            out["peer_note"] = r["lmfit"]["skipped"]
        else:
            out.update(
                ess_per_cpu_second_ratio=round(r["ess_per_cpu_second_ratio"], 2),
                peer_time_per_step_ratio=round(r["time_per_step_ratio"], 2),
                peer_ess_per_step_ratio=round(r["ess_per_step_ratio"], 2),
                peer_posteriors_agree=r["posteriors_agree"],
                peer_max_median_difference_sd=round(max(r["median_difference_in_sd"].values()),
                                                    3),
            )
            if r.get("ess_per_second_ratio_fresh_process") is not None:
                out["ess_per_second_ratio_fresh_process"] = round(
                    r["ess_per_second_ratio_fresh_process"], 2)
                out["peer_one_time_costs_s"] = {k: round(v, 2)
                                                for k, v in r["one_time_costs_s"].items()}
            loop = r.get("per_angle_loop_comparison")
            if loop:
                out["ess_per_second_ratio_per_angle_loop"] = round(loop["ess_per_second_ratio"],
                                                                   2)
        out["peer_setup"] = {"map": r["map"], "walkers": r["walkers"], "steps": r["steps"]}
    r = results.get("peers")
    if r and "error" not in r:
        em, pk, ls = r["emcee_script"], r["polkit"], r["least_squares"]
        out.update(
            ess_per_second_ratio_vs_emcee=round(r["ess_per_second_ratio_vs_emcee"], 2),
            time_to_answer_ratio_vs_emcee=round(r["time_to_answer_ratio_vs_emcee"], 2),
            time_to_answer_ratio_vs_least_squares=round(
                r["time_to_answer_ratio_vs_least_squares"], 1),
            # the first repeat's times; the three ratios above are medians over the repeats
            peers_time_to_answer_s={"polkit": round(pk["wall_s"], 1),
                                    "emcee_script": round(r["emcee_script_time_to_answer_s"], 1),
                                    "least_squares": round(ls["wall_s"], 2)},
            peers_emcee_target_reached=em["reached"],
            peers_polkit_gate_passed=pk["converged"],
            peers_max_median_difference_sd={
                "emcee_script": round(max(r["emcee_median_difference_in_sd"].values()), 3),
                "least_squares": round(max(r["least_squares_difference_in_sd"].values()), 3)},
            peers_least_squares_sd_over_posterior_sd={
                k: round(v, 3) for k, v in r["least_squares_sd_over_posterior_sd"].items()},
            peers_same_likelihood_max_rel_diff=r["same_likelihood_max_rel_diff"],
            peers_map=r["map"],
            peers_repeats=[{k: (round(v, 3) if isinstance(v, float) else v)
                            for k, v in q.items()} for q in r.get("repeats", [])],
        )
    r = results.get("three")
    if r and "error" not in r:
        out.update(three_vs_two_call_ratio=round(r["three_vs_two_call_ratio"], 3),
                   three_vs_two_call_ratio_of_minima=round(
                       r["three_vs_two_call_ratio_of_minima"], 3),
                   three_vs_two_ms={"two": round(r["two_ms"], 3),
                                    "three": round(r["three_ms"], 3)})
    r = results.get("scaling")
    if r and "error" not in r:
        out.update(
            scaling_time_exponent=round(r["time_exponent"], 3),
            scaling_time_exponent_from_1e5=round(r["time_exponent_from_1e5"], 3),
            scaling_ms_per_call={str(s["pixels"]): round(s["ms_per_call"], 2)
                                 for s in r["sizes"]},
            scaling_peak_MiB_largest=round(r["largest_peak_MiB"], 1),
            scaling_largest_pixels=r["largest_pixels"],
        )
    r = results.get("efficiency")
    if r and "error" not in r:
        out.update(
            efficiency_ratio={k: round(v, 3) for k, v in r["efficiency_ratio_targeted"].items()},
            efficiency_within_target=r["within_target"],
            whole_map_rmse_over_bound={k: round(v["whole_map_rmse_over_bound"], 3)
                                       for k, v in r["parameters"].items()},
            peak_table_rmse_over_whole_map_rmse={
                k: round(v, 3) for k, v in r["whole_map_gain_over_peak_table_rmse"].items()},
        )
    r = results.get("end_to_end")
    if r and "error" not in r:
        if "demo" in r:
            out["demo_wall_s"] = round(r["demo"]["wall_s"], 1)
        out["cli_wall_s"] = {k: round(v["wall_s"], 1) for k, v in r["commands"].items()}
        out["cli_exit_status"] = {k: v["exit_status"] for k, v in r["commands"].items()}
    r = results.get("survey")
    if r and "error" not in r and "skipped" not in r:
        out["survey_positions_per_min"] = {
            "1_worker": round(r["one_worker"]["positions_per_min"], 2),
            "2_workers": round(r["two_workers"]["positions_per_min"], 2),
            "1_worker_fits_only": round(r["one_worker"]["fit_positions_per_min"], 2),
            "2_workers_fits_only": round(r["two_workers"]["fit_positions_per_min"], 2),
        }
    r = results.get("widgets")
    if r and "error" not in r and "skipped" not in r:
        out["widgets_overlay_update_ms_median"] = r.get("overlay_update_ms_median")
    failed = {k: v["error"] for k, v in results.items() if "error" in v}
    if failed:
        out["failed"] = failed
    skipped = {k: v["skipped"] for k, v in results.items() if "skipped" in v}
    if skipped:
        out["skipped"] = skipped
    return out


def _print_machine(m: dict) -> None:
    blas = m.get("blas") or {}
    print(f"machine: {m.get('cpu_model', m['machine'])}, {m['cpu_count']} cores "
          f"({m['usable_cores']} usable), load average {m.get('load_average_1_5_15min')}")
    print(f"  Python {m['python']}, numpy {m['numpy']}, scipy {m['scipy']}, emcee {m['emcee']}, "
          f"ArviZ {m['arviz']}, lmfit {m['lmfit']}, numba {m.get('numba')}")
    print(f"  BLAS: {blas.get('name')} {blas.get('version')} "
          f"({blas.get('openblas configuration', '')}); threadpools: {m['threadpools']}")


def _print_generic(name: str, r: dict) -> None:
    print(f"{name}:")
    for k, v in r.items():
        if isinstance(v, (int, float, str, bool)) or v is None:
            print(f"  {k}: {v}")


def main(argv: list[str] | None = None) -> int:
    """Run the chosen benchmarks; returns the exit status (1 if one failed)."""
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true",
                        help="smaller runs (a few minutes in all)")
    parser.add_argument("--only", nargs="+", choices=list(BENCHMARKS), default=None,
                        help="run only these benchmarks")
    parser.add_argument("--details", type=Path, default=None,
                        help="also write every benchmark's full results to this JSON file")
    args = parser.parse_args(argv)
    names = args.only or list(BENCHMARKS)

    info = machine()
    _print_machine(info)
    results: dict[str, dict] = {}
    t_all = time.perf_counter()
    for name in names:
        module_name = BENCHMARKS[name]
        if not (HERE / f"{module_name}.py").exists():
            results[name] = {"skipped": f"tests/benchmarks/{module_name}.py is not present"}
            print(f"\n{name}: skipped ({results[name]['skipped']})")
            continue
        print(f"[{time.perf_counter() - t_all:7.0f} s] running {name} ...", file=sys.stderr,
              flush=True)
        t0 = time.perf_counter()
        try:
            module = importlib.import_module(module_name)
            kwargs = {"survey": False} if name == "end_to_end" else {}
            r = module.run(args.quick, **kwargs)
        except Exception as exc:  # report and go on: one broken benchmark keeps the others
            results[name] = {"error": f"{type(exc).__name__}: {exc}"}
            print(f"\n{name}: FAILED: {results[name]['error']}")
            traceback.print_exc(file=sys.stderr)
            continue
        r["benchmark_wall_s"] = time.perf_counter() - t0
        results[name] = r
        print()
        try:
            report = getattr(module, "print_report", None)
            if report is not None:
                report(r)
            elif name == "survey":
                _print_survey(r)
            else:
                _print_generic(name, r)
        except (KeyError, TypeError, ValueError):  # a result laid out differently
            _print_generic(name, r)

    info["load_average_1_5_15min_at_end"] = (
        [round(v, 2) for v in os.getloadavg()] if hasattr(os, "getloadavg") else None)
    out = figures(results)
    out["mode"] = "quick" if args.quick else "full"
    out["total_wall_s"] = round(time.perf_counter() - t_all, 1)
    out["machine"] = info
    if args.details is not None:
        from polkit.files import write_json

        write_json(args.details, {"figures": out, "results": results})
    print()
    print(json.dumps(out, indent=2, default=float))
    return 1 if any("error" in r for r in results.values()) else 0


def _print_survey(r: dict) -> None:
    print(f"survey: quick mode, {r['positions']} positions (load average "
          f"{r['load_average_1min']:.1f} on {r['cpu_count']} cores)")
    for key in ("one_worker", "two_workers"):
        e = r[key]
        print(f"  {e['workers']} worker(s): {e['positions_per_min']:.1f} positions/min overall "
              f"({e['wall_s']:.1f} s, cluster start included); "
              f"{e['fit_positions_per_min']:.1f} from the fits alone")
    print(f"  speed-up 2 vs 1 workers: {r['speedup']:.2f} overall, "
          f"{r['speedup_fits_only']:.2f} from the fits alone")


if __name__ == "__main__":
    sys.exit(main())

"""The ``polkit`` command line.

Every refusal of bad input is printed as one line naming the file and the problem,
and the command exits non-zero; ``--debug`` shows the traceback instead.

Exit status: 0 success; 1 an error writing results (disk full, read-only folder);
2 bad input, bad options or a fit that could not run; 3 a fit that ran but did not
converge (its results are written and marked ``"converged": false``); 4 (``dispersion``,
``power``) a converged fit whose model check failed: the model does not describe the data
(results written, ``"model_check": {"passed": false, ...}``).  3 takes precedence over 4: an
unconverged fit is not judged by its residuals.
"""

from __future__ import annotations

import argparse
import gc
import logging
import sys
import warnings
from pathlib import Path

from polkit import __version__
from polkit.errors import ConvergenceWarning, PolkitError, PolkitWarning
from polkit.safety import POWER_NOTE, SAFETY_NOTE

EXIT_OK = 0
EXIT_WRITE = 1
EXIT_INPUT = 2
EXIT_NOT_CONVERGED = 3
EXIT_MODEL_CHECK = 4


def _add_common_fit_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--seed", type=int, default=None,
                   help="root seed; the same seed gives the same numbers (default: a fresh seed, "
                   "printed and recorded in the result)")
    p.add_argument(
        "--resume", action="store_true", help="continue from the HDF5 checkpoint in --out"
    )
    p.add_argument("--out", type=Path, default=None,
                   help="output folder (default: polkit-out/<input file name without suffix>)")
    p.add_argument("--max-steps", type=int, default=None,
                   help="MCMC step limit per ensemble (default: 10000)")
    p.add_argument("--walkers", type=int, default=None,
                   help="walkers per ensemble (default: 32; more for three oscillators)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _add_camera_options(p: argparse.ArgumentParser, *, detection: bool) -> None:
    """Options of the camera steps (offset, saturation, spikes, excluded windows)."""
    p.add_argument("--dark", default=None, metavar="COUNTS|FILE",
                   help="camera offset subtracted in raw counts before unit conversion: a "
                   "number of counts or a dark-frame file on the same axes (default: the "
                   "file's camera_offset/dark attribute)")
    p.add_argument("--keep-saturated", action="store_true",
                   help="do not mask saturated (clipped) pixels")
    p.add_argument("--keep-spikes", action="store_true",
                   help="do not mask cosmic-ray spikes")
    p.add_argument("--exclude", action="append", default=[], metavar="E1:E2[@A1:A2]",
                   help="mask a window that holds no polariton line: energies in eV, "
                   "optionally angles (degree, or 1/um for k); repeatable")
    if detection:
        p.add_argument("--min-snr", type=float, default=5.0,
                       help="peak-table detection threshold: line height over the noise of "
                       "the mean over one linewidth (default 5)")


def _camera(args):
    from polkit.data import CameraOptions

    return CameraOptions.from_text(
        args.dark, mask_saturated=not args.keep_saturated, mask_spikes=not args.keep_spikes,
        exclude=tuple(args.exclude), **({"min_snr": args.min_snr} if "min_snr" in args else {}))


#: model names (as summary.json writes them, and short forms) -> the library's model option
_MODEL_WORDS = {"two_oscillator": "two", "three_oscillator": "three", "weak_coupling": "weak",
                "two": "two", "three": "three", "weak": "weak"}

_MAP_HELP = ("angle-resolved map: netCDF/HDF5, CSV, plain-text matrix or .npz (energy, "
             "wavelength or wavenumber axis; angle or k axis)")
_KIND_HELP = ("spectrum kind (default: the file's 'kind' attribute, else emission); "
              "transmission is fitted with the emission model")
_PRIORS_HELP = "TOML file of priors over the defaults (keys: parameter names, with units)"
_STRICT_HELP = ("run four independently seeded ensembles and require them to agree (nested "
                "R-hat <= 1.01): slower, a stronger convergence check")
_MEDIUM_HELP = ("whether the file's wavelengths are in air or vacuum (default: the file's "
                "wavelength_medium attribute, else vacuum; stated in the output)")


class _HelpFormatter(argparse.HelpFormatter):
    """Help that shows an option's default when it has a meaningful one."""

    def _get_help_string(self, action):
        text = action.help or ""
        default = action.default
        if (action.option_strings and "default" not in text and "%(default)" not in text
                and default not in (None, False, [], argparse.SUPPRESS)):
            text += " (default: %(default)s)"
        return text


class _SubParser(argparse.ArgumentParser):
    """Subcommand parsers share the help formatter."""

    def __init__(self, *args, **kwargs):
        kwargs.setdefault("formatter_class", _HelpFormatter)
        super().__init__(*args, **kwargs)


def _add_demo(sub) -> None:
    """``polkit demo``: the whole job on the bundled demo sample."""
    p = sub.add_parser("demo", help="run the whole job on the bundled invented demo sample")
    p.add_argument("--data", type=Path, default=None, help="demo data folder (default: bundled)")
    p.add_argument("--out", type=Path, default=Path("polkit-out") / "demo", help="output folder")
    p.add_argument("--seed", type=int, default=20261202, help="root seed of every fit")
    p.add_argument("--quick", action="store_true",
                   help="short chains, for a smoke run (the fits are then marked not converged)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _add_inspect(sub) -> None:
    """``polkit inspect``: describe a data file."""
    p = sub.add_parser("inspect", help="describe a data file and write a quick-look PNG")
    p.add_argument("file", type=Path, help="a map or power-series file (netCDF/HDF5, CSV, "
                   "plain-text matrix, .npz)")
    p.add_argument(
        "--png", type=Path, default=None, help="quick-look PNG (default: FILE.png beside --out)"
    )
    p.add_argument("--out", type=Path, default=Path("polkit-out") / "inspect",
                   help="folder of the quick-look PNG")
    p.add_argument("--wavelength-medium", choices=["vacuum", "air"], default=None,
                   help=_MEDIUM_HELP)
    _add_camera_options(p, detection=False)


def _add_dispersion(sub) -> None:
    """``polkit dispersion``: fit one angle-resolved map."""
    p = sub.add_parser("dispersion", help="fit a coupled-oscillator model to an angle-resolved map")
    p.add_argument("map", type=Path, help=_MAP_HELP)
    p.add_argument("--model", choices=list(_MODEL_WORDS), default="two_oscillator",
                   metavar="{two_oscillator,three_oscillator,weak_coupling}",
                   help="two_oscillator: photon + one exciton; three_oscillator: photon + two "
                   "excitons; weak_coupling: the uncoupled cavity mode and exciton line (the "
                   "names summary.json uses; two, three and weak are accepted too)")
    p.add_argument("--kind", choices=["emission", "reflectance", "transmission"], default=None,
                   help=_KIND_HELP)
    p.add_argument("--peaks-only", action="store_true",
                   help="fit the per-angle peak table only (fast; the whole map is better for "
                   "numbers in a paper)")
    p.add_argument("--priors", type=Path, default=None, help=_PRIORS_HELP)
    p.add_argument("--strict", action="store_true", help=_STRICT_HELP)
    p.add_argument("--wavelength-medium", choices=["vacuum", "air"], default=None,
                   help=_MEDIUM_HELP)
    _add_camera_options(p, detection=True)
    p.add_argument("--quick", action="store_true", help=_QUICK_HELP)
    _add_common_fit_options(p)


def _add_compare(sub) -> None:
    """``polkit compare``: rank the coupling models on one map."""
    p = sub.add_parser(
        "compare", help="is the sample strongly coupled? is a second exciton needed? fit each "
        "model to the map and say which the data support",
        description="Fit the weak-coupling picture (uncoupled cavity mode and exciton line), "
        "two oscillators and three oscillators to the same map, then rank them by how well each "
        "predicts a spectrum left out of its fit (PSIS-LOO over spectra, in nats). A model "
        "whose addition the map does not identify is reported as not needed.")
    p.add_argument("map", type=Path, help=_MAP_HELP)
    p.add_argument("--models", default="weak_coupling,two_oscillator,three_oscillator",
                   help="comma-separated models to compare (weak, two and three are accepted "
                   "too)")
    p.add_argument("--kind", choices=["emission", "reflectance", "transmission"], default=None,
                   help=_KIND_HELP)
    p.add_argument("--priors", type=Path, default=None, help=_PRIORS_HELP)
    p.add_argument("--wavelength-medium", choices=["vacuum", "air"], default=None,
                   help=_MEDIUM_HELP)
    p.add_argument("--seed", type=int, default=None,
                   help="root seed (default: a fresh seed, printed and recorded)")
    p.add_argument("--out", type=Path, default=None,
                   help="output folder (default: polkit-out/<map name>-compare)")
    p.add_argument("--max-steps", type=int, default=None,
                   help="MCMC step limit per model (default: 10000)")
    p.add_argument("--walkers", type=int, default=None,
                   help="walkers per ensemble (default: 32; more for three oscillators)")
    p.add_argument("--figures", action="store_true", help="also write each model's figures")
    p.add_argument("--resume", action="store_true",
                   help="continue each model's fit from its checkpoint in --out")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _add_power(sub) -> None:
    """``polkit power``: fit one pump-power series."""
    p = sub.add_parser("power", help="fit a mean-field model to a pump-power series",
                       epilog=POWER_NOTE + " " + SAFETY_NOTE)
    p.add_argument("series", type=Path, help="observable table (CSV, netCDF) or spectra cube")
    p.add_argument("--model", choices=["coherent", "reservoir"], required=True,
                   help="coherent: resonant drive (bistability); reservoir: nonresonant pump "
                   "(condensation threshold)")
    p.add_argument("--calibration", type=Path, default=None,
                   help="TOML density calibration (spot size, efficiencies); without it only "
                   "blueshift per power is absolute")
    p.add_argument("--dispersion", type=Path, default=None,
                   help="dispersion result folder (lower-polariton energy, linewidth, Hopfield "
                   "fractions)")
    p.add_argument("--priors", type=Path, default=None, help=_PRIORS_HELP)
    p.add_argument("--strict", action="store_true", help=_STRICT_HELP)
    p.add_argument("--spot", choices=["point", "gaussian", "flat"], default=None,
                   help="pump-spot profile of the coherent model (default: the calibration "
                        "file's spot key, else point)")
    p.add_argument("--quick", action="store_true", help=_QUICK_HELP)
    _add_common_fit_options(p)


def _add_budget(sub) -> None:
    """``polkit budget``: energy per operation of a device."""
    p = sub.add_parser("budget", help="energy per operation of a device built from the sample")
    p.add_argument("--dispersion", type=Path, required=True, help="dispersion result folder")
    p.add_argument("--power", type=Path, required=True, help="calibrated power result folder")
    p.add_argument("--device", type=Path, required=True, help="TOML device description")
    p.add_argument(
        "--claim",
        action="append",
        default=[],
        help='e.g. "energy_per_operation < 10 fJ" (repeatable)',
    )
    p.add_argument(
        "--check-sample", action="store_true", help="refuse results recorded for different samples"
    )
    p.add_argument("--draws", type=int, default=4000, help="joint posterior draws")
    p.add_argument("--seed", type=int, default=None,
                   help="seed of the joint draws (default: a fresh seed, printed and recorded)")
    p.add_argument("--out", type=Path, default=Path("polkit-out") / "budget",
                   help="output folder")


def _add_survey(sub) -> None:
    """``polkit survey``: fit every position of a wafer."""
    p = sub.add_parser("survey", help="fit every position of a wafer and map the results")
    p.add_argument("manifest", type=Path, help="CSV manifest (file, x [mm], y [mm]) or a folder")
    p.add_argument(
        "--mode",
        choices=["quick", "full"],
        default="quick",
        help="quick: peak-table fits; full: whole-map MCMC with its convergence gate",
    )
    p.add_argument("--workers", type=int, default=None,
                   help="local worker processes (default: the number of cores)")
    p.add_argument("--scheduler", default=None,
                   help="address of an existing dask scheduler (default: a local cluster)")
    p.add_argument("--out", type=Path, default=Path("polkit-out") / "survey",
                   help="output folder; a rerun into it skips finished positions")
    p.add_argument("--seed", type=int, default=None,
                   help="root seed, one child per position (default: fresh on the first run, "
                   "the recorded one on reruns)")
    p.add_argument("--max-steps", type=int, default=None,
                   help="MCMC step limit per position in full mode (default: 10000)")
    p.add_argument("--retry-failed", action="store_true", help="refit positions that failed")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _add_report(sub) -> None:
    """``polkit report``: execute a notebook into a report."""
    p = sub.add_parser(
        "report", help="execute a notebook into a self-contained HTML report",
        description="Execute NOTEBOOK top to bottom in a fresh Jupyter kernel and write its "
        "HTML report, the executed notebook and its results to --out. The notebook's code "
        "runs with your rights, like any Python script: run only notebooks you trust. "
        "--param values are passed exactly as given; the kernel runs in the notebook's "
        "folder, so relative paths are read from there.")
    p.add_argument("notebook", type=Path, help="a notebook with a cell tagged 'parameters'")
    p.add_argument(
        "--param",
        action="append",
        default=[],
        metavar="NAME=VALUE",
        help="override a name of the notebook's parameters cell (Python literal; a bare "
        "word is text, passed as given)",
    )
    p.add_argument("--out", type=Path, default=None,
                   help="report folder (default: polkit-out/reports/<notebook name>)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="polkit",
        description="Characterise exciton-polariton microcavity samples: dispersion, power "
        "series and energy budgets with honest uncertainties.",
        epilog=SAFETY_NOTE,
        formatter_class=_HelpFormatter,
    )
    parser.add_argument("--version", action="version", version=f"polkit {__version__}")
    parser.add_argument("--debug", action="store_true", help="show tracebacks on errors")
    parser.add_argument("--verbose", action="store_true",
                        help="show the library's progress messages (and the survey scheduler's)")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_SubParser)
    sub.required = True

    _add_demo(sub)
    _add_inspect(sub)
    _add_dispersion(sub)
    _add_compare(sub)
    _add_power(sub)
    _add_budget(sub)
    _add_survey(sub)
    _add_report(sub)
    return parser


def _cmd_survey(args) -> int:
    from polkit.jobs.survey.run import run_survey

    result = run_survey(
        args.manifest,
        mode=args.mode,
        workers=args.workers,
        scheduler=args.scheduler,
        out=args.out,
        seed=args.seed,
        progress=_progress(args),
        max_steps=args.max_steps,
        retry_failed=args.retry_failed,
    )
    print(result.table())
    print(f"results written to {args.out}")
    counts = result.counts
    if counts.get("failed", 0):
        return EXIT_INPUT
    if counts.get("not_converged", 0):
        return EXIT_NOT_CONVERGED
    return EXIT_OK


def _parse_params(items: list[str]) -> dict:
    import ast

    from polkit.errors import ConfigError

    params = {}
    for item in items:
        name, sep, text = item.partition("=")
        if not sep or not name.strip().isidentifier():
            raise ConfigError(f"expected NAME=VALUE, found {item!r}", key="--param")
        try:
            params[name.strip()] = ast.literal_eval(text.strip())
        except (ValueError, SyntaxError):
            params[name.strip()] = text.strip()  # a bare word is taken as text
    return params


def _cmd_report(args) -> int:
    from polkit.report import make_report

    out = args.out or Path("polkit-out") / "reports" / args.notebook.stem
    paths = make_report(args.notebook, params=_parse_params(args.param), out=out)
    print(f"report: {paths.html}")
    print(f"executed notebook: {paths.notebook}")
    return EXIT_OK


_QUICK_HELP = ("stop after the quick answer at the most probable point (Laplace curvature "
               "summary, approximate; writes quick_summary.json, no MCMC)")


def _print_quick(summary: dict, out: Path) -> int:
    from polkit.inference.laplace import format_quick
    from polkit.jobs.steps import QUICK_SUMMARY

    print(format_quick(summary))
    print(f"approximate answer written to {out / QUICK_SUMMARY}; run without --quick for "
          "the MCMC posterior")
    return EXIT_OK


def _progress(args) -> bool:
    """Progress bars only on a terminal: a log file would get one line per update."""
    return not args.quiet and sys.stderr.isatty()


def _fit_options(args, out: Path) -> dict:
    """The options every fitting command shares (priors, seed, resume, limits, output)."""
    return dict(priors=args.priors, seed=args.seed, resume=args.resume, strict=args.strict,
                out=out, max_steps=args.max_steps, n_walkers=args.walkers,
                progress=_progress(args))


def _cmd_power(args) -> int:
    from polkit.jobs.power.run import fit_power

    out = args.out or Path("polkit-out") / args.series.stem
    result = fit_power(
        args.series,
        model=args.model,
        calibration=args.calibration,
        dispersion=args.dispersion,
        spot=args.spot,
        **_fit_options(args, out),
        quick=args.quick,
    )
    if args.quick:
        return _print_quick(result, out)
    print(result.table())
    print(f"results written to {out}")
    check = result.model_check
    failed = check is not None and not check["passed"]
    if failed:
        from polkit.jobs.power.check import check_line

        print(f"polkit: warning: {args.series}: {_one_line(check_line(check))}",
              file=sys.stderr)
    if not result.converged:
        return EXIT_NOT_CONVERGED
    return EXIT_MODEL_CHECK if failed else EXIT_OK


def _cmd_budget(args) -> int:
    from polkit.jobs.budget.run import energy_budget

    result = energy_budget(
        args.dispersion,
        args.power,
        args.device,
        claims=args.claim,
        seed=args.seed,
        n_draws=args.draws,
        out=args.out,
        expect_same_sample=args.check_sample,
    )
    print(result.table())
    print(f"results written to {args.out}")
    return EXIT_OK


def _cmd_inspect(args) -> int:
    from polkit.data import inspect_file

    png = args.png or (args.out / (args.file.name + ".png"))
    opts = {} if args.wavelength_medium is None else {"wavelength_medium": args.wavelength_medium}
    print(inspect_file(args.file, png=png, camera=_camera(args), **opts))
    return EXIT_OK


def _cmd_demo(args) -> int:
    from polkit.demo import run_demo

    return run_demo(
        data=args.data, out=args.out, seed=args.seed, quick=args.quick, progress=_progress(args)
    )


def _cmd_dispersion(args) -> int:
    from polkit.jobs.dispersion.run import fit_dispersion
    from polkit.plotting.corner_process import CornerProcess

    out = args.out or Path("polkit-out") / args.map.stem
    if args.quick:
        summary = fit_dispersion(args.map, model=_MODEL_WORDS[args.model], kind=args.kind,
                                 peaks_only=args.peaks_only, **_fit_options(args, out),
                                 wavelength_medium=args.wavelength_medium, quick=True,
                                 camera=_camera(args))
        return _print_quick(summary, out)
    # a second process gets matplotlib ready while the fit samples, then draws the corner
    # plot alongside the other figures (see polkit.plotting.corner_process)
    corner_process = CornerProcess.start()
    try:
        result = fit_dispersion(
            args.map,
            model=_MODEL_WORDS[args.model],
            kind=args.kind,
            peaks_only=args.peaks_only,
            **_fit_options(args, out),
            wavelength_medium=args.wavelength_medium,
            figures=False,
            camera=_camera(args),
        )
        result.figures(out, corner_process=corner_process)
    finally:
        if corner_process is not None:
            corner_process.close()
    from polkit.data.camera import describe_record

    for line in describe_record(result.provenance.get("preprocessing", {})):
        print(line)
    print(result.table())
    failed = _print_model_check(result.model_check)
    print(f"results written to {out}")
    if not result.converged:
        return EXIT_NOT_CONVERGED
    return EXIT_MODEL_CHECK if failed else EXIT_OK


def _print_model_check(check) -> bool:
    """Print the model check line (a warning line when it failed); True when it failed."""
    if not check:
        return False
    masked = check.get("masked_pixels", {})
    n_out, n_sat = masked.get("outliers", 0), masked.get("saturated", 0)
    pixels = f"; pixels left out: {n_out} outlier(s), {n_sat} saturated" if n_out or n_sat else ""
    line = (f"model check: chi2/dof {check['statistic']:.3g} against the noise floor from "
            f"{check['noise_floor']} (threshold {check['threshold']:g}){pixels}")
    if check.get("passed"):
        print(f"{line}: passed")
        return False
    worst = ", ".join(f"{w.get('angle', w.get('k'))} {w['units']} ({w['chi2_per_pixel']:.3g})"
                      for w in check.get("worst_angles", []))
    print(f"polkit: warning: {line}: FAILED; worst: {worst}. {check.get('advice', '')}",
          file=sys.stderr)
    return True


def _cmd_compare(args) -> int:
    from polkit.jobs.dispersion.compare import compare_dispersion_models

    out = args.out or Path("polkit-out") / f"{args.map.stem}-compare"
    result = compare_dispersion_models(
        args.map,
        models=[_MODEL_WORDS.get(m.strip(), m.strip()) for m in args.models.split(",")
                if m.strip()],
        kind=args.kind,
        priors=args.priors,
        seed=args.seed,
        out=out,
        max_steps=args.max_steps,
        n_walkers=args.walkers,
        progress=_progress(args),
        wavelength_medium=args.wavelength_medium,
        figures=args.figures,
        resume=args.resume,
    )
    print(result.table())
    print(f"results written to {out}")
    return EXIT_OK if result.converged else EXIT_NOT_CONVERGED


_COMMANDS = {
    "demo": _cmd_demo,
    "inspect": _cmd_inspect,
    "dispersion": _cmd_dispersion,
    "compare": _cmd_compare,
    "power": _cmd_power,
    "budget": _cmd_budget,
    "survey": _cmd_survey,
    "report": _cmd_report,
}


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())


#: commands whose runs draw random numbers from ``--seed`` (the survey keeps its own root)
_SEEDED = ("dispersion", "compare", "power", "budget")


def _choose_seed(args) -> None:
    """Give a run without ``--seed`` a recorded seed, printed so the run can be repeated.

    A resumed run keeps the seed stored with its checkpoint, so nothing is chosen then.
    """
    if args.command not in _SEEDED or getattr(args, "seed", 0) is not None:
        return
    if getattr(args, "resume", False):
        return
    import secrets

    args.seed = secrets.randbits(63)
    print(f"no --seed given; this run uses --seed {args.seed} (recorded in the results; pass "
          "it again to repeat the run)", flush=True)


def main(argv: list[str] | None = None) -> int:
    """Entry point of the ``polkit`` command; returns the exit status."""
    parser = build_parser()
    args, extra = parser.parse_known_args(argv)
    if extra:  # a typo in a subcommand's option: show that subcommand's usage
        sub = next(a for a in parser._actions if a.dest == "command").choices[args.command]
        sub.error(f"unrecognized arguments: {' '.join(extra)}")
    logging.basicConfig(
        level=logging.DEBUG if args.debug else logging.INFO if args.verbose else logging.WARNING,
        format="polkit: %(levelname)s: %(message)s",
    )

    def _show_warning(message, category, filename, lineno, file=None, line=None):
        if issubclass(category, PolkitWarning):
            label = "not converged" if issubclass(category, ConvergenceWarning) else "warning"
            print(f"polkit: {label}: {_one_line(message)}", file=sys.stderr)
        elif args.debug:
            print(
                warnings.formatwarning(message, category, filename, lineno, line), file=sys.stderr
            )

    warnings.showwarning = _show_warning
    out = getattr(args, "out", None)
    if out is not None and Path(out).exists() and not Path(out).is_dir():
        print(f"polkit: error: --out {out} is an existing file, not a folder; give the name of "
              "a folder (new or existing) for the results.", file=sys.stderr)
        return EXIT_INPUT
    _choose_seed(args)
    try:
        status = _COMMANDS[args.command](args)
    except PolkitError as exc:
        if args.debug:
            raise
        print(f"polkit: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_INPUT
    except OSError as exc:
        if args.debug:
            raise
        print(f"polkit: error: {_one_line(exc)}", file=sys.stderr)
        return EXIT_WRITE
    except KeyboardInterrupt:
        print(
            "polkit: interrupted; finished MCMC steps are kept in the checkpoint "
            "(rerun with --resume)",
            file=sys.stderr,
        )
        return 130
    return status


def run() -> None:
    """The ``polkit`` console command: :func:`main`, then exit with its status.

    A finished command leaves a few hundred thousand objects (arrays, figures, library
    modules) that Python's cyclic collector would otherwise walk at exit, about a second
    on a 2-core machine.  Every output file is written and closed by then, so they are
    handed to the permanent generation (:func:`gc.freeze`) and the interpreter exits
    at once; atexit handlers and module teardown still run.
    """
    status = main()
    sys.stdout.flush()
    sys.stderr.flush()
    gc.freeze()
    sys.exit(status)


if __name__ == "__main__":  # pragma: no cover
    run()

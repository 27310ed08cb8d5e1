"""What each ``polkit`` subcommand does with its parsed options; returns the exit status."""

from __future__ import annotations

import sys
from pathlib import Path

from polkit.cli.parser import _MODEL_WORDS

EXIT_OK = 0
EXIT_WRITE = 1
EXIT_INPUT = 2
EXIT_NOT_CONVERGED = 3
EXIT_MODEL_CHECK = 4


def _one_line(exc: BaseException) -> str:
    return " ".join(str(exc).split())


def _camera(args):
    from polkit.data import CameraOptions

    return CameraOptions.from_text(
        args.dark, mask_saturated=not args.keep_saturated, mask_spikes=not args.keep_spikes,
        exclude=tuple(args.exclude), **({"min_snr": args.min_snr} if "min_snr" in args else {}))


#: model names (as summary.json writes them, and short forms) -> the library's model option
def _cmd_survey(args) -> int:
    from polkit.inference.settings import SamplerSettings
    from polkit.jobs.survey.run import run_survey

    result = run_survey(
        args.manifest,
        mode=args.mode,
        workers=args.workers,
        scheduler=args.scheduler,
        out=args.out,
        seed=args.seed,
        sampler=SamplerSettings(max_steps=args.max_steps, progress=_progress(args)),
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
    from polkit.inference.settings import SamplerSettings

    return dict(priors=args.priors, seed=args.seed, resume=args.resume, out=out,
                sampler=SamplerSettings(max_steps=args.max_steps, n_walkers=args.walkers,
                                        strict=args.strict, progress=_progress(args)))


def _map_options(args):
    """How the map file is read: spectrum kind, wavelength medium and camera steps."""
    from polkit.data.options import LoadOptions

    return LoadOptions(kind=args.kind, wavelength_medium=args.wavelength_medium,
                       camera=_camera(args))


def _cmd_power(args) -> int:
    from polkit.jobs.power.run import PowerCalibration, fit_power

    out = args.out or Path("polkit-out") / args.series.stem
    result = fit_power(
        args.series,
        model=args.model,
        calibration=PowerCalibration(density=args.calibration, spot=args.spot),
        dispersion=args.dispersion,
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

    result = energy_budget(args.dispersion, args.power, args.device, claims=args.claim,
                           seed=args.seed, n_draws=args.draws, out=args.out,
                           expect_same_sample=args.check_sample)
    print(result.table())
    print(f"results written to {args.out}")
    return EXIT_OK


def _cmd_inspect(args) -> int:
    from polkit.plotting.inspect import inspect_file

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
        summary = fit_dispersion(args.map, model=_MODEL_WORDS[args.model],
                                 peaks_only=args.peaks_only, **_fit_options(args, out),
                                 load=_map_options(args), quick=True)
        return _print_quick(summary, out)
    # a second process gets matplotlib ready while the fit samples, then draws the corner
    # plot alongside the other figures (see polkit.plotting.corner_process)
    corner_process = CornerProcess.start()
    try:
        result = fit_dispersion(
            args.map,
            model=_MODEL_WORDS[args.model],
            peaks_only=args.peaks_only,
            **_fit_options(args, out),
            load=_map_options(args),
            figures=False,
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
    from polkit.data.options import LoadOptions
    from polkit.inference.settings import SamplerSettings
    from polkit.jobs.dispersion.compare import compare_models

    out = args.out or Path("polkit-out") / f"{args.map.stem}-compare"
    result = compare_models(
        args.map,
        models=[_MODEL_WORDS.get(m.strip(), m.strip()) for m in args.models.split(",")
                if m.strip()],
        priors=args.priors,
        seed=args.seed,
        out=out,
        resume=args.resume,
        sampler=SamplerSettings(max_steps=args.max_steps, n_walkers=args.walkers,
                                progress=_progress(args)),
        load=LoadOptions(kind=args.kind, wavelength_medium=args.wavelength_medium),
        figures=args.figures,
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

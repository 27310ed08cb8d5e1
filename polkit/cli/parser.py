"""The ``polkit`` command line's options: one function per subcommand."""

from __future__ import annotations

import argparse
from pathlib import Path

from polkit import __version__
from polkit.safety import POWER_NOTE, SAFETY_NOTE


def _add_common_fit_options(p: argparse.ArgumentParser) -> None:
    p.add_argument("--seed", type=int, default=None,
                   help="root seed; the same seed gives the same numbers (default: a fresh seed, "
                   "printed and recorded in the result)")
    p.add_argument(
        "--resume", action="store_true", help="continue from the HDF5 checkpoint in --out"
    )
    p.add_argument("--out", type=Path, default=None,
                   help="output folder (default: polkit-out/<input file name without suffix>)")
    _add_limits(p, per="ensemble")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


def _add_limits(p: argparse.ArgumentParser, *, per: str) -> None:
    """The sampler's step limit (per ensemble or per model) and walker count."""
    p.add_argument("--max-steps", type=int, default=None,
                   help=f"MCMC step limit per {per} (default: 10000)")
    p.add_argument("--walkers", type=int, default=None,
                   help="walkers per ensemble (default: 32; more for three oscillators)")


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
    _add_limits(p, per="model")
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



_QUICK_HELP = ("stop after the quick answer at the most probable point (Laplace curvature "
               "summary, approximate; writes quick_summary.json, no MCMC)")

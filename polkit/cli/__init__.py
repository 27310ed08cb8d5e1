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

import gc
import logging
import sys
import warnings
from pathlib import Path

from polkit.cli.commands import (
    _COMMANDS,
    EXIT_INPUT,
    EXIT_MODEL_CHECK,
    EXIT_NOT_CONVERGED,
    EXIT_OK,  # noqa: F401
    EXIT_WRITE,
    _one_line,
)
from polkit.cli.parser import build_parser
from polkit.errors import ConvergenceWarning, PolkitError, PolkitWarning

__all__ = ["main", "run", "build_parser", "EXIT_OK", "EXIT_WRITE", "EXIT_INPUT",
           "EXIT_NOT_CONVERGED", "EXIT_MODEL_CHECK"]


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

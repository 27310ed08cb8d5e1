"""The output folder of a survey: its file names, the position outcomes and the small JSON
records every step reads back.

Output folder::

    survey_state.json          mode, model and root seed of this survey (written first)
    positions/<id>/            posterior.nc, summary.json, done.json (written last);
                               started.json and, while a full-mode fit runs, chains.h5
    survey.nc, survey.csv      the combined table (netCDF with units; CSV, bracketed units)
    surface.json               the detuning surface, its gradient and the zero-detuning line
    wafer_maps.png, wafer_detuning.png
"""

from __future__ import annotations

import json
from pathlib import Path

from polkit.errors import PolkitError

__all__ = [
    "STATUSES",
    "STATE_FILE",
    "DONE_FILE",
    "STARTED_FILE",
    "SUMMARY_FILE",
    "POSITIONS_DIR",
    "SURVEY_NC",
    "SURVEY_CSV",
    "SURFACE_JSON",
    "CHECKPOINT",
    "read_json",
    "one_line",
    "reason",
]

#: position outcomes: converged fit, fit that did not pass its gate, no fit at all
STATUSES = ("ok", "not_converged", "failed")

STATE_FILE = "survey_state.json"
DONE_FILE = "done.json"
STARTED_FILE = "started.json"
SUMMARY_FILE = "summary.json"
POSITIONS_DIR = "positions"
SURVEY_NC = "survey.nc"
SURVEY_CSV = "survey.csv"
SURFACE_JSON = "surface.json"
CHECKPOINT = "chains.h5"


def read_json(path: Path) -> dict | None:
    """The JSON object in ``path``, or ``None`` if it is missing, unreadable or not an object."""
    try:
        value = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return value if isinstance(value, dict) else None


def one_line(text: str) -> str:
    """``text`` with every run of white space (line breaks included) made one space."""
    return " ".join(str(text).split())


def reason(exc: BaseException) -> str:
    """One line saying why a position failed: polkit's own message, else the exception's."""
    if isinstance(exc, PolkitError):
        return one_line(str(exc))
    return one_line(f"{type(exc).__name__}: {exc}")

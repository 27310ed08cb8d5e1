"""The small family of exceptions and warnings that polkit raises.

Every refusal of bad input is a :class:`DataError` (or :class:`ConfigError` for
priors, calibration and device files) whose message names the file, the field,
what was expected and what was found.  The command line prints such errors as
one line and exits non-zero.
"""

from __future__ import annotations

import os

__all__ = [
    "PolkitError",
    "DataError",
    "ConfigError",
    "FitError",
    "PolkitWarning",
    "DataWarning",
    "ConvergenceWarning",
]


class PolkitError(Exception):
    """Base class of every error polkit raises on purpose."""


def _located(message: str, path, field, label: str = "field") -> str:
    parts = []
    if path is not None:
        parts.append(os.fspath(path))
    if field is not None:
        parts.append(f"{label} '{field}'")
    return (": ".join(parts) + ": " + message) if parts else message


class DataError(PolkitError, ValueError):
    """Input data that polkit refuses: malformed files, NaNs, bad axes, unknown units.

    Parameters
    ----------
    message
        What was expected and what was found, and the fix where there is one.
    path
        The file the data came from (``None`` for in-memory data).
    field
        The variable, column, coordinate or attribute at fault.
    """

    def __init__(self, message: str, *, path=None, field=None):
        self.path = None if path is None else str(path)
        self.field = field
        self.reason = message
        super().__init__(_located(message, path, field))


class ConfigError(PolkitError, ValueError):
    """A priors, calibration or device file (or dict) with unknown keys,
    missing units or impossible values.  ``key`` names the offending entry."""

    def __init__(self, message: str, *, path=None, key=None):
        self.path = None if path is None else str(path)
        self.key = key
        self.reason = message
        super().__init__(_located(message, path, key, label="key"))


class FitError(PolkitError, RuntimeError):
    """A fit that cannot proceed (no branch visible, NaN log-probability, degenerate ensemble)."""


class PolkitWarning(UserWarning):
    """Base class of polkit's warnings."""


class DataWarning(PolkitWarning):
    """Something in the input deserves attention but does not stop the analysis."""


class ConvergenceWarning(PolkitWarning):
    """An MCMC run stopped before the convergence gate was passed.

    The result is still written, with ``"converged": false`` in its diagnostics.
    """

"""Reading the small TOML files of polkit: a table of quantities with units and uncertainties.

The density calibration (:func:`polkit.config.calibration.load_calibration`) and the
device description (:func:`polkit.config.device.load_device`) write every physical
quantity as ``{value = ..., error = ... | rel_error = ..., units = "..."}``: ``error`` is
absolute (in the units of ``value``), ``rel_error`` relative, and either becomes the
log-normal width ``sigma_log = error / value`` around the median ``value``.  This module
reads such files and entries and refuses anything else with a
:class:`~polkit.errors.ConfigError` naming the file and the key.  Files are parsed with
:mod:`tomllib`, never evaluated.
"""

from __future__ import annotations

import math
import os
import tomllib
from collections.abc import Iterable, Mapping
from typing import Any

from polkit.errors import ConfigError

__all__ = ["ENTRY_KEYS", "read_table", "refuse_unknown", "require_quantity", "number",
           "quantity"]

#: the keys a quantity entry may have
ENTRY_KEYS = ("value", "error", "rel_error", "units")


def read_table(source: str | os.PathLike | Mapping[str, Any], *,
               what: str) -> tuple[dict[str, Any], str | None]:
    """The top-level table of a TOML file, or a copy of a mapping given instead.

    Parameters
    ----------
    source
        Path of a ``.toml`` file, or a mapping with the same structure.
    what
        What the file is, for messages (``"calibration"``, ``"device"``).

    Returns
    -------
    tuple
        ``(table, path)``; ``path`` is ``None`` for a mapping.

    Raises
    ------
    ConfigError
        A missing or unreadable file, or one that is not valid TOML.
    """
    if isinstance(source, Mapping):
        return dict(source), None
    path = os.fspath(source)
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh), path
    except FileNotFoundError as exc:
        raise ConfigError(f"{what} file not found; check the path", path=path) from exc
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"not valid TOML: {exc}", path=path) from exc
    except UnicodeDecodeError as exc:
        raise ConfigError(f"the {what} file is not UTF-8 text ({exc.reason} at byte "
                          f"{exc.start}); save it as UTF-8", path=path) from exc
    except OSError as exc:
        raise ConfigError(f"cannot read the {what} file: {exc}", path=path) from exc


def refuse_unknown(table: Mapping[str, Any], allowed: Iterable[str], path) -> None:
    """Refuse the first key of ``table`` that is not in ``allowed`` (listing the allowed)."""
    allowed = tuple(allowed)
    for key in table:
        if key not in allowed:
            raise ConfigError(
                f"unknown key; expected one of {', '.join(allowed)}", path=path, key=key
            )


def require_quantity(table: Mapping[str, Any], key: str, units: Mapping[str, float],
                     path) -> None:
    """Refuse a table without the quantity ``key``, showing its form with the first unit."""
    if key not in table:
        raise ConfigError(
            f"missing; expected {key} = {{value = ..., units = \"{next(iter(units))}\"}}",
            path=path,
            key=key,
        )


def number(entry: Mapping[str, Any], name: str, key: str, path) -> float:
    """``entry[name]`` as a finite float (not a bool, not text), else a ConfigError."""
    v = entry[name]
    if isinstance(v, bool) or not isinstance(v, (int, float)):
        raise ConfigError(
            f"expected a number, found {type(v).__name__} {v!r}", path=path, key=f"{key}.{name}"
        )
    v = float(v)
    if not math.isfinite(v):
        raise ConfigError(f"expected a finite number, found {v}", path=path, key=f"{key}.{name}")
    return v


def quantity(
    entry: Any,
    key: str,
    *,
    dim: str,
    units: Mapping[str, float],
    lower: str = "positive",
    upper: float | None = None,
    bounded: str = "an efficiency",
    path=None,
) -> tuple[float, float, str]:
    """Read one ``{value, error | rel_error, units}`` entry, converted to polkit's unit.

    Parameters
    ----------
    entry
        The entry as read from the file.
    key
        Its key (named in every refusal, with the sub-key at fault).
    dim
        Name of its dimension, for messages (``"length"``, ``"energy"``, ...).
    units
        Accepted units and their factor to polkit's unit, which comes first.
    lower
        ``"positive"`` (value > 0) or ``"nonnegative"`` (value >= 0; 0 means "not
        counted" and cannot carry an uncertainty).
    upper
        Largest value allowed (1 for efficiencies and fractions), or ``None``.
    bounded
        What a quantity with ``upper`` is, for the refusal of a larger value.
    path
        The file, for messages.

    Returns
    -------
    tuple
        ``(value, sigma_log, unit)``: the median in polkit's unit, the log-normal width
        (0 when exact) and polkit's unit.

    Raises
    ------
    ConfigError
        A bare number, unknown sub-keys, a missing value or units, units of another
        dimension, a value out of range, both ``error`` and ``rel_error``, a negative
        uncertainty, an uncertainty on a zero value.
    """
    canonical = next(iter(units))
    unit = _entry_unit(entry, key, dim, units, path)
    value = number(entry, "value", key, path)
    _check_range(value, key, lower, upper, bounded, path)
    sigma = _log_width(entry, value, key, path)
    return value * units[unit], sigma, canonical


def _entry_unit(entry: Any, key: str, dim: str, units: Mapping[str, float], path) -> str:
    """The entry's units, after checking it is a table of known sub-keys with value and units."""
    canonical = next(iter(units))
    if not isinstance(entry, Mapping):
        raise ConfigError(
            f"expected a table with value and units, e.g. {key} = {{value = {entry!r}, "
            f'units = "{canonical}"}}, found a bare {type(entry).__name__}',
            path=path,
            key=key,
        )
    for sub in entry:
        if sub not in ENTRY_KEYS:
            raise ConfigError(
                f"unknown key; expected {', '.join(ENTRY_KEYS)}", path=path, key=f"{key}.{sub}"
            )
    if "value" not in entry:
        raise ConfigError("missing value", path=path, key=f"{key}.value")
    if "units" not in entry:
        raise ConfigError(
            f"missing units; expected one of {', '.join(repr(u) for u in units)}, "
            f'e.g. units = "{canonical}"',
            path=path,
            key=f"{key}.units",
        )
    unit = entry["units"]
    if unit not in units:
        raise ConfigError(
            f"expected units of {dim}, one of {', '.join(repr(u) for u in units)}, "
            f"found {unit!r}",
            path=path,
            key=f"{key}.units",
        )
    return unit


def _check_range(value: float, key: str, lower: str, upper: float | None, bounded: str,
                 path) -> None:
    """Refuse a value below ``lower`` (positive / nonnegative) or above ``upper``."""
    if lower == "positive" and value <= 0:
        raise ConfigError(f"expected a value > 0, found {value:g}", path=path, key=f"{key}.value")
    if lower == "nonnegative" and value < 0:
        raise ConfigError(
            f"expected a value >= 0 (0 = not counted), found {value:g}",
            path=path,
            key=f"{key}.value",
        )
    if upper is not None and value > upper:
        raise ConfigError(
            f"{bounded} lies in (0, {upper:g}], found {value:g}; give a fraction, not a "
            "percentage",
            path=path,
            key=f"{key}.value",
        )


def _log_width(entry: Mapping, value: float, key: str, path) -> float:
    """The log-normal width from ``error`` (absolute) or ``rel_error``; 0 when exact."""
    if "error" in entry and "rel_error" in entry:
        raise ConfigError(
            "found both error and rel_error; give one (absolute or relative)",
            path=path,
            key=f"{key}.error",
        )
    sigma = 0.0
    for name in ("error", "rel_error"):
        if name in entry:
            err = number(entry, name, key, path)
            if err < 0:
                raise ConfigError(
                    f"expected an uncertainty >= 0, found {err:g}", path=path, key=f"{key}.{name}"
                )
            if err > 0 and value == 0:
                raise ConfigError(
                    "a zero value cannot carry a log-normal uncertainty; give a positive median "
                    "or drop the error",
                    path=path,
                    key=f"{key}.{name}",
                )
            sigma = (err / value if name == "error" else err) if value > 0 else 0.0
    return sigma

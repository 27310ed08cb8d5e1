"""Reading prior files: TOML tables of priors that replace a parameter space's own.

A prior file holds one table per parameter, in the parameter's units::

    [rabi_splitting]
    prior = "uniform"
    low = 5
    high = 20
    units = "meV"

The tables are checked by :meth:`polkit.inference.Prior.from_dict`.  Text is parsed by
:mod:`tomllib` only; nothing is ever evaluated.
"""

from __future__ import annotations

import os
import tomllib
from collections.abc import Mapping
from pathlib import Path
from typing import Any

from polkit.errors import ConfigError
from polkit.inference.priors import ParameterSpace, Prior

__all__ = ["apply_priors", "read_prior_file"]


def read_prior_file(path: str | os.PathLike) -> dict[str, Any]:
    """The tables of a TOML prior file, ``{name: {prior, numbers, units}}`` (not checked).

    Raises
    ------
    ConfigError
        Naming the file: missing, unreadable or not valid TOML.
    """
    path = Path(path)
    try:
        with open(path, "rb") as fh:
            return tomllib.load(fh)
    except FileNotFoundError:
        raise ConfigError("prior file not found; check the path", path=path) from None
    except OSError as exc:
        raise ConfigError(f"cannot read the prior file: {exc}", path=path) from None
    except (tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
        raise ConfigError(
            f"not valid TOML ({exc}); expected tables like [name] with prior, numbers "
            f"and units",
            path=path,
        ) from None


def apply_priors(
    space: ParameterSpace,
    source: Mapping[str, Any] | str | os.PathLike,
    *,
    path: str | os.PathLike | None = None,
) -> ParameterSpace:
    """Replace priors of ``space`` with those read from a dict or a TOML file.

    A TOML file holds one table per parameter::

        [rabi_splitting]
        prior = "uniform"
        low = 5
        high = 20
        units = "meV"

    Parameters
    ----------
    space
        The parameter space whose priors are replaced (it is not modified).
    source
        A dict ``{name: {...}}`` or the path of a TOML file.
    path
        The file the dict came from, for error messages (taken from ``source`` when
        it is a path).

    Returns
    -------
    ParameterSpace
        A new space; parameters absent from ``source`` keep their priors.

    Raises
    ------
    ConfigError
        Naming the file and key for unknown parameters (listing the known ones),
        unknown keys, missing or mismatched units, impossible values or unknown
        kinds; an unreadable or malformed TOML file.
    """
    if isinstance(source, (str, os.PathLike)):
        source, path = read_prior_file(source), Path(source)
    if not isinstance(source, Mapping):
        raise ConfigError(
            f"expected a dict of {{parameter name: prior table}}, got {type(source).__name__}",
            path=path,
        )
    replaced = {}
    for name, entry in source.items():
        if name not in space:
            raise ConfigError(
                f"unknown parameter {name!r}; known parameters are {space.names}",
                path=path,
                key=name,
            )
        replaced[name] = Prior.from_dict(entry, units=space[name].units, path=path, key=name)
    return space.with_priors(replaced)

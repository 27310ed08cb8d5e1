"""What a result records of the software that made it: the versions of the libraries used."""

from __future__ import annotations

from collections.abc import Iterable
from importlib import metadata

__all__ = ["library_versions"]


def library_versions(names: Iterable[str]) -> dict[str, str]:
    """The installed version of each named library ("not installed" where it is missing)."""
    out = {}
    for name in names:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = "not installed"
    return out

"""Shared outputs name inputs by file name (and SHA-256), never by a machine's absolute path.

Result files travel to collaborators; the folder layout of the machine that made them is
neither useful to them nor theirs to know.  :func:`shareable` rewrites every absolute path
inside a text to its last component (the file name); relative names stay as given.
"""

from __future__ import annotations

import re
from typing import Any

__all__ = ["shareable", "shareable_attrs"]

# an absolute POSIX path with at least one folder (/a/b) or a Windows drive path (C:\a\b),
# not preceded by a word character, a dot or a closing bracket, so units such as "1/um",
# "counts nm/eV" and formulas such as "(a + b)/2" are left alone
_ABSOLUTE = re.compile(
    r"(?<![\w.~)\]}])(?:/|[A-Za-z]:[\\/])(?:[^\s/\\;,()'\"]+[/\\])+([^\s/\\;,()'\"]+)"
)


def shareable(text: str) -> str:
    """``text`` with every absolute path replaced by its file name."""
    return _ABSOLUTE.sub(r"\1", text)


def shareable_attrs(attrs: dict[str, Any]) -> dict[str, Any]:
    """A copy of netCDF-style attributes with absolute paths in text values shortened."""
    return {k: shareable(v) if isinstance(v, str) else v for k, v in attrs.items()}

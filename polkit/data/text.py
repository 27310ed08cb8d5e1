"""Shared helpers of the text readers: decoding, comment metadata, strict numbers.

Comment lines start with ``#``.  A comment may carry metadata as ``key: value`` (or
``key = value``) pairs separated by ``;``, for example::

    # rows: wavelength [nm]; columns: angle [degree]
    # sample: invented demo cavity; temperature: 10; wavelength_medium: air

Numbers are parsed strictly: an optional sign, digits with a decimal point, an
optional exponent, or ``nan``/``inf``.  A decimal comma (``1,5``) is refused with the
row and column named, never read as two numbers or as 15.
"""

from __future__ import annotations

import re

from polkit.errors import DataError

__all__ = [
    "decode_text",
    "split_comments",
    "text_lines",
    "parse_metadata",
    "parse_header_name",
    "parse_number",
    "NUMBER_RE",
    "DECIMAL_COMMA_RE",
]

NUMBER_RE = re.compile(
    r"^[+-]?(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?$|^[+-]?(?:nan|inf|infinity)$", re.I
)
DECIMAL_COMMA_RE = re.compile(r"^[+-]?\d+,\d+(?:[eE][+-]?\d+)?$")
_HEADER_RE = re.compile(r"^\s*([^\[\]]*?)\s*(?:\[\s*([^\[\]]*?)\s*\])?\s*$")
_METADATA_KEY_RE = re.compile(r"^[A-Za-z_][A-Za-z0-9_ \-]*$")


def decode_text(data: bytes, *, path=None) -> str:
    """Decode a text file: UTF-8 (with or without BOM), UTF-16 with BOM, else Latin-1.

    Raises
    ------
    DataError
        For an empty file or one holding NUL bytes (a binary file).
    """
    if not data.strip():
        raise DataError(
            "expected a text table or matrix; found an empty file. Fix: check the export",
            path=path,
            field="file",
        )
    if data.startswith((b"\xff\xfe", b"\xfe\xff")):
        try:
            text = data.decode("utf-16")
        except UnicodeDecodeError as exc:
            raise DataError(
                "expected UTF-16 text after a UTF-16 byte-order mark; found bad bytes "
                f"({exc.reason}). "
                "Fix: re-export the file as UTF-8",
                path=path,
                field="file",
            ) from None
    else:
        try:
            text = data.decode("utf-8-sig")
        except UnicodeDecodeError:
            text = data.decode("latin-1")
    if "\x00" in text:
        raise DataError(
            "expected a text file; found NUL bytes (a binary file). "
            "Fix: pass reader='netcdf' or reader='npz' for binary files",
            path=path,
            field="file",
        )
    return text


def split_comments(text: str) -> tuple[list[str], list[tuple[int, str]]]:
    """Split text into comment bodies and numbered non-blank data lines.

    Returns
    -------
    comments
        The text after ``#`` of every comment line.
    lines
        ``(line_number, line)`` of every other non-blank line, 1-based.
    """
    comments: list[str] = []
    lines: list[tuple[int, str]] = []
    for number, line in enumerate(text.splitlines(), start=1):
        stripped = line.strip()
        if not stripped:
            continue
        if stripped.startswith("#"):
            comments.append(stripped[1:].strip())
        else:
            lines.append((number, line))
    return comments, lines


def text_lines(text: str, *, expected: str, found: str = "only comments",
               path=None) -> tuple[list[str], list[tuple[int, str]]]:
    """:func:`split_comments`, refusing a text without data lines (``expected``/``found``)."""
    comments, lines = split_comments(text)
    if not lines:
        raise DataError(f"expected {expected}; found {found}. Fix: check the export", path=path,
                        field="file")
    return comments, lines


def parse_metadata(comments: list[str]) -> dict[str, str]:
    """Collect ``key: value`` pairs from comment lines (keys lower-cased, spaces to ``_``)."""
    meta: dict[str, str] = {}
    for comment in comments:
        for part in comment.split(";"):
            match = re.match(r"^\s*([^:=]+?)\s*[:=]\s*(.*?)\s*$", part)
            if not match:
                continue
            key, value = match.groups()
            if not _METADATA_KEY_RE.match(key):
                continue
            meta[key.strip().lower().replace(" ", "_").replace("-", "_")] = value
    return meta


def parse_header_name(text: str, *, path=None, field=None) -> tuple[str, str | None]:
    """Split ``"power [mW]"`` into ``("power", "mW")``; units are ``None`` without brackets.

    The name is lower-cased with spaces turned into ``_``.
    """
    match = _HEADER_RE.match(text)
    if not match or not match.group(1):
        raise DataError(
            f"expected a column name with optional units in brackets, like 'power [mW]'; "
            f"found {text!r}. Fix: rewrite the header cell",
            path=path,
            field=field,
        )
    name = re.sub(r"\s+", "_", match.group(1).strip().lower())
    units = match.group(2)
    return name, (units if units else None)


def parse_number(cell: str, *, path=None, line: int | None = None, column=None) -> float:
    """Parse one numeric cell strictly; an empty cell is NaN (a missing value).

    Raises
    ------
    DataError
        Naming the line and column, for decimal commas and anything not a number.
    """
    s = cell.strip()
    if not s:
        return float("nan")
    if NUMBER_RE.match(s):
        return float(s)
    where = f"line {line}, column {column!r}" if line is not None else f"column {column!r}"
    if DECIMAL_COMMA_RE.match(s):
        raise DataError(
            f"expected a number with a decimal point at {where}; found the decimal comma {s!r}. "
            "Fix: export with '.' as decimal separator",
            path=path,
            field=str(column),
        )
    raise DataError(
        f"expected a number at {where}; found {s[:40]!r}. Fix: correct or remove the cell",
        path=path,
        field=str(column),
    )

"""Atomic writes: a temporary file in the target folder, flushed, fsynced, then renamed.

A process killed at any moment leaves either the old file or the new one, never a
truncated one.  A full disk, a file-size limit or a read-only folder raises
:class:`OSError` whose message names the target, says what went wrong and what to do;
the existing file is left untouched and the temporary file is removed.

netCDF files and figures are rendered in memory first and written as bytes, so a
failing disk meets only a plain file write (never a half-open HDF5 handle inside a
library), and the error is the same clear :class:`OSError` for every kind of result.
New files get the permissions an ordinary ``open(..., "w")`` would give them (``0666``
less the umask); a replaced file keeps its permissions.
"""

from __future__ import annotations

import contextlib
import errno as _errno
import io as _io
import json
import os
import re
import stat
import tempfile
from collections.abc import Callable, Iterator
from pathlib import Path
from typing import Any

__all__ = [
    "json_safe",
    "atomic_path",
    "write_bytes",
    "write_text",
    "write_json",
    "write_netcdf",
    "save_figure",
]

_NO_SPACE = {_errno.ENOSPC, _errno.EFBIG, getattr(_errno, "EDQUOT", _errno.ENOSPC)}
_NO_PERMISSION = {_errno.EACCES, _errno.EPERM, _errno.EROFS}
# HDF5 reports failed system calls inside RuntimeError text: "errno = 27, error message = ..."
_HDF5_ERRNO = re.compile(r"errno = (\d+), error message = '([^']*)'")


def _umask() -> int:
    """The process umask, read without changing it where the OS allows."""
    with contextlib.suppress(OSError, ValueError):
        with open("/proc/self/status", encoding="ascii", errors="replace") as fh:
            for line in fh:
                if line.startswith("Umask:"):
                    return int(line.split()[1], 8)
    mask = os.umask(0o022)  # fallback: read by setting and restoring
    os.umask(mask)
    return mask


def _hint(code: int | None) -> str:
    if code in _NO_SPACE:
        return (
            "; the disk is full or a file-size limit was reached: free some space or "
            "write the results to another folder"
        )
    if code in _NO_PERMISSION:
        return "; the folder is read-only for this user: choose another output folder"
    return ""


def _write_error(target: Path, exc: BaseException) -> OSError | None:
    """A clear :class:`OSError` for a failed write of ``target`` (None: ``exc`` is no I/O error)."""
    if isinstance(exc, OSError):
        code, reason = exc.errno, exc.strerror or str(exc)
    elif isinstance(exc, RuntimeError) and (m := _HDF5_ERRNO.search(str(exc))):
        code, reason = int(m.group(1)), m.group(2)
    else:
        return None
    message = f"cannot write {target}: {reason}{_hint(code)}"
    return OSError(code, message) if code is not None else OSError(message)


@contextlib.contextmanager
def atomic_path(target: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; on success fsync it and rename it onto ``target``.

    The caller writes the file at the yielded path by any means (a library's own
    writer, for example).  On any exception the temporary file is removed and the
    target is untouched; I/O errors (including those HDF5 reports as
    :class:`RuntimeError`) are raised as :class:`OSError` naming ``target``.
    """
    target = Path(target)
    folder = target.parent if str(target.parent) else Path(".")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, tmp_name = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=folder)
    except OSError as exc:
        raise _write_error(target, exc) from exc
    tmp = Path(tmp_name)
    try:
        try:
            mode = stat.S_IMODE(os.stat(target).st_mode)
        except OSError:
            mode = 0o666 & ~_umask()
        os.fchmod(fd, mode)
    finally:
        os.close(fd)
    try:
        yield tmp
        with open(tmp, "rb+") as fh:
            fh.flush()
            os.fsync(fh.fileno())
        os.replace(tmp, target)
        with contextlib.suppress(OSError):  # make the rename itself durable where the OS allows
            dfd = os.open(folder, os.O_RDONLY)
            try:
                os.fsync(dfd)
            finally:
                os.close(dfd)
    except BaseException as exc:
        with contextlib.suppress(OSError):
            tmp.unlink()
        clear = _write_error(target, exc)
        if clear is not None and str(target) not in str(exc):
            raise clear from exc
        raise


def _write_with(target, writer: Callable[[Path], None]) -> Path:
    with atomic_path(target) as tmp:
        writer(tmp)
    return Path(target)


def write_bytes(target: str | os.PathLike, data: bytes) -> Path:
    """Write ``data`` to ``target`` atomically.

    Parameters
    ----------
    target
        The file to create or replace.
    data
        Its complete new content.

    Returns
    -------
    pathlib.Path
        ``target``.

    Raises
    ------
    OSError
        Naming ``target`` when the folder cannot be written (full disk, file-size
        limit, read-only folder); ``target`` is then unchanged.
    """
    return _write_with(target, lambda p: p.write_bytes(data))


def write_text(target: str | os.PathLike, text: str) -> Path:
    """Write UTF-8 ``text`` to ``target`` atomically (see :func:`write_bytes`)."""
    return write_bytes(target, text.encode("utf-8"))


def write_json(target: str | os.PathLike, obj: Any) -> Path:
    """Write ``obj`` as indented JSON (NaN and infinities written as null) atomically."""
    return write_text(target, json.dumps(json_safe(obj), indent=2, allow_nan=False) + "\n")


def json_safe(obj: Any) -> Any:
    """``obj`` with NumPy scalars and arrays made plain, and NaN or infinities made ``None``.

    Dicts (keys become text), lists and tuples are converted recursively; anything else
    is returned as it is.  The result can be written with ``json.dumps(...,
    allow_nan=False)``, which is what :func:`write_json` does.
    """
    import math

    import numpy as np

    if isinstance(obj, dict):
        return {str(k): json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [json_safe(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return None if not math.isfinite(v) else v
    return obj


def write_netcdf(target: str | os.PathLike, obj) -> Path:
    """Write an xarray Dataset, DataArray or DataTree to netCDF-4 (h5netcdf engine) atomically.

    The file is built in memory and then written as bytes (see the module notes).
    """
    buf = _io.BytesIO()
    try:
        obj.to_netcdf(buf, engine="h5netcdf")
    except (TypeError, ValueError, NotImplementedError):  # no file-like support in this xarray
        return _write_with(target, lambda p: obj.to_netcdf(p, engine="h5netcdf"))
    return write_bytes(target, buf.getvalue())


def save_figure(target: str | os.PathLike, fig, **kwargs) -> Path:
    """Save a matplotlib figure atomically; the format follows the target's suffix.

    The figure is rendered in memory and then written as bytes (see the module notes).
    """
    fmt = Path(target).suffix.lstrip(".") or "png"
    kwargs.setdefault("dpi", 120)
    kwargs.setdefault("bbox_inches", "tight")
    buf = _io.BytesIO()
    fig.savefig(buf, format=fmt, **kwargs)
    return write_bytes(target, buf.getvalue())

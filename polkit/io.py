"""Atomic writes: a temporary file in the target folder, flushed, fsynced, then renamed.

A process killed at any moment leaves either the old file or the new one, never a
truncated one.  A full disk or a read-only folder raises :class:`OSError` with the
target named, and the existing file is left untouched.
"""

from __future__ import annotations

import contextlib
import json
import os
import tempfile
from pathlib import Path
from typing import Any, Callable

__all__ = ["atomic_path", "write_bytes", "write_text", "write_json", "write_netcdf", "save_figure"]


@contextlib.contextmanager
def atomic_path(target: str | os.PathLike):
    """Yield a temporary path beside ``target``; on success fsync it and rename it onto ``target``.

    The caller writes the file at the yielded path by any means (a library's own
    writer, for example).  On any exception the temporary file is removed and the
    target is untouched.
    """
    target = Path(target)
    folder = target.parent if str(target.parent) else Path(".")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        fd, tmp = tempfile.mkstemp(prefix=f".{target.name}.", suffix=".part", dir=folder)
    except OSError as exc:
        raise OSError(exc.errno, f"cannot write {target}: {exc.strerror or exc}") from exc
    os.close(fd)
    tmp = Path(tmp)
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
        if isinstance(exc, OSError) and not str(target) in str(exc):
            raise OSError(exc.errno, f"cannot write {target}: {exc.strerror or exc}") from exc
        raise


def _write_with(target, writer: Callable[[Path], None]) -> Path:
    with atomic_path(target) as tmp:
        writer(tmp)
    return Path(target)


def write_bytes(target, data: bytes) -> Path:
    """Write ``data`` to ``target`` atomically."""
    return _write_with(target, lambda p: p.write_bytes(data))


def write_text(target, text: str) -> Path:
    """Write UTF-8 ``text`` to ``target`` atomically."""
    return write_bytes(target, text.encode("utf-8"))


def write_json(target, obj: Any) -> Path:
    """Write ``obj`` as indented JSON (NaN written as null) atomically."""
    return write_text(target, json.dumps(_json_safe(obj), indent=2, allow_nan=False) + "\n")


def _json_safe(obj):
    import math

    import numpy as np

    if isinstance(obj, dict):
        return {str(k): _json_safe(v) for k, v in obj.items()}
    if isinstance(obj, (list, tuple)):
        return [_json_safe(v) for v in obj]
    if isinstance(obj, np.ndarray):
        return [_json_safe(v) for v in obj.tolist()]
    if isinstance(obj, (np.bool_,)):
        return bool(obj)
    if isinstance(obj, np.integer):
        return int(obj)
    if isinstance(obj, (float, np.floating)):
        v = float(obj)
        return None if not math.isfinite(v) else v
    return obj


def write_netcdf(target, obj) -> Path:
    """Write an xarray Dataset, DataArray or DataTree to netCDF-4 (h5netcdf engine) atomically."""
    return _write_with(target, lambda p: obj.to_netcdf(p, engine="h5netcdf"))


def save_figure(target, fig, **kwargs) -> Path:
    """Save a matplotlib figure atomically; the format follows the target's suffix."""
    fmt = Path(target).suffix.lstrip(".") or "png"
    kwargs.setdefault("dpi", 120)
    kwargs.setdefault("bbox_inches", "tight")
    return _write_with(target, lambda p: fig.savefig(p, format=fmt, **kwargs))

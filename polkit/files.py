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

The temporary file is named ``.<target name>.<host>-<pid>.<random>.part``.  A writer
killed outright (SIGKILL, power cut) leaves it behind; the next write of the same
target removes such leftovers when it can tell their writer is gone: made on this host
by a process that no longer exists, or made on another host and untouched for
:data:`STALE_AGE_S` seconds.  Temporary files of other targets or of running writers,
and files of any other name, are never touched.

Files written in place by a library (the HDF5 checkpoint of a run) can ask
:func:`check_room` before a large write whether it will fit, and turn the library's
I/O failures into the same clear error with :func:`write_error`.
"""

from __future__ import annotations

import contextlib
import errno as _errno
import hashlib
import io as _io
import json
import logging
import os
import re
import shutil
import socket
import stat
import tempfile
import time
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
    "write_error",
    "check_room",
    "STALE_AGE_S",
]

log = logging.getLogger(__name__)

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


def _existing_folder(target: Path) -> Path:
    """The folder of ``target``, or its nearest ancestor that exists."""
    folder = target.parent if str(target.parent) else Path(".")
    while not folder.exists() and folder != folder.parent:
        folder = folder.parent
    return folder


def _hint(code: int | None, target: Path) -> str:
    if code in _NO_SPACE:
        return (
            "; the disk is full or a file-size limit was reached: free some space or "
            "write the results to another folder"
        )
    if code in _NO_PERMISSION:
        folder = _existing_folder(target)
        return (
            f"; the folder {folder} is read-only for this user: choose another output "
            "folder or make this one writable"
        )
    return ""


def _clear_oserror(code: int | None, message: str) -> OSError:
    """An OSError (the subclass ``code`` selects, e.g. PermissionError) whose text is
    ``message`` alone, without the ``[Errno N]`` prefix; ``errno`` is still set."""
    cls = type(OSError(code, "")) if code is not None else OSError
    exc = cls(message)
    exc.errno = code
    return exc


def write_error(target: str | os.PathLike, exc: BaseException, *,
                note: str | None = None) -> OSError | None:
    """A clear :class:`OSError` for a failed write of ``target``.

    Parameters
    ----------
    target
        The file that was being written.
    exc
        What the write raised: an :class:`OSError`, or a :class:`RuntimeError` in which
        HDF5 reports the failed system call (``errno = 28, error message = ...``).
    note
        A last clause for the message (for example how to continue afterwards).

    Returns
    -------
    OSError or None
        ``cannot write TARGET: REASON; WHAT WENT WRONG: FIX[; NOTE]`` with ``errno`` set
        (a :class:`PermissionError` for a read-only folder), or ``None`` when ``exc`` is
        no I/O error.
    """
    target = Path(target)
    found = _HDF5_ERRNO.search(str(exc)) if isinstance(exc, (OSError, RuntimeError)) else None
    if found:  # HDF5 wraps the system call's error in its own text: keep the useful part
        code, reason = int(found.group(1)), found.group(2)
    elif isinstance(exc, OSError):
        code, reason = exc.errno, exc.strerror or str(exc)
    else:
        return None
    message = f"cannot write {target}: {reason}{_hint(code, target)}"
    if note:
        message += f"; {note}"
    return _clear_oserror(code, message)


def _size(n_bytes: float) -> str:
    for unit, scale in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if abs(n_bytes) >= scale:
            return f"{n_bytes / scale:.1f} {unit}"
    return f"{int(n_bytes)} byte" + ("" if int(n_bytes) == 1 else "s")


def _file_size_limit() -> int | None:
    """The soft RLIMIT_FSIZE in bytes, or None (no limit, or no such limit on this OS)."""
    try:
        import resource
    except ImportError:  # not on this platform
        return None
    soft, _ = resource.getrlimit(resource.RLIMIT_FSIZE)
    return None if soft == resource.RLIM_INFINITY or soft < 0 else int(soft)


def check_room(target: str | os.PathLike, n_bytes: int, *, purpose: str = "the next write",
               fix: str | None = None) -> None:
    """Raise a clear :class:`OSError` unless ``n_bytes`` more can be written to ``target``.

    Two limits are checked: the space free for this user on the target's file system
    (:func:`shutil.disk_usage`) and, where the platform has one, the process's file-size
    limit (``RLIMIT_FSIZE``, ``ulimit -f``) against the target's current size plus
    ``n_bytes``.  Meant for files a library writes in place, before it is asked to write
    what cannot fit.

    Parameters
    ----------
    target
        The file that will grow (it may not exist yet).
    n_bytes
        The bytes the write needs, margin included.
    purpose
        What needs them, for the message (``"the next 100 MCMC steps"``).
    fix
        What the user should do, for the message; by default free some space (or raise
        the limit) or write to another folder.

    Raises
    ------
    OSError
        ``errno`` ENOSPC (not enough free space) or EFBIG (file-size limit), with a
        message naming ``target``, both sizes and the fix; nothing is written.
    """
    target = Path(target)
    folder = _existing_folder(target)
    n_bytes = int(n_bytes)
    problem = None
    try:
        free = shutil.disk_usage(folder).free
    except OSError:  # cannot tell: let the write itself report
        free = None
    if free is not None and free < n_bytes:
        problem = (_errno.ENOSPC, f"about {_size(n_bytes)} needed for {purpose}, only "
                   f"{_size(free)} free on its file system")
    limit = _file_size_limit()
    if problem is None and limit is not None:
        try:
            current = target.stat().st_size
        except OSError:
            current = 0
        if current + n_bytes > limit:
            problem = (_errno.EFBIG, f"about {_size(n_bytes)} needed for {purpose}, only "
                       f"{_size(max(0, limit - current))} left under this process's "
                       f"file-size limit of {_size(limit)}, ulimit -f")
    if problem is None:
        return
    code, detail = problem
    if fix is None:
        fix = ("free some space or write to another folder" if code == _errno.ENOSPC else
               "raise the limit or write to another folder")
    raise _clear_oserror(code, f"cannot write {target}: {os.strerror(code)} ({detail}): {fix}")


#: seconds after which a leftover temporary file of another host's writer counts as stale
STALE_AGE_S = 24 * 3600.0
_RANDOM_PART = re.compile(r"[a-z0-9_]{8}")  # what tempfile.mkstemp puts between prefix/suffix


def _host_tag() -> str:
    """This host's name reduced to letters, digits and '-' (it sits inside file names)."""
    return re.sub(r"[^A-Za-z0-9-]", "-", socket.gethostname())[:32] or "host"


def _temp_owner(name: str, target_name: str) -> tuple[str, int] | None:
    """(host, pid) of a temporary file name made for ``target_name``, or None if not one.

    Parsed from the right: ``.<target>.<host>-<pid>.<random>.part`` where neither host nor
    random part holds a dot, so a file belongs to exactly one target name.
    """
    if not name.endswith(".part"):
        return None
    head, _, random_part = name[: -len(".part")].rpartition(".")
    head, _, owner = head.rpartition(".")
    host, _, pid = owner.rpartition("-")
    if head != "." + target_name or not _RANDOM_PART.fullmatch(random_part):
        return None
    if not pid.isdigit() or not re.fullmatch(r"[A-Za-z0-9-]+", host):
        return None
    return host, int(pid)


def _process_exists(pid: int) -> bool:
    if os.name != "posix":  # no harmless probe elsewhere: trust the age rule only
        return True
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except OSError:  # e.g. another user's process
        return True
    return True


def _remove_stale_temporaries(folder: Path, target_name: str) -> None:
    """Remove temporary files of ``target_name`` left by writers that are provably gone."""
    host, me, now = _host_tag(), os.getpid(), time.time()
    prefix = f".{target_name}."
    try:
        with os.scandir(folder) as it:
            entries = [e for e in it if e.name.startswith(prefix)]
    except OSError:
        return
    for entry in entries:
        owner = _temp_owner(entry.name, target_name)
        if owner is None:
            continue
        try:
            info = entry.stat(follow_symlinks=False)
        except OSError:
            continue
        if not stat.S_ISREG(info.st_mode):
            continue
        if owner[0] == host:  # a writer on this host: stale once its process is gone
            stale = owner[1] != me and not _process_exists(owner[1])
        else:  # another host's writer cannot be asked: stale only when long untouched
            stale = now - info.st_mtime > STALE_AGE_S
        if stale:
            try:
                os.unlink(entry.path)
            except OSError:
                continue
            log.info("removed %s, left by an interrupted write", entry.path)


@contextlib.contextmanager
def atomic_path(target: str | os.PathLike) -> Iterator[Path]:
    """Yield a temporary path beside ``target``; on success fsync it and rename it onto ``target``.

    The caller writes the file at the yielded path by any means (a library's own
    writer, for example).  On any exception the temporary file is removed and the
    target is untouched; I/O errors (including those HDF5 reports as
    :class:`RuntimeError`) are raised as :class:`OSError` naming ``target``.  Temporary
    files of ``target`` left by killed writers are removed first (see the module notes).
    """
    target = Path(target)
    folder = target.parent if str(target.parent) else Path(".")
    try:
        folder.mkdir(parents=True, exist_ok=True)
        _remove_stale_temporaries(folder, target.name)
        fd, tmp_name = tempfile.mkstemp(
            prefix=f".{target.name}.{_host_tag()}-{os.getpid()}.", suffix=".part", dir=folder
        )
    except OSError as exc:
        raise write_error(target, exc) from exc
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
        clear = write_error(target, exc)
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


def file_sha256(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file (provenance of every result)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()

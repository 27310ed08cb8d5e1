"""One writer per output folder: a lock file held for the whole run.

A job that writes into an output folder (a fit, its checkpoint, its results and figures)
first creates ``polkit.lock`` in that folder and removes it when it ends, however it ends
short of being killed.  The lock file is JSON: host, PID, start time (UTC), the command
line and, on Linux, the boot id and the process start time (so a PID reused after a
reboot or by another program is not mistaken for the run).

Rules
-----
* Taking the lock is atomic: the content is written to a private temporary file that is
  then hard-linked to ``polkit.lock`` (``link`` fails when the name exists, also on NFS);
  on a file system without hard links, ``open(O_CREAT | O_EXCL)`` is used instead.
* A lock of a run on the same host whose process is gone (killed, crashed) is stale: the
  next run takes it over and logs that it did.
* A lock from another host is never broken automatically: polkit cannot see processes
  on another machine.  The refusal names the host, the PID and the start time and says
  how to check; only the user, who can look on that host, may remove the lock file.
* HDF5's own file locking is not relied upon (it is often switched off on NFS and Lustre
  with ``HDF5_USE_FILE_LOCKING=FALSE``).
* The lock is re-entrant within one thread (a job that calls another job on the same
  folder holds it once); another thread of the same process is refused like another run.
"""

from __future__ import annotations

import contextlib
import errno
import json
import logging
import os
import socket
import sys
import threading
import time
from datetime import UTC, datetime
from pathlib import Path

from polkit.errors import DataError

__all__ = ["LOCK_FILE", "FolderLockedError", "folder_lock", "read_lock"]

log = logging.getLogger(__name__)

#: name of the lock file inside an output folder
LOCK_FILE = "polkit.lock"

_held: dict[str, list] = {}  # real folder path -> [thread ident, depth, lock content]
_held_guard = threading.Lock()


class FolderLockedError(DataError):
    """Another run is writing into this output folder."""


def _boot_id() -> str | None:
    try:
        return Path("/proc/sys/kernel/random/boot_id").read_text().strip()
    except OSError:
        return None


def _process_start(pid: int) -> str | None:
    """The start time of ``pid`` in clock ticks since boot (Linux), or None."""
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return None
    # the command name (field 2) may hold spaces and parentheses: split after its end
    fields = stat[stat.rfind(")") + 2:].split()
    return fields[19] if len(fields) > 19 else None


def _my_content() -> dict:
    pid = os.getpid()
    return {
        "host": socket.gethostname(),
        "pid": pid,
        "started": datetime.now(UTC).isoformat(timespec="seconds"),
        "command": " ".join([os.path.basename(sys.argv[0] or "python"), *sys.argv[1:]])[:500],
        "boot_id": _boot_id(),
        "process_start": _process_start(pid),
        "thread": threading.get_ident(),
    }


def read_lock(folder: str | os.PathLike) -> dict | None:
    """The content of ``folder/polkit.lock`` (None when there is none)."""
    path = Path(folder) / LOCK_FILE
    try:
        text = path.read_text()
    except FileNotFoundError:
        return None
    try:
        found = json.loads(text)
        return found if isinstance(found, dict) else {"unreadable": text[:200]}
    except json.JSONDecodeError:
        return {"unreadable": text[:200]}


def _alive(info: dict) -> bool | None:
    """True / False for a run on this host; None when polkit cannot tell (another host)."""
    if info.get("host") != socket.gethostname():
        return None
    boot = _boot_id()
    if boot is not None and info.get("boot_id") not in (None, boot):
        return False  # written before this machine restarted
    try:
        pid = int(info.get("pid"))
    except (TypeError, ValueError):
        return None
    if pid <= 0:
        return None
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        pass  # alive, another user's
    start = info.get("process_start")
    now = _process_start(pid)
    if start is not None and now is not None and start != now:
        return False  # the PID was reused by another process
    return True


def _describe(info: dict) -> str:
    if "unreadable" in info:
        return "a run whose lock file cannot be read"
    return (f"the run with PID {info.get('pid')} on host {info.get('host')!r}, started "
            f"{info.get('started')} ({info.get('command', '?')})")


def _refusal(folder: Path, info: dict, alive: bool | None) -> FolderLockedError:
    lock = folder / LOCK_FILE
    if alive:
        fix = ("wait for it to finish, or write this run to another folder (--out on the "
               "command line)")
        return FolderLockedError(
            f"another polkit run is writing into this folder: {_describe(info)}; {fix}",
            path=folder, field=LOCK_FILE)
    fix = (f"polkit cannot check processes on another host: if you are sure that run has "
           f"ended (look for PID {info.get('pid')} on {info.get('host')!r}), remove the lock "
           f"file {lock} itself and nothing else; otherwise write this run to another "
           "folder (--out on the command line)")
    if "unreadable" in info:
        fix = ("if no polkit run is writing into this folder, remove the lock file "
               f"{lock} itself and nothing else; otherwise write this run to another folder "
               "(--out on the command line)")
    return FolderLockedError(
        f"this folder is locked by {_describe(info)}, which may still be running; {fix}",
        path=folder, field=LOCK_FILE)


def _create(lock: Path, content: dict) -> bool:
    """Create the lock file with ``content`` atomically; False when it exists already."""
    text = json.dumps(content, indent=1) + "\n"
    tmp = lock.with_name(f".{LOCK_FILE}.{content['pid']}.{threading.get_ident()}.tmp")
    with open(tmp, "w") as fh:
        fh.write(text)
        fh.flush()
        os.fsync(fh.fileno())
    try:
        os.link(tmp, lock)
        return True
    except FileExistsError:
        return False
    except OSError as exc:
        if exc.errno not in (errno.EPERM, errno.ENOTSUP, errno.EOPNOTSUPP, errno.EXDEV,
                             errno.EMLINK):
            raise
        # no hard links here: exclusive create, then the content
        try:
            fd = os.open(lock, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
        except FileExistsError:
            return False
        with os.fdopen(fd, "w") as fh:
            fh.write(text)
            fh.flush()
            os.fsync(fh.fileno())
        return True
    finally:
        with contextlib.suppress(OSError):
            tmp.unlink()


def _break_stale(folder: Path, stale: dict) -> None:
    """Remove a stale lock, unless another run replaced it meanwhile.

    A second file taken with ``O_EXCL`` makes the check-and-remove one step among runs
    that find the same stale lock at once; such a file older than a minute is itself left
    over from a killed run and is removed.
    """
    breaker = folder / f"{LOCK_FILE}.takeover"
    try:
        fd = os.open(breaker, os.O_CREAT | os.O_EXCL | os.O_WRONLY, 0o644)
    except FileExistsError:
        with contextlib.suppress(OSError):
            if time.time() - breaker.stat().st_mtime > 60.0:
                breaker.unlink()
        return
    try:
        os.close(fd)
        if read_lock(folder) == stale:
            (folder / LOCK_FILE).unlink(missing_ok=True)
            log.warning("took over the lock of %s: %s is no longer running", folder,
                        _describe(stale))
    finally:
        with contextlib.suppress(OSError):
            breaker.unlink()


def acquire(folder: str | os.PathLike) -> dict:
    """Take the lock of ``folder`` (created if missing); returns the lock's content.

    Raises
    ------
    FolderLockedError
        Another run holds the lock (a :class:`~polkit.errors.DataError`: exit 2 on the
        command line), naming it and the fix.
    """
    folder = Path(folder)
    folder.mkdir(parents=True, exist_ok=True)
    key = os.path.realpath(folder)
    me = threading.get_ident()
    with _held_guard:
        held = _held.get(key)
        if held is not None and held[0] == me:
            held[1] += 1
            return held[2]
    content = _my_content()
    lock = folder / LOCK_FILE
    for _ in range(20):
        if _create(lock, content):
            with _held_guard:
                _held[key] = [me, 1, content]
            return content
        info = read_lock(folder)
        if info is None:
            continue  # removed meanwhile: try again
        alive = _alive(info) if "unreadable" not in info else None
        if info.get("pid") == os.getpid() and info.get("host") == socket.gethostname() \
                and info.get("boot_id") == content["boot_id"]:
            alive = True  # this process, another thread
        if alive is False:
            _break_stale(folder, info)
            continue
        if "unreadable" in info:
            # being written by a run without hard links, or damaged: wait briefly once
            time.sleep(0.2)
            if read_lock(folder) != info:
                continue
        raise _refusal(folder, info, alive)
    raise _refusal(folder, read_lock(folder) or {"unreadable": ""}, None)


def release(folder: str | os.PathLike) -> None:
    """Give back the lock of ``folder`` taken by :func:`acquire` in this thread."""
    folder = Path(folder)
    key = os.path.realpath(folder)
    with _held_guard:
        held = _held.get(key)
        if held is None or held[0] != threading.get_ident():
            return
        held[1] -= 1
        if held[1] > 0:
            return
        del _held[key]
        content = held[2]
    if read_lock(folder) == content:  # never remove a lock that is not ours
        with contextlib.suppress(FileNotFoundError):
            (folder / LOCK_FILE).unlink()


@contextlib.contextmanager
def folder_lock(folder: str | os.PathLike | None):
    """Hold the lock of ``folder`` for the ``with`` block (nothing when ``folder`` is None)."""
    if folder is None:
        yield None
        return
    content = acquire(folder)
    try:
        yield content
    finally:
        release(folder)

"""A second process that draws a fit's corner plot while this one draws the other figures.

The corner plot is the slowest of a fit's figures (about 2 s for seven parameters on a
2-core machine, nearly all of it matplotlib's per-axes work).  The ``polkit`` command
starts this process when a fit begins, so that it imports matplotlib and corner on the
otherwise idle second core while the fit samples; when the fit is done, the corner plot
is drawn there while the main process draws and writes the other figures.

Nothing depends on it: where it cannot be started (one usable core, a platform that
cannot pass it a pipe), where it fails, or where its drawing raises, the caller draws the
corner plot itself, which also reports any real error (a full disk, say) the usual way.
The process ends with the command: it stops when its input closes, also on Ctrl-C (it
ignores SIGINT and the parent stops it).
"""

from __future__ import annotations

import json
import logging
import os
import signal
import subprocess
import sys
from collections.abc import Sequence
from pathlib import Path

import numpy as np

__all__ = ["CornerProcess"]

log = logging.getLogger(__name__)

#: seconds to wait for the process to end after it was asked to
_JOIN_S = 5.0


def _usable_cores() -> int:
    try:
        return len(os.sched_getaffinity(0))
    except (AttributeError, OSError):
        return os.cpu_count() or 1


def _send(stream, header: dict | None, data: np.ndarray | None = None) -> None:
    """One message: a JSON line, then the raw little-endian float64 values of ``data``.

    Plain data only (no pickles): the other side never runs code it reads.
    """
    if data is not None:
        data = np.ascontiguousarray(data, dtype="<f8")
        header = {**header, "shape": list(data.shape)}
    stream.write(json.dumps(header).encode() + b"\n")
    if data is not None:
        stream.write(data.tobytes())
    stream.flush()


def _receive(stream) -> tuple[dict | None, np.ndarray | None]:
    """The next message of :func:`_send`; raises EOFError at the end of the stream."""
    line = stream.readline()
    if not line:
        raise EOFError("the other process closed the pipe")
    header = json.loads(line)
    if header is None or "shape" not in header:
        return header, None
    shape = tuple(int(n) for n in header["shape"])
    n_bytes = 8 * int(np.prod(shape))
    payload = stream.read(n_bytes)
    if len(payload) != n_bytes:
        raise EOFError("the other process closed the pipe within a message")
    return header, np.frombuffer(payload, dtype="<f8").reshape(shape)


def _serve(requests, replies) -> None:
    """The process's loop: corner-plot requests until ``null`` or the end of the input.

    ``requests`` and ``replies`` are binary streams (the parent's pipes) carrying
    :func:`_send` messages.
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    try:
        from polkit import files
        from polkit._arviz import arviz
        from polkit.plotting import base as _mpl

        plt = _mpl.pyplot()
        arviz()
        import corner  # noqa: F401 - warmed up here, used by _mpl.corner_figure
    except Exception as exc:  # noqa: BLE001 - the parent draws the plot itself
        failure = f"cannot start drawing: {type(exc).__name__}: {exc}"
    else:
        failure = None
    while True:
        try:
            header, data = _receive(requests)
        except (EOFError, OSError, ValueError):
            return
        if header is None:
            return
        if failure is not None:
            _send(replies, {"status": "error", "value": failure})
            continue
        path = header["path"]
        try:
            fig = _mpl.corner_figure(data, header["labels"])
            try:
                files.save_figure(path, fig)
            finally:
                plt.close(fig)
            _send(replies, {"status": "ok", "value": path})
        except Exception as exc:  # noqa: BLE001 - reported to the parent, which redraws
            _send(replies, {"status": "error", "value": f"{type(exc).__name__}: {exc}"})


class CornerProcess:
    """A warmed-up process that draws one corner plot at a time (see the module notes).

    Use :meth:`start` (``None`` where no second core is available), :meth:`submit`,
    :meth:`result` and :meth:`close` (or ``with``).  The process is a fresh interpreter
    running this module (``python -m polkit.plotting.corner_process``), so it never re-runs the
    caller's own script; it reads requests (JSON and raw numbers, no pickles) on its
    standard input and answers on a pipe of its own.
    """

    def __init__(self) -> None:
        read_fd, write_fd = os.pipe()
        try:
            self._proc = subprocess.Popen(
                [sys.executable, "-m", "polkit.plotting.corner_process", str(write_fd)],
                stdin=subprocess.PIPE, stdout=subprocess.DEVNULL, pass_fds=(write_fd,),
                close_fds=True)
        except BaseException:
            os.close(read_fd)
            raise
        finally:
            os.close(write_fd)
        self._replies = os.fdopen(read_fd, "rb")
        self._pending: str | None = None
        self._used = False

    @classmethod
    def start(cls) -> CornerProcess | None:
        """A new process, or ``None`` on one usable core or where it cannot be started."""
        if _usable_cores() < 2:
            return None
        try:
            return cls()
        except (OSError, ValueError, subprocess.SubprocessError) as exc:
            log.info("corner plot drawn in the main process (no second process: %s)", exc)
            return None

    def alive(self) -> bool:
        """Whether the process is still running."""
        return self._proc.poll() is None

    def submit(self, path: str | os.PathLike, data: np.ndarray, labels: Sequence[str]) -> bool:
        """Ask for the corner plot of ``data`` (draws x parameters) written to ``path``.

        Returns False when the process cannot take it (then draw it here).
        """
        if self._pending is not None or not self.alive():
            return False
        try:
            _send(self._proc.stdin, {"path": os.fspath(path), "labels": [str(v) for v in labels]},
                  np.asarray(data, dtype=float))
        except (OSError, ValueError) as exc:
            log.info("corner plot process unavailable (%s)", exc)
            return False
        self._pending = os.fspath(path)
        self._used = True
        return True

    def result(self) -> Path | None:
        """Wait for the submitted plot: its path, or ``None`` if it was not drawn there."""
        if self._pending is None:
            return None
        self._pending = None
        try:
            reply, _ = _receive(self._replies)
            status, value = reply["status"], reply["value"]
        except (EOFError, OSError, ValueError, KeyError, TypeError) as exc:
            log.info("corner plot process ended early (%s); drawing it here", exc)
            return None
        if status != "ok":
            log.info("corner plot process could not draw the plot (%s); drawing it here", value)
            return None
        return Path(value)

    def close(self) -> None:
        """Ask the process to end (stop it at once if it was never used)."""
        if not self._used:  # e.g. the fit failed: no need to wait for its imports
            self._proc.terminate()
        try:
            _send(self._proc.stdin, None)
            self._proc.stdin.close()
        except (OSError, ValueError):
            pass
        try:
            self._proc.wait(_JOIN_S)
        except subprocess.TimeoutExpired:
            self._proc.kill()
            self._proc.wait(_JOIN_S)
        self._replies.close()

    def __enter__(self) -> CornerProcess:
        return self

    def __exit__(self, *exc) -> None:
        self.close()


if __name__ == "__main__":  # the process itself (see CornerProcess)
    with os.fdopen(int(sys.argv[1]), "wb") as _replies:
        _serve(sys.stdin.buffer, _replies)

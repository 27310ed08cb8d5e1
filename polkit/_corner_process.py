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

import logging
import os
import pickle
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


def _serve(requests, replies) -> None:
    """The process's loop: ``("corner", path, data, labels)`` requests until ``None``.

    ``requests`` and ``replies`` are binary streams carrying pickles (the parent's pipes).
    """
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle

    def reply(message) -> None:
        pickle.dump(message, replies, protocol=pickle.HIGHEST_PROTOCOL)
        replies.flush()

    try:
        from . import _mpl, io
        from ._arviz import arviz

        plt = _mpl.pyplot()
        arviz()
        import corner  # noqa: F401 - warmed up here, used by _mpl.corner_figure
    except Exception as exc:  # noqa: BLE001 - the parent draws the plot itself
        failure = f"cannot start drawing: {type(exc).__name__}: {exc}"
    else:
        failure = None
    while True:
        try:
            message = pickle.load(requests)
        except (EOFError, OSError, pickle.UnpicklingError):
            return
        if message is None:
            return
        if failure is not None:
            reply(("error", failure))
            continue
        _, path, data, labels = message
        try:
            fig = _mpl.corner_figure(data, labels)
            try:
                io.save_figure(path, fig)
            finally:
                plt.close(fig)
            reply(("ok", path))
        except Exception as exc:  # noqa: BLE001 - reported to the parent, which redraws
            reply(("error", f"{type(exc).__name__}: {exc}"))


class CornerProcess:
    """A warmed-up process that draws one corner plot at a time (see the module notes).

    Use :meth:`start` (``None`` where no second core is available), :meth:`submit`,
    :meth:`result` and :meth:`close` (or ``with``).  The process is a fresh interpreter
    running this module (``python -m polkit._corner_process``), so it never re-runs the
    caller's own script; it reads pickled requests on its standard input and answers on
    a pipe of its own.
    """

    def __init__(self) -> None:
        read_fd, write_fd = os.pipe()
        try:
            self._proc = subprocess.Popen(
                [sys.executable, "-m", "polkit._corner_process", str(write_fd)],
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
        message = ("corner", os.fspath(path), np.asarray(data, dtype=float), list(labels))
        try:
            pickle.dump(message, self._proc.stdin, protocol=pickle.HIGHEST_PROTOCOL)
            self._proc.stdin.flush()
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
            status, value = pickle.load(self._replies)
        except (EOFError, OSError, pickle.UnpicklingError, ValueError) as exc:
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
            pickle.dump(None, self._proc.stdin)
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

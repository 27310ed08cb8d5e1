"""A second process that draws a fit's corner plot while this one draws the other figures.

The corner plot is the slowest of a fit's figures (about 2 s for seven parameters on a
2-core machine, nearly all of it matplotlib's per-axes work).  The ``polkit`` command
starts this process when a fit begins, so that it imports matplotlib and corner on the
otherwise idle second core while the fit samples; when the fit is done, the corner plot
is drawn there while the main process draws and writes the other figures.

Nothing depends on it: where it cannot be started (one usable core, a platform without
``spawn``), where it fails, or where its drawing raises, the caller draws the corner plot
itself, which also reports any real error (a full disk, say) the usual way.  The process
is a daemon: it ends with the command, also on Ctrl-C (it ignores SIGINT and is stopped by
the parent).
"""

from __future__ import annotations

import logging
import multiprocessing
import os
import signal
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


def _serve(conn) -> None:
    """The process's loop: ``("corner", path, data, labels)`` requests until ``None``."""
    signal.signal(signal.SIGINT, signal.SIG_IGN)  # Ctrl-C is the parent's to handle
    try:
        from . import _mpl, io
        from ._arviz import arviz

        plt = _mpl.pyplot()
        arviz()
        import corner  # noqa: F401 - warmed up here, used by _mpl.corner_figure
    except Exception as exc:  # noqa: BLE001 - the parent draws the plot itself
        conn.send(("error", f"cannot start drawing: {type(exc).__name__}: {exc}"))
        return
    while True:
        try:
            message = conn.recv()
        except (EOFError, OSError):
            return
        if message is None:
            return
        _, path, data, labels = message
        try:
            fig = _mpl.corner_figure(data, labels)
            try:
                io.save_figure(path, fig)
            finally:
                plt.close(fig)
            conn.send(("ok", path))
        except Exception as exc:  # noqa: BLE001 - reported to the parent, which redraws
            conn.send(("error", f"{type(exc).__name__}: {exc}"))


class CornerProcess:
    """A warmed-up process that draws one corner plot at a time (see the module notes).

    Use :meth:`start` (``None`` where no second core is available), :meth:`submit`,
    :meth:`result` and :meth:`close` (or ``with``).
    """

    def __init__(self) -> None:
        ctx = multiprocessing.get_context("spawn")
        self._conn, child = ctx.Pipe()
        self._proc = ctx.Process(target=_serve, args=(child,), daemon=True,
                                 name="polkit-corner-plot")
        self._proc.start()
        child.close()
        self._pending: str | None = None
        self._used = False

    @classmethod
    def start(cls) -> CornerProcess | None:
        """A new process, or ``None`` on one usable core or where it cannot be started."""
        if _usable_cores() < 2:
            return None
        try:
            return cls()
        except (OSError, ValueError, RuntimeError) as exc:
            log.info("corner plot drawn in the main process (no second process: %s)", exc)
            return None

    def submit(self, path: str | os.PathLike, data: np.ndarray, labels: Sequence[str]) -> bool:
        """Ask for the corner plot of ``data`` (draws x parameters) written to ``path``.

        Returns False when the process cannot take it (then draw it here).
        """
        if self._pending is not None or not self._proc.is_alive():
            return False
        try:
            self._conn.send(("corner", os.fspath(path), np.asarray(data, dtype=float),
                             list(labels)))
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
            status, value = self._conn.recv()
        except (EOFError, OSError) as exc:
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
            self._conn.send(None)
        except (OSError, ValueError):
            pass
        self._proc.join(_JOIN_S)
        if self._proc.is_alive():
            self._proc.terminate()
            self._proc.join(_JOIN_S)
        self._conn.close()

    def __enter__(self) -> CornerProcess:
        return self

    def __exit__(self, *exc) -> None:
        self.close()

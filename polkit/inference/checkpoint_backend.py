"""emcee's HDF5 backend, held open while sampling: the step writes of the checkpoint.

emcee's :class:`~emcee.backends.HDFBackend` reopens the file several times per step.
polkit's backend holds the file open during a stretch of sampling, keeps the finished
steps of the last second in memory and writes them in one batch through HDF5's low-level
calls (:class:`RowWriter`, :class:`WholeWriter`, :class:`AttrWriter`), then flushes the
file: at most once every :data:`FLUSH_SECONDS`, and always at the end of a stretch, when
sampling stops on request, on an interrupt or an error.  The layout stays emcee's (the
chain can be read back with emcee's own backend); the chunks of the per-step datasets
hold every walker of a run of steps (:func:`step_chunks`).

The file itself (its creation, checks on resume and room on disk) is
:mod:`polkit.inference.checkpoint`'s.
"""

from __future__ import annotations

import contextlib
import functools
import logging
import os
import time

import numpy as np

__all__ = ["FLUSH_SECONDS", "make_backend", "step_chunks"]

log = logging.getLogger(__name__)

#: the longest time finished steps wait in memory before they are written and flushed
FLUSH_SECONDS = 1.0
#: target size of one chunk of a per-step dataset of the checkpoint
_CHUNK_BYTES = 64 * 1024

_UNSET = object()


def step_chunks(n_walkers: int, walker_bytes: int) -> tuple[int, int]:
    """Chunk shape ``(steps, walkers)`` of a per-step dataset: every walker in one chunk.

    HDF5 writes a dirty chunk whole when the file is flushed; with the chunk spanning all
    walkers (and parameters) one stored step dirties one chunk, not a dozen (h5py's own
    guess splits the walker and parameter axes), which makes the flush after each step
    about three times cheaper.  About 64 kB per chunk.
    """
    rows = max(1, min(1024, _CHUNK_BYTES // max(1, n_walkers * walker_bytes)))
    return rows, int(n_walkers)


class _OpenFile:
    """Context manager handing out an already open h5py file without closing it."""

    def __init__(self, handle):
        self.handle = handle

    def __enter__(self):
        return self.handle

    def __exit__(self, *exc):
        return False


class _HeldOpen:
    """What polkit adds to emcee's HDFBackend (the class of :func:`make_backend`).

    emcee's backend reopens the file several times per step; holding it open during
    a stretch of sampling and flushing after each stored step keeps every finished
    step on disk at a fraction of the cost.
    """

    _handle = None
    #: called before anything of a step is written
    before_step = None
    _datasets = None
    _cache = None
    _pending = ()
    _flushed_at = 0.0
    #: set before a step that must be written and flushed at once (a new chunk)
    flush_now = False

    @contextlib.contextmanager
    def session(self):
        import h5py

        self._handle = h5py.File(self.filename, "a")
        self._datasets = self._cache = None
        self._pending = []
        self._flushed_at = time.monotonic()
        try:
            yield
            self.flush_pending()
        except BaseException:
            self._close_after_failure()
            raise
        handle, self._handle = self._handle, None
        handle.close()

    def _close_after_failure(self) -> None:
        # the finished steps still waiting in memory go to disk first (a stop on
        # request, an interrupt, a full disk found before a step): they were
        # checked for room when they were taken
        try:
            self.flush_pending()
        except (OSError, RuntimeError) as exc:
            log.debug("could not write the last steps to %s: %s", self.filename, exc)
        handle, self._handle = self._handle, None
        # after a failed write HDF5 may be unable to flush on close; the error in
        # flight says what went wrong, so a second one from close is dropped
        try:
            handle.close()
        except (OSError, RuntimeError) as exc:
            log.debug("closing %s after a failed step: %s", self.filename, exc)

    def open(self, mode="r"):
        if self._handle is not None:
            return _OpenFile(self._handle)
        return super().open(mode)

    def reset(self, nwalkers, ndim):
        # emcee's layout (HDFBackend.reset), with chunks that hold every walker of a
        # run of steps (see step_chunks)
        import emcee

        with self.open("a") as f:
            if self.name in f:
                del f[self.name]
            g = f.create_group(self.name)
            g.attrs["version"] = emcee.__version__
            g.attrs["nwalkers"] = nwalkers
            g.attrs["ndim"] = ndim
            g.attrs["has_blobs"] = False
            g.attrs["iteration"] = 0
            g.create_dataset("accepted", data=np.zeros(nwalkers))
            rows, _ = step_chunks(nwalkers, 8 * ndim)
            g.create_dataset("chain", (0, nwalkers, ndim), maxshape=(None, nwalkers, ndim),
                             dtype=self.dtype, chunks=(rows, nwalkers, ndim))
            rows, _ = step_chunks(nwalkers, 8)
            g.create_dataset("log_prob", (0, nwalkers), maxshape=(None, nwalkers),
                             dtype=self.dtype, chunks=(rows, nwalkers))

    def grow(self, ngrow, blobs):
        self._datasets = None  # grow may create the blobs dataset
        if blobs is not None:
            self._check_blobs(blobs)
            with self.open("a") as f:
                g = f[self.name]
                if not g.attrs["has_blobs"]:  # created as emcee does, chunked as above
                    nwalkers = int(g.attrs["nwalkers"])
                    dt = np.dtype((blobs.dtype, blobs.shape[1:]))
                    g.create_dataset("blobs", (int(g.attrs["iteration"]), nwalkers),
                                     maxshape=(None, nwalkers), dtype=dt,
                                     chunks=step_chunks(nwalkers, dt.itemsize))
                    g.attrs["has_blobs"] = True
        super().grow(ngrow, blobs)
        if self._handle is not None:
            # the new shape goes to disk before any step waits in memory: a stretch that
            # stops before its first flush leaves nothing dirty for the file's close
            self._handle.flush()

    def _look_up_handles(self) -> None:
        """The group's datasets and attributes, looked up once per stretch."""
        g = self._handle[self.name]
        self._datasets = {k: RowWriter(g[k]) for k in ("chain", "log_prob", "blobs")
                          if k in g}
        self._cache = {"group": g, "iteration": int(g.attrs["iteration"]),
                       "accepted": g["accepted"][:],
                       "accepted_ds": WholeWriter(g["accepted"]),
                       "random_state": {}, "attrs": AttrWriter(g)}

    def save_step(self, state, accepted):
        if self.before_step is not None:
            self.before_step()
        if self._handle is None:
            super().save_step(state, accepted)
            return
        # emcee's own save_step reopens the group and its datasets and rereads their
        # attributes several times per step; with the file held open the same writes
        # (chain, log_prob, blobs, accepted, random state, iteration, in emcee's layout)
        # are made through handles looked up once per stretch
        if self._datasets is None:
            self._look_up_handles()
        d, c = self._datasets, self._cache
        if state.coords.shape != d["chain"].row_shape:
            raise ValueError(f"invalid coordinate dimensions; expected "
                             f"{d['chain'].row_shape}")
        if (state.blobs is None) != ("blobs" not in d):
            raise ValueError("blobs appeared or vanished between steps")
        # kept in memory (copies: emcee reuses nothing, but callers may) until the batch
        # is written; the random state kept is the one after this step
        self._pending.append((np.array(state.coords, dtype=float),
                              np.array(state.log_prob, dtype=float),
                              None if state.blobs is None else np.array(state.blobs)))
        c["accepted"] = c["accepted"] + accepted
        c["pending_state"] = state.random_state
        if self.flush_now or time.monotonic() - self._flushed_at >= FLUSH_SECONDS:
            self.flush_now = False
            self.flush_pending()

    def flushed_steps(self, default: int) -> int:
        """Steps written to the file so far in this stretch (``default`` before any)."""
        return self._cache["iteration"] if self._cache is not None else default

    def drop_pending(self):
        """Forget the steps waiting in memory (they do not fit on disk)."""
        if self._pending:
            log.info("%d finished step(s) of %s could not be stored; a resumed run "
                     "repeats them", len(self._pending), self.name)
        self._pending = []

    def flush_pending(self):
        """Write the steps kept in memory in one batch, with the state after the last."""
        if not self._pending or self._handle is None:
            return
        d, c = self._datasets, self._cache
        it = c["iteration"]
        rows = self._pending
        d["chain"].write_rows(it, np.stack([r[0] for r in rows]))
        d["log_prob"].write_rows(it, np.stack([r[1] for r in rows]))
        if rows[0][2] is not None:
            d["blobs"].write_rows(it, np.stack([r[2] for r in rows]))
        c["accepted_ds"].write(c["accepted"])
        self._write_random_state(c)
        c["attrs"].set("iteration", it + len(rows))
        c["iteration"] = it + len(rows)
        self._pending = []
        self._handle.flush()
        self._flushed_at = time.monotonic()

    @staticmethod
    def _write_random_state(c) -> None:
        # the random state as emcee stores it; parts unchanged since the last write of
        # this stretch (the generator's name, the cached Gaussian) are not rewritten
        written, attrs = c["random_state"], c["attrs"]
        for i, v in enumerate(c["pending_state"]):
            key = f"random_state_{i}"
            if isinstance(v, np.ndarray) or written.get(key, _UNSET) != v:
                attrs.set(key, v)
                written[key] = v


@functools.cache
def _backend_class():
    import emcee

    return type("CheckpointBackend", (_HeldOpen, emcee.backends.HDFBackend), {})


def make_backend(path: str | os.PathLike, name: str):
    """An emcee HDFBackend for group ``name`` of ``path`` that keeps the file open while
    sampling (:meth:`session`) and writes the finished steps in batches."""
    return _backend_class()(os.fspath(path), name=name)


class RowWriter:
    """Writes one step (row) of a growing dataset through HDF5's low-level calls.

    The same bytes as ``dataset[i] = value``, without h5py's per-call selection
    machinery (about a third of the time).  Values of another dtype or shape fall back
    to h5py's own assignment.
    """

    def __init__(self, dataset):
        from h5py import h5s

        self.dataset = dataset
        self.dtype = dataset.dtype  # h5py looks both up in the file at every access
        self.row_shape = tuple(dataset.shape[1:])
        self._file_space = dataset.id.get_space()
        self._memory_space = h5s.create_simple(self.row_shape or (1,))
        self._count = (1, *self.row_shape)

    def write_rows(self, row: int, values: np.ndarray) -> None:
        """Write ``len(values)`` consecutive steps from ``row`` on in one call."""
        from h5py import h5s

        arr = np.asarray(values)
        if arr.dtype != self.dtype or arr.shape[1:] != self.row_shape:
            self.dataset[row : row + len(arr)] = values
            return
        space = self.dataset.id.get_space()
        space.select_hyperslab((row,) + (0,) * len(self.row_shape), arr.shape)
        self.dataset.id.write(h5s.create_simple(arr.shape), space, np.ascontiguousarray(arr))

    def write(self, row: int, value) -> None:
        arr = np.asarray(value)
        if arr.dtype != self.dtype or arr.shape != self.row_shape:
            self.dataset[row] = value
            return
        self._file_space.select_hyperslab((row,) + (0,) * len(self.row_shape), self._count)
        self.dataset.id.write(self._memory_space, self._file_space,
                              np.ascontiguousarray(arr))


class WholeWriter:
    """``dataset[:] = value`` through the low-level call when dtype and shape match."""

    def __init__(self, dataset):
        self.dataset = dataset
        self.dtype, self.shape = dataset.dtype, dataset.shape

    def write(self, value) -> None:
        from h5py import h5s

        arr = np.asarray(value)
        if arr.dtype != self.dtype or arr.shape != self.shape:
            self.dataset[:] = value
            return
        self.dataset.id.write(h5s.ALL, h5s.ALL, np.ascontiguousarray(arr))


class AttrWriter:
    """Rewrites attributes of one HDF5 object in place when their type and shape stay.

    ``attrs[key] = value`` makes a new attribute and replaces the old one; writing into
    the existing one stores the same value at a fraction of the cost.  A new key, or a
    value of another type or shape, goes through h5py's assignment.
    """

    def __init__(self, obj):
        self.obj = obj
        self._open: dict[str, tuple] = {}  # key -> (attribute, dtype, shape)

    def set(self, key: str, value) -> None:
        from h5py import h5a

        found = self._open.get(key)
        if found is None and key in self.obj.attrs:
            attr = h5a.open(self.obj.id, key.encode())
            found = self._open[key] = (attr, attr.dtype, attr.shape)
        arr = np.asarray(value)
        if (found is None or arr.dtype.kind not in "iuf" or found[1] != arr.dtype
                or found[2] != arr.shape):
            self._open.pop(key, None)
            self.obj.attrs[key] = value
            return
        found[0].write(np.ascontiguousarray(arr))

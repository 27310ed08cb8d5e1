"""The HDF5 checkpoint of the ensemble runner: seeds, layout, step writes and room on disk.

The file keeps emcee's layout (one group per ensemble, ``ensemble0`` ..., read by
:class:`emcee.backends.HDFBackend`) plus polkit's attributes (parameter names and units,
walkers, the root seed, the run plan's progress).  polkit's backend holds the file open
during a stretch of steps, keeps the steps of the last second in memory and writes them
in one batch through HDF5's low-level calls into chunks that hold every walker of a run of
steps, then flushes the file: at most once every :data:`FLUSH_SECONDS`, and always at the
end of a stretch (before every gate check), when sampling stops on request, on an
interrupt or an error.  The random state and the iteration count written with a batch are
those after its last step, so a run killed between flushes (losing at most the last second
of steps) resumes from the last flushed step to the chain an uninterrupted run gives.

Room on disk: before each stretch of steps, and again before each stored step, the
free space and the file-size limit are checked against what the checkpoint will need
(whole HDF5 chunks plus a margin, see :func:`polkit.files.check_room`).  When it does not
fit, the run stops with one :class:`OSError` naming the checkpoint and the fix before
h5py is asked to write; the stored steps stay readable and ``resume=True`` continues
them.  Only a disk that fills up within a single step (another program writing) meets
h5py's own failure: it is reported the same way, but HDF5 may leave the checkpoint
unreadable and the interpreter may crash on exit.
"""

from __future__ import annotations

import contextlib
import errno
import json
import logging
import math
import os
import time
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from polkit.errors import ConfigError, PolkitError
from polkit.files import check_room, write_error
from polkit.inference.identity import IDENTITY_ATTR, compare_identity, fit_identity

__all__ = ["root_seed", "prepare_checkpoint", "start_stored"]

log = logging.getLogger(__name__)

_CHECKPOINT_FORMAT = 1
#: room kept beyond the chain data of a stretch of steps: HDF5 object headers, chunk-index
#: nodes and attributes (the random state is rewritten at every step)
_CHECKPOINT_METADATA_BYTES = 64 * 1024
#: and this fraction of the stretch's own bytes
_CHECKPOINT_MARGIN = 0.1
#: the longest time finished steps wait in memory before they are written and flushed
FLUSH_SECONDS = 1.0
#: errno values that mean "no room" (full disk, quota, file-size limit)
_NO_ROOM = {errno.ENOSPC, errno.EFBIG, getattr(errno, "EDQUOT", errno.ENOSPC)}



# ----------------------------------------------------------------------------------------
# seeds and checkpoints
# ----------------------------------------------------------------------------------------
def root_seed(seed) -> np.random.SeedSequence:
    """The root :class:`~numpy.random.SeedSequence` of a run from an int, a sequence or None.

    Raises
    ------
    ConfigError
        For anything but a non-negative int, None or a SeedSequence (key ``seed``).
    """
    if seed is None:
        return np.random.SeedSequence()
    if isinstance(seed, np.random.SeedSequence):
        # a fresh copy: the run depends on (entropy, spawn_key) only, which are recorded
        return np.random.SeedSequence(seed.entropy, spawn_key=seed.spawn_key)
    if isinstance(seed, (int, np.integer)) and not isinstance(seed, bool) and seed >= 0:
        return np.random.SeedSequence(int(seed))
    raise ConfigError(
        f"expected a non-negative int, None or numpy.random.SeedSequence; found {seed!r}",
        key="seed",
    )


def _entropy_int(seq: np.random.SeedSequence) -> int:
    ent = seq.entropy
    if isinstance(ent, (int, np.integer)):
        return int(ent)
    # a sequence of words, as SeedSequence accepts: pack it into one int (little-endian words)
    return sum(int(w) << (32 * i) for i, w in enumerate(np.asarray(ent, dtype=np.uint64)))


def _checkpoint_meta(space, n_walkers, seed_seq) -> dict[str, str]:
    return {
        "polkit_checkpoint_format": str(_CHECKPOINT_FORMAT),
        "polkit_parameter_names": json.dumps(space.names),
        "polkit_parameter_units": json.dumps(space.units),
        "polkit_n_walkers": str(n_walkers),
        "polkit_seed_entropy": json.dumps(
            seed_seq.entropy if isinstance(seed_seq.entropy, int) else
            [int(w) for w in np.asarray(seed_seq.entropy)]
        ),
        "polkit_seed_spawn_key": json.dumps([int(k) for k in seed_seq.spawn_key]),
    }


def _open_checkpoint(path: Path, space, n_walkers, seed, resume,
                     identity: dict[str, str] | None = None) -> np.random.SeedSequence:
    """Prepare the checkpoint file; returns the root seed sequence to use.

    A new checkpoint is written whole to a temporary file in the same folder and then
    renamed into place, so a kill while it is created leaves either no checkpoint or a
    complete one.  The caller holds the output folder's lock
    (:mod:`polkit.folder_lock`), so no other run is using an existing file.
    """
    import h5py

    if path.exists() and not resume:
        raise ConfigError(
            "a checkpoint of an earlier run is here; pass resume=True (--resume) to continue "
            "it, or write this run to another folder",
            path=path,
        )
    if not path.exists():
        seed_seq = root_seed(seed)
        check_room(path, _CHECKPOINT_METADATA_BYTES, purpose="a new checkpoint")
        with _checkpoint_writes(path):
            path.parent.mkdir(parents=True, exist_ok=True)
            tmp = path.with_name(f".{path.name}.{os.getpid()}.new")
            try:
                with h5py.File(tmp, "w") as fh:
                    fh.attrs.update(_checkpoint_meta(space, n_walkers, seed_seq))
                    if identity is not None:
                        fh.attrs[IDENTITY_ATTR] = json.dumps(identity)
                with open(tmp, "rb+") as fh:
                    os.fsync(fh.fileno())
                os.replace(tmp, path)
            finally:
                with contextlib.suppress(OSError):
                    tmp.unlink()
        return seed_seq
    try:
        with h5py.File(path, "r") as fh:
            attrs = {k: fh.attrs[k] for k in fh.attrs}
    except OSError as exc:
        if "lock" in str(exc).lower():
            raise ConfigError(
                f"cannot open the checkpoint: another program has it open ({exc}); let it "
                "finish, or write this run to another folder",
                path=path,
            ) from None
        raise ConfigError(
            f"cannot read the checkpoint ({exc}); no polkit run holds this folder, so it was "
            "damaged by a crash during a write: write this run to another folder, or remove "
            "the damaged checkpoint to start afresh",
            path=path,
        ) from None
    if "polkit_parameter_names" not in attrs:
        raise ConfigError(
            "this HDF5 file is not a polkit checkpoint (no 'polkit_parameter_names' "
            "attribute); choose another checkpoint path",
            path=path,
        )

    def text(key):
        value = attrs[key]
        return value.decode() if isinstance(value, bytes) else str(value)

    names = json.loads(text("polkit_parameter_names"))
    if names != space.names:
        raise ConfigError(
            f"the checkpoint belongs to parameters {names}, not {space.names}; use another "
            "checkpoint path",
            path=path,
            key="polkit_parameter_names",
        )
    stored_walkers = int(text("polkit_n_walkers"))
    if stored_walkers != n_walkers:
        raise ConfigError(
            f"the checkpoint holds {stored_walkers} walkers, this run asks for {n_walkers}; "
            f"pass n_walkers={stored_walkers} or use another checkpoint path",
            path=path,
            key="polkit_n_walkers",
        )
    entropy = json.loads(text("polkit_seed_entropy"))
    spawn_key = tuple(json.loads(text("polkit_seed_spawn_key")))
    stored = np.random.SeedSequence(entropy, spawn_key=spawn_key)
    if seed is not None:
        asked = root_seed(seed)
        if _entropy_int(asked) != _entropy_int(stored) or tuple(asked.spawn_key) != spawn_key:
            raise ConfigError(
                f"the checkpoint was started with seed entropy {entropy} (spawn key "
                f"{list(spawn_key)}); resuming with a different seed would not reproduce it "
                "-- pass seed=None or the original seed",
                path=path,
                key="polkit_seed_entropy",
            )
    if identity is not None:
        compare_identity(path, text(IDENTITY_ATTR) if IDENTITY_ATTR in attrs else None,
                         identity)
    return stored


#: the group holding each ensemble's starting positions, stored before its first step
_START_GROUP = "polkit_start"


def _stored_start(path: Path | None, name: str) -> np.ndarray | None:
    """The starting ensemble stored for ensemble ``name`` (None when there is none)."""
    if path is None or not path.exists():
        return None
    import h5py

    with h5py.File(path, "r") as fh:
        g = fh.get(_START_GROUP)
        return None if g is None or name not in g else g[name][()]


def _store_start(path: Path, name: str, p0: np.ndarray) -> None:
    """Keep ensemble ``name``'s starting positions before its first step is taken."""
    import h5py

    check_room(path, _CHECKPOINT_METADATA_BYTES + p0.nbytes, purpose="the starting ensemble",
               fix=_ROOM_FIX)
    with _checkpoint_writes(path), h5py.File(path, "a") as fh:
        g = fh.require_group(_START_GROUP)
        if name in g:
            del g[name]
        g.create_dataset(name, data=np.asarray(p0, dtype=float))
        fh.flush()


def prepare_checkpoint(path: Path, space, n_walkers: int, seed, resume: bool,
                       identity=None) -> np.random.SeedSequence:
    """Create the checkpoint (or check an existing one on resume) before a run starts.

    ``identity`` is the job's part of the fit identity (see
    :func:`polkit.inference.identity.fit_identity`); the effective priors and versions are
    added here.  Returns the run's root seed, which is stored in the checkpoint: a job
    that does something random before the run (a pre-burn) takes it from here, so a run
    killed before its first step resumes to the same start.
    """
    full = fit_identity(space, identity) if identity is not None else None
    return _open_checkpoint(Path(path), space, n_walkers, seed, resume, full)


def start_stored(path: Path | None) -> bool:
    """Whether the checkpoint holds the run's starting ensembles (or steps already)."""
    if path is None or not Path(path).exists():
        return False
    import h5py

    with h5py.File(path, "r") as fh:
        if _START_GROUP in fh and "ensemble0" in fh[_START_GROUP]:
            return True
        g = fh.get("ensemble0")
        return g is not None and int(g.attrs.get("iteration", 0)) > 0


def _group_attr(path: Path | None, group: str, key: str, value=None):
    """Read (value None) or write a polkit attribute on an ensemble's HDF5 group."""
    if path is None:
        return None
    import h5py

    if value is None:
        with h5py.File(path, "r") as fh:
            return fh[group].attrs.get(key) if group in fh else None
    check_room(path, _CHECKPOINT_METADATA_BYTES, purpose="the run's progress record",
               fix=_ROOM_FIX)
    with _checkpoint_writes(path), h5py.File(path, "a") as fh:
        fh[group].attrs[key] = value
    return value


#: what to do when the checkpoint has no room left (the preflight checks stop before writing)
_ROOM_FIX = (
    "make room (free disk space, or raise the file-size limit), then continue the run with "
    "resume=True (--resume on the command line); the steps stored so far are kept"
)
#: what to do when a write failed half-way (the disk filled up during a step)
_FAILED_WRITE_NOTE = (
    "the disk filled up while a step was being written, so the last step may not have "
    "been stored; once there is room, continue the run with resume=True (--resume on the "
    "command line); if this run's checkpoint can no longer be read, remove it and start afresh"
)


@contextlib.contextmanager
def _checkpoint_writes(path: Path):
    """Raise I/O failures of HDF5 writes to the checkpoint as one clear :class:`OSError`.

    h5py reports a full disk or a file-size limit as an :class:`OSError` or
    :class:`RuntimeError` carrying HDF5's own error stack; the clear error names the
    checkpoint, the problem and the fix (see :func:`polkit.files.write_error`).
    """
    try:
        yield
    except PolkitError:
        raise
    except (OSError, RuntimeError) as exc:
        if str(exc).startswith("cannot write "):  # already clear (polkit.files)
            raise
        clear = write_error(path, exc)
        if clear is None:
            raise
        if clear.errno in _NO_ROOM:
            clear = write_error(path, exc, note=_FAILED_WRITE_NOTE)
        raise clear from exc


@dataclass(frozen=True)
class _ChunkRows:
    """How one per-step dataset of the checkpoint grows: HDF5 allocates a chunk whole when
    it is first written, so the dataset grows by ``row_bytes`` every ``rows`` steps."""

    rows: int
    row_bytes: int

    def new_bytes(self, start: int, stop: int) -> int:
        """Bytes of the chunks first touched by steps ``start:stop``."""
        first_rows = -(-stop // self.rows) - -(-start // self.rows)  # ceil divisions
        return first_rows * self.row_bytes


def _chunk_rows(chunks, shape_tail, itemsize) -> _ChunkRows:
    across = math.prod(-(-n // c) for n, c in zip(shape_tail, chunks[1:], strict=True))
    return _ChunkRows(int(chunks[0]), int(across * math.prod(chunks) * itemsize))


def _with_margin(n_bytes: int) -> int:
    return int(n_bytes * (1.0 + _CHECKPOINT_MARGIN)) + _CHECKPOINT_METADATA_BYTES


def _growth(path: Path, group: str, n_steps: int, n_walkers: int, ndim: int,
            n_extras: int) -> tuple[int, list[_ChunkRows]]:
    """Stored steps of ``group`` and how its chain, log-prob and extras datasets grow.

    Chunk shapes are read from the file; the extras dataset, created at the first stored
    step, gets the shape :func:`_step_chunks` will give it.
    """
    import h5py

    tails = {"chain": (ndim,), "log_prob": ()}
    if n_extras:
        tails["blobs"] = (n_extras,)
    growth = []
    with h5py.File(path, "r") as fh:
        g = fh.get(group)
        start = int(g.attrs.get("iteration", 0)) if g is not None else 0
        for name, tail in tails.items():
            ds = g.get(name) if g is not None else None
            if ds is not None and ds.chunks:
                growth.append(_chunk_rows(ds.chunks, ds.shape[1:], ds.dtype.itemsize))
            else:
                itemsize = 8 * math.prod(tail)
                chunks = _step_chunks(n_walkers, 8 * math.prod(tail))
                growth.append(_chunk_rows(chunks, (n_walkers,), itemsize))
    return start, growth


#: target size of one chunk of a per-step dataset of the checkpoint
_CHUNK_BYTES = 64 * 1024


def _step_chunks(n_walkers: int, walker_bytes: int) -> tuple[int, int]:
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


_UNSET = object()


def _checkpoint_backend(path: Path, name: str):
    """An emcee HDFBackend that keeps the file open while sampling and flushes every step.

    emcee's backend reopens the file several times per step; holding it open during
    a stretch of sampling and flushing after each stored step keeps every finished
    step on disk at a fraction of the cost.
    """
    import emcee
    import h5py

    class _Backend(emcee.backends.HDFBackend):
        _handle = None
        #: called before anything of a step is written
        before_step = None

        @contextlib.contextmanager
        def session(self):
            self._handle = h5py.File(self.filename, "a")
            self._datasets = self._cache = None
            self._pending = []
            self._flushed_at = time.monotonic()
            try:
                yield
                self.flush_pending()
            except BaseException:
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
                raise
            handle, self._handle = self._handle, None
            handle.close()

        def open(self, mode="r"):
            if self._handle is not None:
                return _OpenFile(self._handle)
            return super().open(mode)

        _datasets = None
        _cache = None

        def reset(self, nwalkers, ndim):
            # emcee's layout (HDFBackend.reset), with chunks that hold every walker of a
            # run of steps (see _step_chunks)
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
                rows, _ = _step_chunks(nwalkers, 8 * ndim)
                g.create_dataset("chain", (0, nwalkers, ndim), maxshape=(None, nwalkers, ndim),
                                 dtype=self.dtype, chunks=(rows, nwalkers, ndim))
                rows, _ = _step_chunks(nwalkers, 8)
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
                                         chunks=_step_chunks(nwalkers, dt.itemsize))
                        g.attrs["has_blobs"] = True
            super().grow(ngrow, blobs)
            if self._handle is not None:
                # the new shape goes to disk before any step waits in memory: a stretch that
                # stops before its first flush leaves nothing dirty for the file's close
                self._handle.flush()

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
                g = self._handle[self.name]
                self._datasets = {k: _RowWriter(g[k]) for k in ("chain", "log_prob", "blobs")
                                  if k in g}
                self._cache = {"group": g, "iteration": int(g.attrs["iteration"]),
                               "accepted": g["accepted"][:],
                               "accepted_ds": _WholeWriter(g["accepted"]),
                               "random_state": {}, "attrs": _AttrWriter(g)}
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

        _pending = ()
        _flushed_at = 0.0
        #: set before a step that must be written and flushed at once (a new chunk)
        flush_now = False

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
            # the random state as emcee stores it; parts unchanged since the last write of
            # this stretch (the generator's name, the cached Gaussian) are not rewritten
            written, attrs = c["random_state"], c["attrs"]
            for i, v in enumerate(c["pending_state"]):
                key = f"random_state_{i}"
                if isinstance(v, np.ndarray) or written.get(key, _UNSET) != v:
                    attrs.set(key, v)
                    written[key] = v
            attrs.set("iteration", it + len(rows))
            c["iteration"] = it + len(rows)
            self._pending = []
            self._handle.flush()
            self._flushed_at = time.monotonic()

    return _Backend(os.fspath(path), name=name)


class _RowWriter:
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


class _WholeWriter:
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


class _AttrWriter:
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


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
from dataclasses import dataclass
from pathlib import Path

import numpy as np

from polkit.errors import ConfigError, PolkitError
from polkit.files import check_room, write_error
from polkit.inference.checkpoint_backend import FLUSH_SECONDS, make_backend, step_chunks
from polkit.inference.identity import IDENTITY_ATTR, compare_identity, fit_identity

__all__ = ["Checkpoint", "ChunkRows", "FLUSH_SECONDS", "root_seed", "entropy_int",
           "prepare_checkpoint", "start_stored"]

log = logging.getLogger(__name__)

_CHECKPOINT_FORMAT = 1
#: room kept beyond the chain data of a stretch of steps: HDF5 object headers, chunk-index
#: nodes and attributes (the random state is rewritten at every step)
_CHECKPOINT_METADATA_BYTES = 64 * 1024
#: and this fraction of the stretch's own bytes
_CHECKPOINT_MARGIN = 0.1
#: errno values that mean "no room" (full disk, quota, file-size limit)
_NO_ROOM = {errno.ENOSPC, errno.EFBIG, getattr(errno, "EDQUOT", errno.ENOSPC)}
#: the group holding each ensemble's starting positions, stored before its first step
_START_GROUP = "polkit_start"
#: the attribute of an ensemble's group holding the step at which its own gate was settled
_GATE_STEPS = "polkit_gate_steps"

#: what to do when the checkpoint has no room left (the preflight checks stop before writing)
ROOM_FIX = (
    "make room (free disk space, or raise the file-size limit), then continue the run with "
    "resume=True (--resume on the command line); the steps stored so far are kept"
)
#: what to do when a write failed half-way (the disk filled up during a step)
_FAILED_WRITE_NOTE = (
    "the disk filled up while a step was being written, so the last step may not have "
    "been stored; once there is room, continue the run with resume=True (--resume on the "
    "command line); if this run's checkpoint can no longer be read, remove it and start afresh"
)


# ----------------------------------------------------------------------------------------
# seeds
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


def entropy_int(seq: np.random.SeedSequence) -> int:
    """The entropy of a seed sequence as one int (a sequence of words packed little-endian)."""
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


# ----------------------------------------------------------------------------------------
# the file: made whole, or checked on resume
# ----------------------------------------------------------------------------------------
def _create(path: Path, space, n_walkers, seed, identity) -> np.random.SeedSequence:
    """Write a new checkpoint whole to a temporary file, then rename it into place."""
    import h5py

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


def _read_attrs(path: Path) -> dict:
    """The root attributes of an existing checkpoint, refused when it is not polkit's."""
    import h5py

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
    return attrs


def _verify(path: Path, space, n_walkers, seed, identity) -> np.random.SeedSequence:
    """Check an existing checkpoint against this run; returns its stored root seed."""
    attrs = _read_attrs(path)

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
        if entropy_int(asked) != entropy_int(stored) or tuple(asked.spawn_key) != spawn_key:
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


class Checkpoint:
    """The HDF5 checkpoint of one run: its file, starting ensembles, progress and room.

    Build one with :meth:`open` (which makes the file, or checks it on resume); the
    sampler's ensembles then take their backends (:meth:`backend`) from it.  Every write
    goes through :meth:`writes`, which turns HDF5's I/O failures into one clear
    :class:`OSError`.
    """

    def __init__(self, path: str | os.PathLike):
        self.path = Path(path)

    @classmethod
    def open(cls, path: str | os.PathLike, space, n_walkers: int, seed, resume: bool,
             identity: dict[str, str] | None = None
             ) -> tuple[Checkpoint, np.random.SeedSequence]:
        """Prepare the checkpoint file; returns it and the root seed sequence to use.

        A new checkpoint is written whole to a temporary file in the same folder and then
        renamed into place, so a kill while it is created leaves either no checkpoint or a
        complete one.  The caller holds the output folder's lock
        (:mod:`polkit.folder_lock`), so no other run is using an existing file.
        ``identity`` is the full fit identity (:func:`~polkit.inference.identity.fit_identity`).
        """
        path = Path(path)
        if path.exists() and not resume:
            raise ConfigError(
                "a checkpoint of an earlier run is here; pass resume=True (--resume) to "
                "continue it, or write this run to another folder",
                path=path,
            )
        if not path.exists():
            return cls(path), _create(path, space, n_walkers, seed, identity)
        return cls(path), _verify(path, space, n_walkers, seed, identity)

    def writes(self):
        """Context manager raising the I/O failures of HDF5 writes as one clear error."""
        return _checkpoint_writes(self.path)

    def backend(self, name: str):
        """The emcee backend of ensemble ``name``.

        See :mod:`polkit.inference.checkpoint_backend`.
        """
        return make_backend(self.path, name)

    def check_room(self, n_bytes: int, purpose: str) -> None:
        """Raise a clear :class:`OSError` unless ``n_bytes`` more fit in the checkpoint."""
        check_room(self.path, n_bytes, purpose=purpose, fix=ROOM_FIX)

    # -- the starting ensembles ----------------------------------------------------------
    def stored_start(self, name: str) -> np.ndarray | None:
        """The starting ensemble stored for ensemble ``name`` (None when there is none)."""
        if not self.path.exists():
            return None
        import h5py

        with h5py.File(self.path, "r") as fh:
            g = fh.get(_START_GROUP)
            return None if g is None or name not in g else g[name][()]

    def store_start(self, name: str, p0: np.ndarray) -> None:
        """Keep ensemble ``name``'s starting positions before its first step is taken."""
        import h5py

        self.check_room(_CHECKPOINT_METADATA_BYTES + p0.nbytes, "the starting ensemble")
        with self.writes(), h5py.File(self.path, "a") as fh:
            g = fh.require_group(_START_GROUP)
            if name in g:
                del g[name]
            g.create_dataset(name, data=np.asarray(p0, dtype=float))
            fh.flush()

    # -- the run plan's progress ---------------------------------------------------------
    def gate_steps(self, name: str):
        """The step at which ensemble ``name``'s own gate was settled (None: not yet)."""
        import h5py

        with h5py.File(self.path, "r") as fh:
            return fh[name].attrs.get(_GATE_STEPS) if name in fh else None

    def record_gate_steps(self, name: str, steps: int) -> None:
        """Record that ensemble ``name``'s own gate was settled at ``steps``."""
        import h5py

        self.check_room(_CHECKPOINT_METADATA_BYTES, "the run's progress record")
        with self.writes(), h5py.File(self.path, "a") as fh:
            fh[name].attrs[_GATE_STEPS] = steps

    # -- room for the next steps ---------------------------------------------------------
    def growth(self, group: str, n_walkers: int, ndim: int,
               n_extras: int) -> tuple[int, list[ChunkRows]]:
        """Stored steps of ``group`` and how its chain, log-prob and extras datasets grow.

        Chunk shapes are read from the file; the extras dataset, created at the first
        stored step, gets the shape :func:`~polkit.inference.checkpoint_backend.step_chunks`
        will give it.
        """
        import h5py

        tails = {"chain": (ndim,), "log_prob": ()}
        if n_extras:
            tails["blobs"] = (n_extras,)
        growth = []
        with h5py.File(self.path, "r") as fh:
            g = fh.get(group)
            start = int(g.attrs.get("iteration", 0)) if g is not None else 0
            for name, tail in tails.items():
                ds = g.get(name) if g is not None else None
                if ds is not None and ds.chunks:
                    growth.append(_chunk_rows(ds.chunks, ds.shape[1:], ds.dtype.itemsize))
                else:
                    itemsize = 8 * math.prod(tail)
                    chunks = step_chunks(n_walkers, 8 * math.prod(tail))
                    growth.append(_chunk_rows(chunks, (n_walkers,), itemsize))
        return start, growth

    @staticmethod
    def with_margin(n_bytes: int) -> int:
        """``n_bytes`` of chain data plus the margin kept for HDF5's own records."""
        return int(n_bytes * (1.0 + _CHECKPOINT_MARGIN)) + _CHECKPOINT_METADATA_BYTES


@dataclass(frozen=True)
class ChunkRows:
    """How one per-step dataset of the checkpoint grows: HDF5 allocates a chunk whole when
    it is first written, so the dataset grows by ``row_bytes`` every ``rows`` steps."""

    rows: int
    row_bytes: int

    def new_bytes(self, start: int, stop: int) -> int:
        """Bytes of the chunks first touched by steps ``start:stop``."""
        first_rows = -(-stop // self.rows) - -(-start // self.rows)  # ceil divisions
        return first_rows * self.row_bytes


def _chunk_rows(chunks, shape_tail, itemsize) -> ChunkRows:
    across = math.prod(-(-n // c) for n, c in zip(shape_tail, chunks[1:], strict=True))
    return ChunkRows(int(chunks[0]), int(across * math.prod(chunks) * itemsize))


# ----------------------------------------------------------------------------------------
# for jobs that act before the run (a pre-burn drawn from the run's seed)
# ----------------------------------------------------------------------------------------
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
    return Checkpoint.open(Path(path), space, n_walkers, seed, resume, full)[1]


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

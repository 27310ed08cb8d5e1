"""One ensemble of the runner: an emcee sampler, its backend, its seeds and its gate history.

With a :class:`~polkit.inference.checkpoint.Checkpoint` every step is stored in the
ensemble's group of the file, after checking that it fits on disk; without one the chain
stays in memory (emcee's own backend).
"""

from __future__ import annotations

import contextlib

import numpy as np

from polkit.errors import FitError
from polkit.inference import diagnostics as diag
from polkit.inference.checkpoint import Checkpoint
from polkit.inference.posterior import describe_point
from polkit.inference.priors import ParameterSpace

__all__ = ["Ensemble", "Stopped"]


class Stopped(Exception):
    """Raised inside a stretch of steps when the caller's stop event is set."""


class Ensemble:
    """One emcee sampler, its backend and its gate history."""

    def __init__(self, index, log_post, space, n_walkers, moves,
                 checkpoint: Checkpoint | None, seq, n_extras=0):
        import emcee

        self.index = index
        self.name = f"ensemble{index}"
        self.checkpoint = checkpoint
        self.n_walkers = n_walkers
        self.ndim = space.ndim
        self.n_extras = n_extras
        if checkpoint is not None:
            backend = checkpoint.backend(self.name)
        else:
            backend = emcee.backends.Backend()
        self.backend = backend
        writes = checkpoint.writes() if checkpoint is not None else contextlib.nullcontext()
        with writes:  # emcee creates the ensemble's group in the checkpoint here
            self.sampler = emcee.EnsembleSampler(
                n_walkers, space.ndim, log_post, moves=moves, vectorize=True, backend=backend
            )
        # emcee wraps the function in a helper that prints every exception (our FitError,
        # a KeyboardInterrupt) to stdout before re-raising it; call ours directly instead
        self.sampler.log_prob_fn = log_post
        ball_seq, mcmc_seq = seq.spawn(2)
        self.ball_rng = np.random.Generator(np.random.PCG64(ball_seq))
        self.rng_state = np.random.RandomState(np.random.MT19937(mcmc_seq)).get_state()
        self.state = None
        self.taus: dict[int, np.ndarray] = {}
        self._read = (np.empty((0, n_walkers, space.ndim)), np.empty((0, n_walkers)))

    @property
    def steps(self) -> int:
        return int(self.backend.iteration) if self.backend.initialized else 0

    def stored_start(self) -> np.ndarray | None:
        """The starting positions stored in the checkpoint (None without one)."""
        return self.checkpoint.stored_start(self.name) if self.checkpoint is not None else None

    def start(self, p0, space: ParameterSpace):
        """The state before the next step: the last stored one, or the starting ensemble.

        ``p0`` is a callable giving the starting positions.  With a checkpoint they are
        stored before the first step and a resumed run that finds them starts from them,
        so a run killed before its first step resumes to the same chain.
        """
        import emcee

        if self.steps > 0:
            self.state = self.sampler.get_last_sample()
            return
        stored = self.stored_start()
        if stored is not None and stored.shape == (self.n_walkers, self.ndim):
            p0 = stored
        else:
            p0 = p0()
            if self.checkpoint is not None:
                self.checkpoint.store_start(self.name, p0)
        log_prob, blobs = self.sampler.compute_log_prob(p0)
        bad = np.flatnonzero(~np.isfinite(log_prob))
        if bad.size:
            raise FitError(
                f"{bad.size} walker(s) of {self.name} start at zero posterior, e.g. walker "
                f"{int(bad[0])}: {describe_point(space, p0[bad[0]])}; start inside the prior "
                "where the likelihood is positive"
            )
        self.state = emcee.State(p0, log_prob=log_prob, blobs=blobs, random_state=self.rng_state)

    def advance(self, n_steps: int, pbar, stop_event) -> None:
        """Take ``n_steps`` steps, storing each; with a checkpoint, first make sure they fit.

        Before the stretch, and again before each step is stored, the free space and the
        file-size limit are checked against the bytes still needed (whole HDF5 chunks
        plus a margin); when they do not fit, a clear :class:`OSError` is raised before
        h5py is asked to write, and the steps stored so far stay readable and
        resumable.  A write that fails anyway (the disk filled up within a step) is
        raised as the same kind of error.
        """
        if self.checkpoint is None:
            self._sample(n_steps, pbar, stop_event)
            return
        ckpt = self.checkpoint
        with ckpt.writes():
            start, growth = ckpt.growth(self.name, self.n_walkers, self.ndim, self.n_extras)
        need = ckpt.with_margin(sum(g.new_bytes(start, start + n_steps) for g in growth))
        ckpt.check_room(need, f"the next {n_steps} MCMC steps")
        self.backend.before_step = self._room_check(iter(range(start, start + n_steps)),
                                                    growth)
        try:
            with ckpt.writes(), self.backend.session():
                self._sample(n_steps, pbar, stop_event)
        finally:
            self.backend.before_step = None

    def _room_check(self, steps, growth):
        """The check the backend makes before it stores each of ``steps``."""

        def before_step() -> None:
            # someone else may be filling the disk: check again before every step, for this
            # step and the finished ones still waiting in memory (see
            # checkpoint_backend.FLUSH_SECONDS)
            step = next(steps)
            waiting = self.backend.flushed_steps(step)
            fresh = sum(g.new_bytes(step, step + 1) for g in growth)
            try:
                self.checkpoint.check_room(self.checkpoint.with_margin(fresh),
                                           "the next MCMC step")
            except OSError:
                # a step that starts a new chunk is written at once (below), so the steps
                # waiting in memory only fill chunks already on disk: writing them takes
                # no new room.  Anything else is dropped (the file keeps the last flushed
                # step and its random state)
                if sum(g.new_bytes(waiting, step) for g in growth) == 0:
                    self.backend.flush_pending()
                else:
                    self.backend.drop_pending()
                raise
            # the step that first touches a chunk is flushed with it, while the room
            # just found is still there
            self.backend.flush_now = fresh > 0

        return before_step

    def _sample(self, n_steps: int, pbar, stop_event) -> None:
        for state in self.sampler.sample(
            self.state, iterations=n_steps, skip_initial_state_check=True, store=True
        ):
            self.state = state
            pbar.update(1)
            if stop_event is not None and stop_event.is_set():
                raise Stopped()

    def chain(self, n: int | None = None) -> tuple[np.ndarray, np.ndarray]:
        if self.checkpoint is None:
            chain, lp = self.backend.get_chain(), self.backend.get_log_prob()
        else:  # steps read before are kept: only the new ones come from the file
            chain, lp = self._read
            stored = self.steps
            if len(chain) < stored:
                with self.backend.open() as fh:
                    g = fh[self.name]
                    chain = np.concatenate([chain, g["chain"][len(chain):stored]])
                    lp = np.concatenate([lp, g["log_prob"][len(lp):stored]])
                self._read = chain, lp
        return (chain, lp) if n is None else (chain[:n], lp[:n])

    def tau_at(self, n: int) -> np.ndarray:
        if n not in self.taus:
            chain, _ = self.chain(n)
            self.taus[n] = diag.autocorr_time(chain[n // 4 :])
        return self.taus[n]

"""The ensemble MCMC runner: emcee with recorded seeds, HDF5 checkpoints and a convergence gate.

Scope: this module drives :class:`emcee.EnsembleSampler`; it knows nothing of physics
or input files.  A caller hands it a :class:`~polkit.inference.priors.ParameterSpace`
and a vectorised log-likelihood ``theta[W, P] -> [W]``; the runner adds the log
prior, seeds everything from one :class:`numpy.random.SeedSequence`, stops when the
convergence gate is passed (or at ``max_steps``), and returns a
:class:`SamplerOutput`.

Run plan (a pure function of the stored chains, so a resumed run takes the same
decisions and produces the same chain as an uninterrupted one):

1. each ensemble runs on its own until its gate passes (checked every
   ``check_every`` steps from ``min_steps`` on) or ``max_steps`` is reached.  The gate
   (:func:`~polkit.inference.diagnostics.convergence_gate`) asks for what a user needs:
   bulk and tail ESS of the reported draws of at least ``ess_target`` per parameter
   (less for noise parameters), rank-normalised R-hat over groups of walkers at most
   ``rhat_max``, a chain of at least ``autocorr_factor`` autocorrelation times as a
   safety floor, acceptance in range and no stuck walkers;
2. all ensembles are then continued to a common length; with several ensembles the
   common length grows (by half, at least ``check_every`` steps) until the pooled ESS
   reaches ``ess_target`` and, in strict mode, nested R-hat over the ensembles is at
   most ``nested_rhat_max``, or ``max_steps`` is reached.

Every check reads only the stored steps (the checkpoint is flushed before each), so a
resumed run takes the same decisions.

The HDF5 checkpoint (its layout, writes and room checks) lives in
:mod:`polkit.inference.checkpoint`.
"""

from __future__ import annotations

import contextlib
import logging
import math
import os
import threading
import warnings
from collections.abc import Callable, Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from polkit.errors import ConfigError, ConvergenceWarning, FitError
from polkit.files import check_room
from polkit.folder_lock import folder_lock
from polkit.inference import diagnostics as diag
from polkit.inference.checkpoint import (
    _ROOM_FIX,
    _checkpoint_backend,
    _checkpoint_writes,
    _entropy_int,
    _group_attr,
    _growth,
    _open_checkpoint,
    _store_start,
    _stored_start,
    _with_margin,
    root_seed,
)
from polkit.inference.identity import fit_identity
from polkit.inference.optimize import MapResult, check_ensemble, initial_ball
from polkit.inference.posterior import LogPosterior, describe_point
from polkit.inference.priors import ParameterSpace

__all__ = ["SamplerOutput", "run_ensemble", "default_moves", "root_seed"]

log = logging.getLogger(__name__)


def default_moves() -> list:
    """Differential-evolution moves: ``[(DEMove(), 1.0)]``.

    Why: each walker's DE proposal is built from the difference of two other
    walkers (Ter Braak 2006; Nelson et al. 2014), so proposals adapt to the scale
    and correlations of the posterior while every walker gets its own.  The snooker
    variant (Ter Braak and Vrugt 2008) was part of the set (weight 0.2) and was
    measured against DE alone by effective samples per second
    (``tests/benchmarks/bench_moves.py``, README "Performance"): its per-walker
    proposal loop costs more than it gains, on a curved (banana) posterior as well
    as on a bimodal one and on the demo map's posterior; and on a correlated Gaussian
    emcee's snooker move gave 68 % intervals about 3 % too narrow (checked in
    ``tests/inference/test_inference_sampler.py``).  The stretch move loses
    efficiency as the dimension grows, and a full-covariance Gaussian move would
    give every walker the same proposal distribution.
    """
    import emcee

    return [(emcee.moves.DEMove(), 1.0)]


# ----------------------------------------------------------------------------------------
# output
# ----------------------------------------------------------------------------------------
@dataclass
class SamplerOutput:
    """The chains of a run and what the convergence gate found.

    Attributes
    ----------
    space
        The parameter space sampled.
    chains
        Shape ``(n_ensembles, steps, walkers, P)``.
    log_prob
        Log posterior, shape ``(n_ensembles, steps, walkers)``.
    acceptance
        Acceptance fraction of each walker after burn-in, ``(n_ensembles, walkers)``.
    autocorr_time
        Integrated autocorrelation time, ``(n_ensembles, P)`` in steps.
    burn_in, thin
        Steps dropped at the start and the thinning of :meth:`posterior_draws`.
    converged
        Whether every gate passed.
    reasons
        Why not, one line per failed test (empty when converged).
    diagnostics
        JSON-ready dict (see :func:`run_ensemble`).
    seed_entropy, seed_spawn_key
        The root :class:`~numpy.random.SeedSequence` of the run.
    extras, extras_units
        Per-walker side results of the log-likelihood, ``{name: (n_ensembles, steps,
        walkers)}``, and their units.
    """

    space: ParameterSpace
    chains: np.ndarray
    log_prob: np.ndarray
    acceptance: np.ndarray
    autocorr_time: np.ndarray
    burn_in: int
    thin: int
    converged: bool
    reasons: list[str]
    diagnostics: dict[str, Any]
    seed_entropy: int
    seed_spawn_key: tuple[int, ...] = ()
    extras: dict[str, np.ndarray] = field(default_factory=dict)
    extras_units: dict[str, str] = field(default_factory=dict)

    @property
    def names(self) -> list[str]:
        """Parameter names."""
        return self.space.names

    @property
    def n_ensembles(self) -> int:
        """Number of independently seeded ensembles."""
        return self.chains.shape[0]

    def _kept(self, array: np.ndarray) -> np.ndarray:
        """(E, S, W, ...) -> (E*W, D, ...) after burn-in and thinning; chain = ensemble-major."""
        kept = array[:, self.burn_in :: self.thin]
        kept = np.moveaxis(kept, 2, 1)  # (E, W, D, ...)
        return kept.reshape((-1,) + kept.shape[2:])

    def _chain_coords(self) -> dict:
        n_ens, _, n_walk = self.chains.shape[:3]
        return {
            "chain": np.arange(n_ens * n_walk),
            "ensemble": ("chain", np.repeat(np.arange(n_ens), n_walk)),
            "walker": ("chain", np.tile(np.arange(n_walk), n_ens)),
        }

    def posterior_draws(self) -> xr.Dataset:
        """The burned-in, thinned draws as a Dataset with dims ``(chain, draw)``.

        ``chain`` runs over walkers (ensemble-major: chain = ensemble * walkers +
        walker, with ``ensemble`` and ``walker`` coordinates); every variable
        (parameters, then extras) carries ``units`` and ``long_name``.
        """
        kept = self._kept(self.chains)  # (C, D, P)
        coords = self._chain_coords()
        coords["draw"] = np.arange(kept.shape[1])
        data = {}
        for j, p in enumerate(self.space):
            data[p.name] = (
                ("chain", "draw"),
                kept[:, :, j],
                {"units": p.units, "long_name": p.description or p.name.replace("_", " ")},
            )
        for name, values in self.extras.items():
            data[name] = (
                ("chain", "draw"),
                self._kept(values),
                {"units": self.extras_units.get(name, "1"), "long_name": name.replace("_", " ")},
            )
        return xr.Dataset(data, coords=coords)

    def sample_stats(self) -> xr.Dataset:
        """``lp`` (log posterior of each kept draw) and per-walker ``acceptance``."""
        lp = self._kept(self.log_prob)
        coords = self._chain_coords()
        coords["draw"] = np.arange(lp.shape[1])
        return xr.Dataset(
            {
                "lp": (("chain", "draw"), lp, {"units": "1", "long_name": "log posterior"}),
                "acceptance": (
                    ("chain",),
                    self.acceptance.reshape(-1),
                    {"units": "1", "long_name": "acceptance fraction after burn-in"},
                ),
            },
            coords=coords,
        )


# ----------------------------------------------------------------------------------------
# the run
# ----------------------------------------------------------------------------------------
class _Stopped(Exception):
    pass



class _Ensemble:
    """One emcee sampler, its backend and its gate history."""

    def __init__(self, index, log_post, space, n_walkers, moves, checkpoint, seq,
                 n_extras=0):
        import emcee

        self.index = index
        self.name = f"ensemble{index}"
        self.checkpoint = checkpoint
        self.n_walkers = n_walkers
        self.ndim = space.ndim
        self.n_extras = n_extras
        if checkpoint is not None:
            backend = _checkpoint_backend(checkpoint, self.name)
        else:
            backend = emcee.backends.Backend()
        self.backend = backend
        writes = _checkpoint_writes(checkpoint) if checkpoint is not None else (
            contextlib.nullcontext())
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
        stored = _stored_start(self.checkpoint, self.name)
        if stored is not None and stored.shape == (self.n_walkers, self.ndim):
            p0 = stored
        else:
            p0 = p0()
            if self.checkpoint is not None:
                _store_start(self.checkpoint, self.name, p0)
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
        path = self.checkpoint
        with _checkpoint_writes(path):
            start, growth = _growth(path, self.name, n_steps, self.n_walkers, self.ndim,
                                    self.n_extras)
        need = _with_margin(sum(g.new_bytes(start, start + n_steps) for g in growth))
        check_room(path, need, purpose=f"the next {n_steps} MCMC steps", fix=_ROOM_FIX)

        steps = iter(range(start, start + n_steps))

        def before_step() -> None:
            # someone else may be filling the disk: check again before every step, for this
            # step and the finished ones still waiting in memory (see checkpoint.FLUSH_SECONDS)
            step = next(steps)
            waiting = self.backend.flushed_steps(step)
            fresh = sum(g.new_bytes(step, step + 1) for g in growth)
            try:
                check_room(path, _with_margin(fresh), purpose="the next MCMC step",
                           fix=_ROOM_FIX)
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

        self.backend.before_step = before_step
        try:
            with _checkpoint_writes(path), self.backend.session():
                self._sample(n_steps, pbar, stop_event)
        finally:
            self.backend.before_step = None

    def _sample(self, n_steps: int, pbar, stop_event) -> None:
        for state in self.sampler.sample(
            self.state, iterations=n_steps, skip_initial_state_check=True, store=True
        ):
            self.state = state
            pbar.update(1)
            if stop_event is not None and stop_event.is_set():
                raise _Stopped()

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


def _validate(n_walkers, max_steps, min_steps, check_every, autocorr_factor, n_ensembles,
              strict, space):
    def need(cond, key, msg):
        if not cond:
            raise ConfigError(msg, key=key)

    need(isinstance(n_walkers, (int, np.integer)) and n_walkers >= 2 * space.ndim, "n_walkers",
         f"n_walkers must be an int >= 2 x {space.ndim} parameters; got {n_walkers!r}")
    need(isinstance(max_steps, (int, np.integer)) and max_steps >= 1, "max_steps",
         f"max_steps must be a positive int; got {max_steps!r}")
    need(isinstance(check_every, (int, np.integer)) and check_every >= 2, "check_every",
         f"check_every must be an int >= 2; got {check_every!r}")
    need(isinstance(min_steps, (int, np.integer)) and 0 <= min_steps, "min_steps",
         f"min_steps must be a non-negative int; got {min_steps!r}")
    need(autocorr_factor > 0, "autocorr_factor",
         f"autocorr_factor must be > 0; got {autocorr_factor!r}")
    need(isinstance(n_ensembles, (int, np.integer)) and n_ensembles >= 1, "n_ensembles",
         f"n_ensembles must be a positive int; got {n_ensembles!r}")
    if strict:
        need(n_ensembles >= 4, "n_ensembles",
             f"strict mode needs n_ensembles >= 4 independently seeded ensembles; got "
             f"{n_ensembles}")


def _initial_positions(x0, space, n_walkers, n_ensembles):
    """A callable ``(ensemble index, rng) -> p0[W, P]`` from the accepted x0 forms."""
    if isinstance(x0, MapResult):
        return lambda e, rng: initial_ball(x0.x, x0.scale, n_walkers, rng, space)
    arr = np.asarray(x0, dtype=float)
    if arr.shape == (space.ndim,):
        scale = space.scales
        return lambda e, rng: initial_ball(arr, scale, n_walkers, rng, space)
    if arr.shape == (n_walkers, space.ndim):
        check_ensemble(arr, space)
        return lambda e, rng: arr.copy()
    if arr.shape == (n_ensembles, n_walkers, space.ndim):
        for e in range(n_ensembles):
            check_ensemble(arr[e], space)
        return lambda e, rng: arr[e].copy()
    raise FitError(
        f"x0 has shape {arr.shape}; expected a MapResult, a point ({space.ndim},), an "
        f"ensemble ({n_walkers}, {space.ndim}) or one per ensemble ({n_ensembles}, "
        f"{n_walkers}, {space.ndim})"
    )


def _describe_moves(moves) -> str:
    if moves is None:
        return "none"
    items = moves if isinstance(moves, (list, tuple)) else [moves]
    parts = []
    for item in items:
        if isinstance(item, tuple):
            parts.append(f"{type(item[0]).__name__}:{item[1]:g}")
        else:
            parts.append(type(item).__name__)
    return ", ".join(parts)


def run_ensemble(
    log_likelihood: Callable[[np.ndarray], np.ndarray],
    space: ParameterSpace,
    x0: MapResult | np.ndarray,
    *,
    n_walkers: int = 32,
    seed: int | np.random.SeedSequence | None = None,
    max_steps: int = 20000,
    min_steps: int = 500,
    check_every: int = 100,
    checkpoint: str | os.PathLike | None = None,
    resume: bool = False,
    progress: bool = True,
    strict: bool = False,
    n_ensembles: int | None = None,
    moves: Any = None,
    autocorr_factor: float = 25.0,
    log_prob_extras: Mapping[str, str] | Sequence[str] | None = None,
    stop_event: threading.Event | None = None,
    tau_rtol: float | None = None,
    acceptance_range: tuple[float, float] = (0.15, 0.7),
    nested_rhat_max: float = 1.01,
    ess_target: float = 1000.0,
    nuisance: Sequence[str] | None = None,
    nuisance_ess_target: float = 400.0,
    rhat_max: float = 1.01,
    walker_groups: int = 4,
    ess_rhat: bool = True,
    identity: Mapping[str, Any] | None = None,
    progress_label: str = "MCMC",
) -> SamplerOutput:
    """Sample the posterior with emcee until the convergence gate passes.

    Parameters
    ----------
    log_likelihood
        Vectorised ``theta[W, P] -> log L[W]``; the runner adds the log prior and
        evaluates the likelihood only inside the prior support.  NaN (or ``+inf``)
        raises :class:`~polkit.errors.FitError` naming the parameter values.  With
        ``log_prob_extras`` it returns ``(log L[W], extras[W, K])``.
    space
        Parameters and priors.
    x0
        A :class:`~polkit.inference.optimize.MapResult` (walkers in a ball of its
        curvature scale), a point ``(P,)`` (ball of 0.1 prior spreads), a starting
        ensemble ``(W, P)`` or one per ensemble ``(n_ensembles, W, P)``.
    n_walkers
        Walkers per ensemble (at least ``2 P``).
    seed
        ``int``, ``None`` (fresh entropy, recorded) or a :class:`~numpy.random.SeedSequence`.
        One child sequence is spawned per ensemble; the same seed gives bit-identical
        chains.
    max_steps, min_steps, check_every
        Step limits per ensemble and the spacing of convergence checks.
    checkpoint
        HDF5 file for the chains (one group per ensemble, ``ensemble0`` ...), written
        at every step.  An existing file is refused unless ``resume=True``.
    resume
        Continue the run stored in ``checkpoint`` (start one if the file does not
        exist).  The parameter names, walker count and seed must match; the other
        settings should too.  The continued chain equals an uninterrupted run's.  A run
        that stopped unconverged at its ``max_steps`` is continued when resumed with a
        larger ``max_steps`` (as if it had been started with that limit).
    progress
        Show a ``tqdm.auto`` progress bar.
    strict
        Run ``n_ensembles >= 4`` independently seeded ensembles one after another and
        also gate on nested R-hat <= ``nested_rhat_max`` (Margossian et al. 2022).
    n_ensembles
        Number of ensembles; default 1, or 4 in strict mode.
    moves
        emcee moves; default :func:`default_moves`.
    autocorr_factor
        Safety floor: the chain must be at least this many autocorrelation times long.
    log_prob_extras
        Names (``{name: units}`` or a list, units ``"1"``) of per-walker side results
        returned by the log-likelihood; they are stored with the chain and appear in
        :meth:`SamplerOutput.posterior_draws`.
    stop_event
        A :class:`threading.Event`; when set, sampling ends cleanly after the current
        step and the result is marked not converged (the checkpoint can be resumed).
    tau_rtol
        With a value, the autocorrelation time must also have changed by less than this
        (relative) since the previous check (the former rule; ``None``: not required).
    acceptance_range
        Allowed per-walker acceptance fraction after burn-in.
    nested_rhat_max
        Strict-mode limit on nested R-hat.
    ess_target
        Bulk and tail ESS each parameter's reported draws must reach (ArviZ, walkers as
        chains).  With several ensembles each must reach its share, ``ess_target /
        n_ensembles``, and the pooled draws the whole target.
    nuisance, nuisance_ess_target
        Parameters that are never reported for themselves (default: those whose name
        contains ``noise``) and their lower ESS target (``min(ess_target,
        nuisance_ess_target)``).
    rhat_max, walker_groups
        Limit on rank-normalised R-hat over ``walker_groups`` groups of the walkers of an
        ensemble (:func:`polkit.inference.diagnostics.grouped_rhat`).
    ess_rhat
        Compute ArviZ's bulk/tail ESS and R-hat for the diagnostics and gate on them
        (``False`` leaves them NaN and out of the gate: for a short preliminary run whose
        draws are not reported).
    identity
        ``{field: value}`` of what decides the posterior beyond the parameter space (input
        SHA-256, model, route, likelihood and preprocessing settings); with the effective
        priors and library versions it is stored in the checkpoint and must match on
        resume (see :mod:`polkit.inference.identity`).  Without a checkpoint it is unused.
    progress_label
        Label of the progress bar.

    The checkpoint's folder is locked for the run (:mod:`polkit.folder_lock`): a second
    run into the same folder is refused while this one is alive.

    Returns
    -------
    SamplerOutput
        With ``diagnostics`` holding ``converged``, ``steps``, ``walkers``,
        ``n_ensembles``, ``max_autocorr_time``, ``min_ess_bulk``, ``min_ess_tail``,
        ``max_rhat`` (walkers as chains: informational), ``nested_rhat`` (two or more
        ensembles), ``acceptance_fraction`` (mean), ``burn_in``, ``thin``,
        ``stuck_walkers``, ``reasons`` and the settings.

    Warns
    -----
    ConvergenceWarning
        When a gate failed, naming what failed.

    Raises
    ------
    FitError
        NaN log-likelihood, degenerate or zero-posterior starting ensemble.
    ConfigError
        Bad settings, or a checkpoint that belongs to another run.
    DataError
        The checkpoint's fit identity differs from this run's
        (:class:`~polkit.inference.identity.CheckpointMismatch`), or another run holds the
        folder (:class:`~polkit.folder_lock.FolderLockedError`).
    KeyboardInterrupt
        Passed on after the finished steps are safely in the checkpoint.
    """

    n_ens = n_ensembles if n_ensembles is not None else (4 if strict else 1)
    _validate(n_walkers, max_steps, min_steps, check_every, autocorr_factor, n_ens, strict,
              space)
    if log_prob_extras is None:
        extras_units: dict[str, str] = {}
    elif isinstance(log_prob_extras, Mapping):
        extras_units = {str(k): str(v) for k, v in log_prob_extras.items()}
    else:
        extras_units = {str(k): "1" for k in log_prob_extras}
    clash = sorted(set(extras_units) & set(space.names))
    if clash:
        raise ConfigError(f"extras {clash} share names with parameters", key="log_prob_extras")
    moves = default_moves() if moves is None else moves
    for key, value, ok, want in (
        ("ess_target", ess_target, ess_target > 0, "> 0"),
        ("nuisance_ess_target", nuisance_ess_target, nuisance_ess_target > 0, "> 0"),
        ("rhat_max", rhat_max, rhat_max >= 1.0, ">= 1"),
        ("walker_groups", walker_groups,
         isinstance(walker_groups, (int, np.integer)) and walker_groups >= 2, "an int >= 2"),
    ):
        if not ok:
            raise ConfigError(f"{key} must be {want}; got {value!r}", key=key)
    if nuisance is None:
        nuisance = [n for n in space.names if "noise" in n]
    gate_rule = _GateRule(
        autocorr_factor=float(autocorr_factor),
        tau_rtol=None if tau_rtol is None else float(tau_rtol),
        acceptance_range=tuple(acceptance_range),
        targets=diag.ess_targets(space.names, float(ess_target), list(nuisance),
                                 float(nuisance_ess_target)) if ess_rhat else None,
        n_ensembles=n_ens, rhat_max=float(rhat_max), walker_groups=int(walker_groups),
        check_every=int(check_every))

    path = Path(checkpoint) if checkpoint is not None else None
    with folder_lock(path.parent if path is not None else None):
        return _run(log_likelihood, space, x0, path, n_walkers, seed, max_steps, min_steps,
                    check_every, resume, progress, strict, n_ens, moves, gate_rule,
                    extras_units, stop_event, nested_rhat_max, ess_rhat, identity,
                    progress_label)


def _run(log_likelihood, space, x0, path, n_walkers, seed, max_steps, min_steps, check_every,
         resume, progress, strict, n_ens, moves, rule, extras_units, stop_event,
         nested_rhat_max, ess_rhat, identity, progress_label) -> SamplerOutput:
    from tqdm.auto import tqdm

    if path is not None:
        full = fit_identity(space, identity) if identity is not None else None
        root = _open_checkpoint(path, space, n_walkers, seed, resume, full)
    else:
        if resume:
            raise ConfigError("resume=True needs a checkpoint path", key="resume")
        root = root_seed(seed)
    children = root.spawn(n_ens)
    log_post = LogPosterior(log_likelihood, space, n_extras=len(extras_units))
    positions = _initial_positions(x0, space, n_walkers, n_ens)
    ensembles = [
        _Ensemble(e, log_post, space, n_walkers, moves, path, children[e],
                  n_extras=len(extras_units))
        for e in range(n_ens)
    ]
    if path is not None:  # every starting ensemble is stored before the first step
        for ens in ensembles:
            if ens.steps == 0 and _stored_start(path, ens.name) is None:
                _store_start(path, ens.name, positions(ens.index, ens.ball_rng))

    gate: dict[int, diag.GateCheck] = {}
    length = 0
    stopped = False
    pbar = tqdm(total=max_steps * n_ens, disable=not progress, desc=progress_label, unit="step",
                dynamic_ncols=True)
    try:
        # -- phase 1: each ensemble to its own gate ----------------------------------------
        for ens in ensembles:
            done = _group_attr(path, ens.name, "polkit_gate_steps")
            steps = ens.steps
            pbar.update(min(steps, max_steps))
            if done is not None:
                check = _gate_at(ens, int(done), space, rule)
                if check.passed or int(done) >= max_steps:
                    gate[ens.index] = check
                    continue
                # stopped at an earlier, smaller step limit without converging: a resume
                # with a larger max_steps continues it exactly as an uninterrupted run would
                log.info("%s: continuing a run stopped unconverged at %d steps", ens.name, done)
            ens.start(lambda ens=ens: positions(ens.index, ens.ball_rng), space)
            while True:
                n = ens.steps
                at_check = n > 0 and (
                    n >= max_steps or (n >= min_steps and n % check_every == 0)
                )
                if at_check:
                    check = _gate_at(ens, n, space, rule)
                    pbar.set_postfix_str(
                        f"ensemble {ens.index}, tau {np.nanmax(check.tau):.1f}", refresh=False
                    )
                    if check.passed or n >= max_steps:
                        gate[ens.index] = check
                        _group_attr(path, ens.name, "polkit_gate_steps", n)
                        break
                target = min(max_steps, (n // check_every + 1) * check_every)
                ens.advance(target - n, pbar, stop_event)
        # -- phase 2: common length (and nested R-hat in strict mode) -----------------------
        length = max(g.steps for g in gate.values())
        while True:
            for ens in ensembles:
                if ens.steps < length:
                    if ens.state is None:
                        ens.start(None, space)
                    ens.advance(length - ens.steps, pbar, stop_event)
            if (n_ens > 1 and length < max_steps and rule.targets is not None
                    and all(g.passed for g in gate.values())):
                chains = np.stack([ens.chain(length)[0] for ens in ensembles])
                _, burn, thin = _burn_thin(chains, length)
                kept = chains[:, burn::thin]
                short = _pooled_ess_short(kept, space.names, rule.targets)
                if short:
                    log.info("pooled ESS below the target at %d steps (%s); extending",
                             length, short)
                    length = min(max_steps, length + max(check_every, length // 2))
                    continue
                if strict:
                    rhat = float(np.max(diag.nested_rhat(_to_nested(kept))))
                    if not rhat <= nested_rhat_max:
                        log.info("nested R-hat %.4f at %d steps; extending", rhat, length)
                        length = min(max_steps, length + max(check_every, length // 2))
                        continue
            break
    except _Stopped:
        stopped = True
        log.info("sampling stopped on request")
    finally:
        pbar.close()

    return _collect(ensembles, gate, length, space, root, stopped, strict, n_walkers,
                    extras_units, moves, rule, nested_rhat_max, ess_rhat)


@dataclass(frozen=True)
class _GateRule:
    """The settings of the convergence gate (see :func:`diag.convergence_gate`)."""

    autocorr_factor: float
    tau_rtol: float | None
    acceptance_range: tuple[float, float]
    targets: dict[str, float] | None  # None: ESS and R-hat not gated (ess_rhat=False)
    n_ensembles: int
    rhat_max: float
    walker_groups: int
    check_every: int

    def per_ensemble(self) -> dict[str, float] | None:
        """Each ensemble's share of the ESS targets."""
        if self.targets is None:
            return None
        return {k: v / self.n_ensembles for k, v in self.targets.items()}


def _gate_at(ens, n, space, rule: _GateRule):
    chain, lp = ens.chain(n)
    prev_tau = None
    if rule.tau_rtol is not None:
        previous = n - rule.check_every
        prev_tau = ens.tau_at(previous) if previous >= 2 else None
    check = diag.convergence_gate(
        chain, lp, prev_tau, names=space.names, autocorr_factor=rule.autocorr_factor,
        tau_rtol=rule.tau_rtol, acceptance_range=rule.acceptance_range,
        ess_target=rule.per_ensemble(), rhat_max=rule.rhat_max,
        walker_groups=rule.walker_groups,
    )
    ens.taus[n] = check.tau
    log.debug("%s at %d steps: %s", ens.name, n, "; ".join(check.reasons) or "passed")
    return check


def _pooled_ess_short(kept: np.ndarray, names, targets) -> str:
    """Parameters whose pooled bulk or tail ESS over (E, D, W, P) draws is below target."""
    e, d, w, p = kept.shape
    pooled = np.moveaxis(kept, 2, 1).reshape(e * w, d, p)  # chains = ensemble-major walkers
    ds = diag._draws_dataset(np.moveaxis(pooled, 0, 1), names)
    found = diag.arviz_diagnostics(ds)
    return ", ".join(
        f"{n} {min(found['ess_bulk'][n], found['ess_tail'][n]):.0f}" for n in names
        if not min(found["ess_bulk"][n], found["ess_tail"][n]) >= targets[n])


def _burn_thin(chains: np.ndarray, length: int) -> tuple[np.ndarray, int, int]:
    """Autocorrelation times (E, P), burn-in (5 tau, at most half) and thin (tau / 2)."""
    taus = np.stack([diag.autocorr_time(c[length // 4 : length]) for c in chains])
    burn, thin = diag.burn_and_thin(float(np.max(taus)), length)
    return taus, burn, thin


def _to_nested(kept: np.ndarray) -> np.ndarray:
    """(E, D, W, P) -> (K=E, M=W, N=D, P) for nested R-hat."""
    return np.moveaxis(kept, 2, 1)


def _collect(ensembles, gate, length, space, root, stopped, strict, n_walkers, extras_units,
             moves, rule, nested_rhat_max, ess_rhat=True) -> SamplerOutput:
    reasons: list[str] = []
    available = [ens for ens in ensembles if ens.steps > 0]
    if not available:
        raise FitError("sampling stopped before the first step was stored; nothing to report")
    if stopped:
        reasons.append("stopped on request before the convergence gate was passed")
        lengths = [ens.steps for ens in available]
        length = min(lengths)
        if len(set(lengths)) > 1:
            reasons.append(
                f"ensembles had {lengths} steps; all cut to {length} (the checkpoint keeps "
                "every step)"
            )
    else:
        for ens in ensembles:
            g = gate[ens.index]
            if not g.passed:
                prefix = f"ensemble {ens.index}: " if len(ensembles) > 1 else ""
                reasons.extend(prefix + r for r in g.reasons)
                reasons.append(prefix + f"stopped at max_steps = {g.steps}")
    stored = [ens.chain(length) for ens in available]
    chains = np.stack([c for c, _ in stored])
    log_prob = np.stack([lp for _, lp in stored])
    extras = {}
    if extras_units:
        blobs = []
        for ens in available:
            b = np.asarray(ens.backend.get_blobs(), dtype=float)[:length]
            blobs.append(b.reshape(b.shape[0], b.shape[1], -1))
        blobs = np.stack(blobs)
        extras = {name: blobs[..., k] for k, name in enumerate(extras_units)}

    taus, burn, thin = _burn_thin(chains, length)
    acceptance = np.stack([diag.walker_acceptance(c[burn:]) for c in chains])
    stuck = []
    for e in range(chains.shape[0]):
        for w in diag.stuck_walkers(acceptance[e], log_prob[e, burn:], space.ndim):
            stuck.append([e, int(w)])
    if stuck and not stopped:
        reasons.append(f"stuck walkers after burn-in (ensemble, walker): {stuck[:10]}")

    output = SamplerOutput(
        space=space, chains=chains, log_prob=log_prob, acceptance=acceptance,
        autocorr_time=taus, burn_in=burn, thin=thin, converged=False, reasons=reasons,
        diagnostics={}, seed_entropy=_entropy_int(root),
        seed_spawn_key=tuple(int(k) for k in root.spawn_key), extras=extras,
        extras_units=extras_units,
    )
    reuse = (gate.get(0) if len(available) == 1 and not stopped else None)
    group_rhat = None
    if reuse is not None and reuse.steps == length and reuse.ess is not None:
        # the gate's last check saw exactly these draws: its ArviZ numbers are reused
        az_diag, group_rhat = reuse.ess, reuse.group_rhat
    elif ess_rhat:
        az_diag = diag.arviz_diagnostics(output.posterior_draws()[space.names])
    else:
        nan = {name: math.nan for name in space.names}
        az_diag = {"ess_bulk": nan, "ess_tail": dict(nan), "rhat": dict(nan),
                   "min_ess_bulk": math.nan, "min_ess_tail": math.nan, "max_rhat": math.nan}
    nested = None
    if len(available) >= 2:
        nested_values = diag.nested_rhat(_to_nested(chains[:, burn::thin]))
        nested = float(np.max(nested_values))
        if strict and not stopped and not nested <= nested_rhat_max:
            reasons.append(
                f"nested R-hat {nested:.4f} > {nested_rhat_max:g} over {len(available)} "
                f"ensembles at max_steps = {length}"
            )
    converged = not reasons
    tau_by_name = {n: float(np.max(taus[:, j])) for j, n in enumerate(space.names)}
    diagnostics = {
        "converged": converged,
        "steps": int(length),
        "walkers": int(n_walkers),
        "n_ensembles": len(available),
        "max_autocorr_time": float(np.max(taus)),
        "autocorr_time": tau_by_name,
        "min_ess_bulk": az_diag["min_ess_bulk"],
        "min_ess_tail": az_diag["min_ess_tail"],
        "max_rhat": az_diag["max_rhat"],
        "ess_bulk": az_diag["ess_bulk"],
        "ess_tail": az_diag["ess_tail"],
        "rhat": az_diag["rhat"],
        "rhat_note": "R-hat over walkers of one ensemble is informational (walkers are not "
        "independent chains); strict mode gates on nested R-hat across ensembles",
        "nested_rhat": nested,
        "acceptance_fraction": float(np.mean(acceptance)),
        "acceptance_min": float(np.min(acceptance)),
        "acceptance_max": float(np.max(acceptance)),
        "burn_in": int(burn),
        "thin": int(thin),
        "draws": int(output.posterior_draws().sizes["draw"] * chains.shape[0] * n_walkers),
        "stuck_walkers": stuck,
        "reasons": list(reasons),
        "strict": bool(strict),
        "stopped": bool(stopped),
        "moves": _describe_moves(moves),
        "autocorr_factor": rule.autocorr_factor,
        "tau_rtol": rule.tau_rtol,
        "ess_target": dict(rule.targets) if rule.targets is not None else None,
        "group_rhat": group_rhat,
        "group_rhat_max": rule.rhat_max,
        "walker_groups": rule.walker_groups,
        "acceptance_range": [float(a) for a in rule.acceptance_range],
        "nested_rhat_max": float(nested_rhat_max),
        "seed_entropy": str(output.seed_entropy),
        "seed_spawn_key": list(output.seed_spawn_key),
    }
    output.converged = converged
    output.diagnostics = diagnostics
    if converged:
        log.info("converged after %d steps (tau max %.1f, min bulk ESS %.0f)", length,
                 diagnostics["max_autocorr_time"], diagnostics["min_ess_bulk"])
    else:
        warnings.warn(
            "MCMC did not converge: " + "; ".join(reasons), ConvergenceWarning, stacklevel=4
        )
    return output

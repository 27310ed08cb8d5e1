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

Where the pieces live: the HDF5 checkpoint (its layout and room checks) in
:mod:`polkit.inference.checkpoint` and its step writes in
:mod:`polkit.inference.checkpoint_backend`; one ensemble in :mod:`polkit.inference.ensemble`;
the gate rule and the run plan in :mod:`polkit.inference.plan`; the output and its
diagnostics in :mod:`polkit.inference.collect` and :mod:`polkit.inference.output`.
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable, Mapping, Sequence
from pathlib import Path
from typing import Any

import numpy as np

from polkit.errors import ConfigError, FitError
from polkit.folder_lock import folder_lock
from polkit.inference import diagnostics as diag
from polkit.inference.checkpoint import Checkpoint, root_seed
from polkit.inference.collect import collect
from polkit.inference.ensemble import Ensemble, Stopped
from polkit.inference.identity import fit_identity
from polkit.inference.optimize import MapResult, check_ensemble, initial_ball
from polkit.inference.output import SamplerOutput
from polkit.inference.plan import GateRule, RunPlan, check_gate_settings, gate_at
from polkit.inference.posterior import LogPosterior
from polkit.inference.priors import ParameterSpace
from polkit.inference.settings import SamplerSettings

__all__ = ["SamplerOutput", "run_ensemble", "default_moves"]

log = logging.getLogger(__name__)

#: run_ensemble's own defaults for the settings a job leaves ``None``
_DEFAULTS = {"n_walkers": 32, "max_steps": 20000, "min_steps": 500}


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


def _extras_units(log_prob_extras, space) -> dict[str, str]:
    """``{name: units}`` of the log-likelihood's side results, refused when they clash."""
    if log_prob_extras is None:
        extras_units: dict[str, str] = {}
    elif isinstance(log_prob_extras, Mapping):
        extras_units = {str(k): str(v) for k, v in log_prob_extras.items()}
    else:
        extras_units = {str(k): "1" for k in log_prob_extras}
    clash = sorted(set(extras_units) & set(space.names))
    if clash:
        raise ConfigError(f"extras {clash} share names with parameters", key="log_prob_extras")
    return extras_units


def _plan(settings, space, log_prob_extras, nuisance) -> RunPlan:
    """The run's settings resolved and checked (:class:`ConfigError` naming a bad one)."""
    s = SamplerSettings.of(settings).with_defaults(**_DEFAULTS)
    gate = s.gate
    n_ens = s.n_ensembles if s.n_ensembles is not None else (4 if s.strict else 1)
    _validate(s.n_walkers, s.max_steps, s.min_steps, s.check_every, gate.autocorr_factor,
              n_ens, s.strict, space)
    extras_units = _extras_units(log_prob_extras, space)
    moves = default_moves() if s.moves is None else s.moves
    check_gate_settings(gate)
    if nuisance is None:
        nuisance = [n for n in space.names if "noise" in n]
    rule = GateRule.of(gate, space.names, nuisance, n_ens, s.check_every)
    return RunPlan(settings=s, n_ensembles=n_ens, moves=moves, rule=rule,
                   extras_units=extras_units)


def run_ensemble(
    log_likelihood: Callable[[np.ndarray], np.ndarray],
    space: ParameterSpace,
    x0: MapResult | np.ndarray,
    settings: SamplerSettings | Mapping[str, Any] | None = None,
    *,
    seed: int | np.random.SeedSequence | None = None,
    checkpoint: str | os.PathLike | None = None,
    resume: bool = False,
    log_prob_extras: Mapping[str, str] | Sequence[str] | None = None,
    nuisance: Sequence[str] | None = None,
    identity: Mapping[str, Any] | None = None,
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
    settings
        :class:`~polkit.inference.SamplerSettings` (or a dict of its fields); ``None``
        walkers and step limits mean 32 walkers, 20000 and 500 steps.  ``strict`` runs
        ``n_ensembles >= 4`` ensembles one after another, also gated on nested R-hat
        (Margossian et al. 2022).  The gate (:class:`~polkit.inference.GateSettings`):
        with several ensembles each must reach ``ess_target / n_ensembles`` and the
        pooled draws the whole target; ``ess_rhat=False`` leaves ESS and R-hat NaN and
        out of the gate (a preliminary run whose draws are not reported).
    seed
        ``int``, ``None`` (fresh entropy, recorded) or a :class:`~numpy.random.SeedSequence`.
        One child sequence is spawned per ensemble; the same seed gives bit-identical
        chains.
    checkpoint
        HDF5 file for the chains (one group per ensemble, ``ensemble0`` ...), written
        at every step.  An existing file is refused unless ``resume=True``.
    resume
        Continue the run stored in ``checkpoint`` (start one if the file does not
        exist).  The parameter names, walker count and seed must match; the other
        settings should too.  The continued chain equals an uninterrupted run's.  A run
        that stopped unconverged at its ``max_steps`` is continued when resumed with a
        larger ``max_steps`` (as if it had been started with that limit).
    log_prob_extras
        Names (``{name: units}`` or a list, units ``"1"``) of per-walker side results
        returned by the log-likelihood; they are stored with the chain and appear in
        :meth:`SamplerOutput.posterior_draws`.
    nuisance
        Parameters that are never reported for themselves (default: those whose name
        contains ``noise``); their ESS target is ``min(ess_target, nuisance_ess_target)``
        of ``settings.gate``.
    identity
        ``{field: value}`` of what decides the posterior beyond the parameter space (input
        SHA-256, model, route, likelihood and preprocessing settings); with the effective
        priors and library versions it is stored in the checkpoint and must match on
        resume (see :mod:`polkit.inference.identity`).  Without a checkpoint it is unused.

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
    plan = _plan(settings, space, log_prob_extras, nuisance)
    path = Path(checkpoint) if checkpoint is not None else None
    with folder_lock(path.parent if path is not None else None):
        return _run(log_likelihood, space, x0, path, seed, resume, identity, plan)


def _run(log_likelihood, space, x0, path, seed, resume, identity,
         plan: RunPlan) -> SamplerOutput:
    from tqdm.auto import tqdm

    s, n_ens = plan.settings, plan.n_ensembles
    if path is not None:
        full = fit_identity(space, identity) if identity is not None else None
        ckpt, root = Checkpoint.open(path, space, s.n_walkers, seed, resume, full)
    else:
        if resume:
            raise ConfigError("resume=True needs a checkpoint path", key="resume")
        ckpt, root = None, root_seed(seed)
    children = root.spawn(n_ens)
    log_post = LogPosterior(log_likelihood, space, n_extras=len(plan.extras_units))
    positions = _initial_positions(x0, space, s.n_walkers, n_ens)
    ensembles = [
        Ensemble(e, log_post, space, s.n_walkers, plan.moves, ckpt, children[e],
                 n_extras=len(plan.extras_units))
        for e in range(n_ens)
    ]
    if ckpt is not None:  # every starting ensemble is stored before the first step
        for ens in ensembles:
            if ens.steps == 0 and ens.stored_start() is None:
                ckpt.store_start(ens.name, positions(ens.index, ens.ball_rng))

    gate: dict[int, diag.GateCheck] = {}
    length = 0
    stopped = False
    pbar = tqdm(total=s.max_steps * n_ens, disable=not s.progress, desc=s.progress_label,
                unit="step", dynamic_ncols=True)
    try:
        for ens in ensembles:
            _own_gate(ens, positions, space, plan, gate, pbar)
        length = _common_length(ensembles, gate, space, plan, pbar)
    except Stopped:
        stopped = True
        log.info("sampling stopped on request")
    finally:
        pbar.close()

    return collect(ensembles, gate, length, space, root, stopped, plan)


def _own_gate(ens: Ensemble, positions, space, plan: RunPlan, gate: dict, pbar) -> None:
    """Phase 1: run one ensemble until its own gate passes or ``max_steps``; the check
    goes into ``gate``."""
    s, rule, ckpt = plan.settings, plan.rule, ens.checkpoint
    max_steps, min_steps, check_every = s.max_steps, s.min_steps, s.check_every
    done = ckpt.gate_steps(ens.name) if ckpt is not None else None
    steps = ens.steps
    pbar.update(min(steps, max_steps))
    if done is not None:
        check = gate_at(ens, int(done), space, rule)
        if check.passed or int(done) >= max_steps:
            gate[ens.index] = check
            return
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
            check = gate_at(ens, n, space, rule)
            pbar.set_postfix_str(
                f"ensemble {ens.index}, tau {np.nanmax(check.tau):.1f}", refresh=False
            )
            if check.passed or n >= max_steps:
                gate[ens.index] = check
                if ckpt is not None:
                    ckpt.record_gate_steps(ens.name, n)
                break
        target = min(max_steps, (n // check_every + 1) * check_every)
        ens.advance(target - n, pbar, s.stop_event)


def _common_length(ensembles, gate: dict, space, plan: RunPlan, pbar) -> int:
    """Phase 2: every ensemble continued to a common length, grown (with several
    ensembles) until the pooled ESS and, in strict mode, nested R-hat pass."""
    s, rule = plan.settings, plan.rule
    length = max(g.steps for g in gate.values())
    while True:
        for ens in ensembles:
            if ens.steps < length:
                if ens.state is None:
                    ens.start(None, space)
                ens.advance(length - ens.steps, pbar, s.stop_event)
        if (plan.n_ensembles > 1 and length < s.max_steps and rule.targets is not None
                and all(g.passed for g in gate.values())):
            chains = np.stack([ens.chain(length)[0] for ens in ensembles])
            why = plan.shortfall(chains, length, space.names)
            if why is not None:
                log.info("%s; extending", why)
                length = plan.next_length(length)
                continue
        return length

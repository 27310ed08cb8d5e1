"""Steps that every job and every panel takes alike, whatever the physics.

* a starting value just inside a parameter's prior support (:func:`clip_into`);
* the sampler's step limits from a job's defaults and the caller's options
  (:func:`step_limits`) and the ensemble size (:func:`walker_count`);
* the checkpoint file of an output folder, with the fresh-run / resume rule
  (:func:`checkpoint_file`);
* a short pre-burn that moves straggling walkers onto good ones (:func:`preburn`);
* the sampler run of a problem from its mode (:func:`sample_problem`) and its draws as
  parameter vectors (:func:`posterior_theta`);
* the SHA-256 of an input file for the provenance (:func:`file_sha256`).
"""

from __future__ import annotations

import hashlib
import logging
import os
import threading
import warnings
from collections.abc import Callable, Mapping
from pathlib import Path

import numpy as np

from ..errors import ConvergenceWarning, PolkitError
from ..inference import MapResult, SamplerOutput, run_ensemble

__all__ = [
    "CHECKPOINT",
    "clip_into",
    "step_limits",
    "walker_count",
    "checkpoint_file",
    "preburn",
    "sample_problem",
    "posterior_theta",
    "file_sha256",
]

log = logging.getLogger(__name__)

#: name of the HDF5 checkpoint inside a job's output folder
CHECKPOINT = "chains.h5"


def file_sha256(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file (provenance of every result)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def clip_into(param, value: float, *, keep_inside: bool = True,
              log_margin: bool = False) -> float:
    """A starting value strictly inside the prior support of ``param``.

    Parameters
    ----------
    param
        A :class:`~polkit.inference.Parameter` (its ``prior.bounds`` and ``prior.kind``).
    value
        The wished value, in the parameter's units; NaN or infinite means "no idea" and
        gives the centre of a finite support (1.0 otherwise).
    keep_inside
        Return a value already strictly inside the support unchanged.  ``False`` also moves
        values within ``1e-6`` of the support's width from an edge to that margin.
    log_margin
        Leave a log-uniform support by a relative margin (``lo (1 + 1e-6)``,
        ``hi (1 - 1e-6)``) instead of a fraction of its width.

    Returns
    -------
    float
        The value to start from.
    """
    lo, hi = param.prior.bounds
    if not np.isfinite(value):
        value = 0.5 * (lo + hi) if np.isfinite(lo) and np.isfinite(hi) else 1.0
    if keep_inside and lo < value < hi:
        return float(value)
    if log_margin and param.prior.kind == "loguniform":
        return float(np.clip(value, lo * (1 + 1e-6), hi * (1 - 1e-6)))
    eps = 1e-6 * (hi - lo) if np.isfinite(hi - lo) else 1e-6
    return float(np.clip(value, lo + eps, hi - eps))


def step_limits(defaults: Mapping[str, int], max_steps: int | None = None,
                min_steps: int | None = None) -> dict[str, int]:
    """Sampler limits ``{max_steps, min_steps, check_every}`` from a job's defaults.

    A smaller ``max_steps`` lowers the default ``min_steps`` with it; an explicit
    ``min_steps`` wins; the convergence check is never spaced wider than ``max_steps``.
    """
    steps = dict(defaults)
    if max_steps is not None:
        steps["max_steps"] = int(max_steps)
        steps["min_steps"] = min(steps["min_steps"], int(max_steps))
    if min_steps is not None:
        steps["min_steps"] = int(min_steps)
    steps["check_every"] = min(steps["check_every"], steps["max_steps"])
    return steps


def walker_count(n_walkers: int | None, space) -> int:
    """The ensemble size: ``n_walkers`` if given, else ``max(32, 4 P)`` for ``P`` parameters."""
    return n_walkers or max(32, 4 * len(space))


def checkpoint_file(out: str | os.PathLike | None, resume: bool, *,
                    refusal: PolkitError) -> Path | None:
    """The checkpoint of the output folder ``out`` (``None`` without a folder).

    A fresh run (``resume=False``) deletes an old checkpoint explicitly; ``resume`` without
    a folder raises ``refusal`` (the job's own error, naming its option).
    """
    checkpoint = (Path(out) / CHECKPOINT) if out is not None else None
    if resume and checkpoint is None:
        raise refusal
    if checkpoint is not None and checkpoint.exists() and not resume:
        checkpoint.unlink()
    return checkpoint


def preburn(log_likelihood: Callable, space, start, n_walkers: int, seed,
            max_steps: int) -> np.ndarray:
    """A short burn-in from the MAP ball, then stragglers replaced: the starting ensemble.

    A walker that starts in a poor local mode can stay there for the whole run (the moves
    of an affine-invariant ensemble rarely carry it across).  After ``n`` steps, walkers
    whose log posterior lies more than ``10 max(MAD, 1)`` below the median are moved onto
    copies of good walkers with a small jitter (1e-3 of the ensemble spread), as is common
    practice for ensemble samplers.  Deterministic for a given seed (its own spawned seed).
    # common practice, no published source

    Parameters
    ----------
    log_likelihood
        The vectorised log-likelihood the run will sample.
    space
        Its :class:`~polkit.inference.ParameterSpace`.
    start
        The mode (a :class:`~polkit.inference.MapResult`) the ball is drawn around.
    n_walkers
        Ensemble size.
    seed
        The run's root seed (an int or a :class:`numpy.random.SeedSequence`).
    max_steps
        The run's step limit: the pre-burn takes a fifth of it, between 50 and 300 steps.

    Returns
    -------
    numpy.ndarray
        Walker positions, shape ``(n_walkers, P)``.
    """
    n = int(min(300, max(50, max_steps // 5)))
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    pre_seed = np.random.SeedSequence(root.entropy, spawn_key=(*root.spawn_key, 0xB0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # short on purpose
        out = run_ensemble(
            log_likelihood,
            space,
            start,
            n_walkers=n_walkers,
            seed=pre_seed,
            max_steps=n,
            min_steps=n,
            check_every=n,
            progress=False,
            ess_rhat=False,  # its draws only seed the run
        )
    pos = out.chains[0, -1].copy()
    lp = out.log_prob[0, -1]
    med = np.median(lp)
    mad = 1.4826 * np.median(np.abs(lp - med))
    bad = ~(lp >= med - 10.0 * max(mad, 1.0))
    if bad.any():
        rng = np.random.default_rng(pre_seed.spawn(1)[0])
        good = np.flatnonzero(~bad)
        spread = np.std(pos[good], axis=0) + 1e-12
        donors = rng.choice(good, size=int(bad.sum()))
        pos[bad] = pos[donors] + 1e-3 * spread * rng.standard_normal((int(bad.sum()), pos.shape[1]))
        lo, hi = space.bounds.T
        pos[bad] = np.clip(pos[bad], lo + 1e-12 * (hi - lo), hi - 1e-12 * (hi - lo))
        log.info("pre-burn: %d straggling walker(s) moved onto good ones", int(bad.sum()))
    return pos


def sample_problem(
    problem,
    start: MapResult | np.ndarray,
    *,
    steps: Mapping[str, int],
    log_likelihood: Callable[[np.ndarray], np.ndarray] | None = None,
    n_walkers: int | None = None,
    seed: int | np.random.SeedSequence | None = None,
    pre_burn: bool = False,
    checkpoint: Path | None = None,
    resume: bool = False,
    progress: bool = True,
    strict: bool = False,
    stop_event: threading.Event | None = None,
) -> SamplerOutput:
    """Sample a job's posterior with emcee from a mode.

    Parameters
    ----------
    problem
        The job's problem: its ``space`` and, by default, its ``log_likelihood``.
    start
        The mode to start from (a :class:`~polkit.inference.MapResult`).
    steps
        ``{max_steps, min_steps, check_every}`` (see :func:`step_limits`).
    log_likelihood
        The likelihood to sample instead (another path's, or one wrapped to count steps).
    n_walkers
        Ensemble size (default ``max(32, 4 P)``).
    seed
        Root seed, recorded in the result; with ``pre_burn`` and no seed, a fresh one.
    pre_burn
        Start from a short pre-burn with straggling walkers moved onto good ones
        (:func:`preburn`); skipped when resuming a checkpoint.
    checkpoint, resume, progress, strict, stop_event
        As in :func:`polkit.inference.run_ensemble`.

    Returns
    -------
    SamplerOutput
    """
    like = problem.log_likelihood if log_likelihood is None else log_likelihood
    space = problem.space
    steps = dict(steps)
    walkers = walker_count(n_walkers, space)
    if pre_burn and not (resume and checkpoint is not None and checkpoint.exists()):
        if seed is None:  # one recorded root for the pre-burn and the run
            seed = np.random.SeedSequence()
        start = preburn(like, space, start, walkers, seed, steps["max_steps"])
    return run_ensemble(like, space, start, n_walkers=walkers, seed=seed, checkpoint=checkpoint,
                        resume=resume, progress=progress, strict=strict, stop_event=stop_event,
                        **steps)


def posterior_theta(output: SamplerOutput, space) -> np.ndarray:
    """The stored draws of a run as parameter vectors, shape ``(chain, draw, P)``."""
    post = output.posterior_draws()
    return np.stack([post[n].values for n in space.names], axis=-1)

"""Steps that every job and every panel takes alike, whatever the physics.

* a starting value just inside a parameter's prior support (:func:`clip_into`);
* the sampler's step limits from a job's defaults and the caller's options
  (:func:`step_limits`) and the ensemble size (:func:`walker_count`);
* the checkpoint file of an output folder, with the fresh-run / resume rule
  (:func:`checkpoint_file`);
* a short pre-burn that moves straggling walkers onto good ones (:func:`preburn`);
* the sampler run of a problem from its mode (:func:`sample_problem`) and its draws as
  parameter vectors (:func:`posterior_theta`);
* the quick answer at the mode, before MCMC (:func:`quick_answer`, the Laplace summary of
  :mod:`polkit.inference.laplace`, written as ``quick_summary.json``);
* the SHA-256 of an input file for the provenance (:func:`polkit.files.file_sha256`);
* one writer per output folder: a job decorated with :func:`locks_output` holds the lock
  of its ``out`` folder (:mod:`polkit.folder_lock`) for the whole call.
"""

from __future__ import annotations

import dataclasses
import functools
import inspect
import logging
import os
import warnings
from collections.abc import Callable, Mapping
from pathlib import Path

import numpy as np

from polkit.errors import ConvergenceWarning, PolkitError
from polkit.folder_lock import folder_lock
from polkit.inference import (
    GateSettings,
    MapResult,
    SamplerOutput,
    SamplerSettings,
    laplace,
    run_ensemble,
)
from polkit.inference.checkpoint import prepare_checkpoint, start_stored

__all__ = [
    "CHECKPOINT",
    "clip_into",
    "step_limits",
    "walker_count",
    "checkpoint_file",
    "preburn",
    "sample_problem",
    "posterior_theta",
    "quick_answer",
    "QUICK_SUMMARY",
    "locks_output",
    "job_identity",
    "warn_large_map",
    "LARGE_MAP_PIXELS",
]

log = logging.getLogger(__name__)

#: name of the HDF5 checkpoint inside a job's output folder
CHECKPOINT = "chains.h5"
#: name of the quick (Laplace) answer inside a job's output folder
QUICK_SUMMARY = "quick_summary.json"


def quick_answer(problem, start: MapResult, *, log_likelihood: Callable | None = None,
                 out: str | os.PathLike | None = None, required: bool = True) -> dict:
    """The Laplace summary at the mode, logged and (with ``out``) saved as quick_summary.json.

    Labelled :data:`polkit.inference.laplace.LABEL` wherever it appears.  The summary is
    JSON-ready (see :func:`polkit.inference.laplace.laplace_summary`); every value has its
    ``units``.  With ``out`` it is written atomically to ``out/quick_summary.json``; when that
    fails, the :class:`OSError` is raised if ``required`` (the quick answer is the result),
    else logged (a full run goes on).
    """
    from polkit.files import write_json

    like = problem.log_likelihood if log_likelihood is None else log_likelihood
    summary = laplace.laplace_summary(like, problem.space, start)
    log.info("%s", laplace.format_quick(summary))
    if out is not None:
        try:
            Path(out).mkdir(parents=True, exist_ok=True)
            write_json(Path(out) / QUICK_SUMMARY, summary)
        except OSError as exc:
            if required:
                raise
            # before a full run the quick answer is a courtesy: the run goes on, and a disk
            # that is really full stops it with the checkpoint's own clear error
            log.warning("quick answer not saved: %s", exc)
    return summary


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


def job_sampler(defaults: Mapping[str, int],
                sampler: SamplerSettings | Mapping | None = None) -> SamplerSettings:
    """``sampler`` with its step limits resolved against a job's defaults (:func:`step_limits`)."""
    sampler = SamplerSettings.of(sampler)
    steps = step_limits(defaults, sampler.max_steps, sampler.min_steps)
    return dataclasses.replace(sampler, **steps)


def walker_count(n_walkers: int | None, space) -> int:
    """The ensemble size: ``n_walkers`` if given, else ``max(32, 4 P)`` for ``P`` parameters."""
    return n_walkers or max(32, 4 * len(space))


def job_identity(input_sha256: str, model: str, route: str, likelihood: str | None,
                 preprocessing: Mapping[str, object] | None = None) -> dict[str, object]:
    """A job's part of the fit identity (see :mod:`polkit.inference.identity`).

    ``input_sha256`` of the input, ``model`` (with anything that selects the spectral
    model), ``route`` (``peak_table`` / ``whole_map`` / the job's only route), the
    ``likelihood`` (noise-model note) and the ``preprocessing`` settings (crop windows,
    loader options; stored as sorted JSON).
    """
    return {"input_sha256": str(input_sha256), "model": str(model), "route": str(route),
            "likelihood": "" if likelihood is None else str(likelihood),
            "preprocessing": dict(preprocessing or {})}


#: a map with more pixels than this gets a warning before the fit starts: at 2e6 pixels one
#: step of 32 walkers takes about 0.13 s, so a 10000-step run about 20 minutes
LARGE_MAP_PIXELS = 2_000_000
#: the whole-map likelihood's cost, seconds per pixel per walker per step (measured: 1.2 to
#: 2.1 ns on a 2-core machine with 5e5 and 1e6-pixel maps; the larger value is used)
_SECONDS_PER_PIXEL_WALKER = 2.1e-9
#: memory of a whole-map fit per pixel (measured: about 370 MB in all at 1e6 pixels)
_BYTES_PER_PIXEL = 250


def warn_large_map(da, *, n_walkers: int = 32, max_steps: int = 10000) -> bool:
    """Warn (:class:`~polkit.errors.DataWarning`) when a map is too large to fit as it is.

    Called as soon as the map is loaded, before the slow stages: the warning states the
    pixel count, the expected time per step and for ``max_steps`` steps, the memory, and
    how to bin the map first (:func:`polkit.data.bin_map`; the command line has no
    binning option).  Returns whether it warned.
    """
    from polkit.errors import DataWarning

    n = int(np.prod([da.sizes[d] for d in da.dims]))
    if n <= LARGE_MAP_PIXELS:
        return False
    per_step = n * n_walkers * _SECONDS_PER_PIXEL_WALKER
    total = per_step * max_steps
    memory = n * _BYTES_PER_PIXEL / 1e9
    factor = int(np.ceil(n / (LARGE_MAP_PIXELS / 2)))
    n_energy = int(da.sizes.get("energy", 1))
    f_energy = int(min(factor, max(1, n_energy // 200)))
    f_axis = int(np.ceil(factor / f_energy))
    axis = next((d for d in da.dims if d != "energy"), "angle")
    source = da.attrs.get("source", "the map")
    warnings.warn(
        f"{source}: the map has {n:,} pixels (more than {LARGE_MAP_PIXELS:,}); a whole-map "
        f"fit takes about {per_step:.2f} s per step with {n_walkers} walkers (up to "
        f"{total / 3600:.1f} h for {max_steps} steps, after minutes of preparation) and "
        f"about {memory:.1f} GB of memory. Fix: bin the map first, e.g. in Python "
        f"polkit.files.write_netcdf('binned.nc', polkit.data.bin_map(polkit.load_map(FILE), "
        f"{axis}={f_axis}, energy={f_energy})), then fit binned.nc",
        DataWarning, stacklevel=3)
    return True


def locks_output(job: Callable) -> Callable:
    """Hold the lock of the job's ``out`` folder (when given) for the whole call.

    A second run into the same folder is refused while the first is alive (see
    :mod:`polkit.folder_lock`), before it deletes, resumes or overwrites anything.
    """
    signature = inspect.signature(job)

    @functools.wraps(job)
    def locked(*args, **kwargs):
        out = signature.bind_partial(*args, **kwargs).arguments.get("out")
        with folder_lock(out):
            return job(*args, **kwargs)

    return locked


def checkpoint_file(out: str | os.PathLike | None, resume: bool, *,
                    refusal: PolkitError) -> Path | None:
    """The checkpoint of the output folder ``out`` (``None`` without a folder).

    A fresh run (``resume=False``) deletes an old checkpoint explicitly, holding the
    folder's lock (:mod:`polkit.folder_lock`) so that it can never be a live run's;
    ``resume`` without a folder raises ``refusal`` (the job's own error, naming its option).
    """
    checkpoint = (Path(out) / CHECKPOINT) if out is not None else None
    if resume and checkpoint is None:
        raise refusal
    if checkpoint is not None and checkpoint.exists() and not resume:
        with folder_lock(checkpoint.parent):
            checkpoint.unlink()
    return checkpoint


def preburn(log_likelihood: Callable, space, start, n_walkers: int, seed,
            max_steps: int, *, progress: bool = False) -> np.ndarray:
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
    progress
        Show its own progress bar (labelled ``pre-burn``).

    Returns
    -------
    numpy.ndarray
        Walker positions, shape ``(n_walkers, P)``.
    """
    n = int(min(300, max(50, max_steps // 5)))
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    pre_seed = np.random.SeedSequence(root.entropy, spawn_key=(*root.spawn_key, 0xB0))
    log.info("pre-burn: %d steps of %d walkers", n, n_walkers)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # short on purpose
        out = run_ensemble(
            log_likelihood,
            space,
            start,
            SamplerSettings(n_walkers=n_walkers, max_steps=n, min_steps=n, check_every=n,
                            progress=progress, progress_label="pre-burn",
                            gate=GateSettings(ess_rhat=False)),  # its draws only seed the run
            seed=pre_seed,
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
    sampler: SamplerSettings,
    log_likelihood: Callable[[np.ndarray], np.ndarray] | None = None,
    seed: int | np.random.SeedSequence | None = None,
    pre_burn: bool = False,
    checkpoint: Path | None = None,
    resume: bool = False,
    identity: Mapping[str, object] | None = None,
) -> SamplerOutput:
    """Sample a job's posterior with emcee from a mode.

    Parameters
    ----------
    problem
        The job's problem: its ``space`` and, by default, its ``log_likelihood``.
    start
        The mode to start from (a :class:`~polkit.inference.MapResult`).
    sampler
        A :class:`~polkit.inference.SamplerSettings` whose step limits are resolved (see
        :func:`job_sampler`); ``n_walkers`` ``None`` means ``max(32, 4 P)``.
    log_likelihood
        The likelihood to sample instead (another path's, or one wrapped to count steps).
    seed
        Root seed, recorded in the result; with ``pre_burn`` and no seed, a fresh one.
    pre_burn
        Start from a short pre-burn with straggling walkers moved onto good ones
        (:func:`preburn`).  With a checkpoint, the checkpoint (and its root seed) is
        made first, so a run killed during the pre-burn or before its first step
        repeats the same pre-burn when resumed; it is skipped when the checkpoint holds
        the starting ensemble already.
    checkpoint, resume
        As in :func:`polkit.inference.run_ensemble`; the checkpoint's folder is locked
        for the call (:mod:`polkit.folder_lock`).
    identity
        The job's part of the fit identity, ``{field: value}`` (input SHA-256, model,
        route, likelihood, preprocessing settings); stored in the checkpoint and checked
        on resume (:mod:`polkit.inference.identity`).  ``None``: not checked.

    Returns
    -------
    SamplerOutput
        Its ``diagnostics["laplace_vs_mcmc"]`` says how far the quick answer at the mode
        (:func:`quick_answer`, computed first, logged and saved beside the checkpoint as
        ``quick_summary.json``) lies from the MCMC medians, per parameter, in MCMC sd.
    """
    like = problem.log_likelihood if log_likelihood is None else log_likelihood
    space = problem.space
    quick = None
    if isinstance(start, MapResult):  # the first answer, in seconds, before any MCMC step
        quick = quick_answer(problem, start, log_likelihood=like,
                             out=checkpoint.parent if checkpoint is not None else None,
                             required=False)
    walkers = walker_count(sampler.n_walkers, space)
    progress = sampler.progress
    job = dict(identity) if identity is not None else None
    with folder_lock(checkpoint.parent if checkpoint is not None else None):
        if checkpoint is not None:
            # the checkpoint and its root seed first: the pre-burn is drawn from that seed
            seed = prepare_checkpoint(checkpoint, space, walkers, seed, resume, job)
            resume = True
        if pre_burn and not start_stored(checkpoint):
            if seed is None:  # one recorded root for the pre-burn and the run
                seed = np.random.SeedSequence()
            start = preburn(like, space, start, walkers, seed, sampler.max_steps,
                            progress=progress)
        # every setting of the caller reaches the run (gate, moves, ensembles included)
        run = dataclasses.replace(sampler, n_walkers=walkers)
        output = run_ensemble(like, space, start, run, seed=seed, checkpoint=checkpoint,
                              resume=resume, identity=job)
    if quick is not None:
        post = output.posterior_draws()
        output.diagnostics["laplace_vs_mcmc"] = laplace.compare_with_mcmc(
            quick, {n: post[n].values for n in space.names})
    return output


def posterior_theta(output: SamplerOutput, space) -> np.ndarray:
    """The stored draws of a run as parameter vectors, shape ``(chain, draw, P)``."""
    post = output.posterior_draws()
    return np.stack([post[n].values for n in space.names], axis=-1)

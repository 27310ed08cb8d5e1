"""Model comparison for the dispersion job: weak coupling, two and three oscillators.

:func:`compare_models` is the job; the criteria are in :mod:`polkit.jobs.dispersion.criteria`
and the result (:class:`~polkit.jobs.dispersion.comparison.ModelComparison`) in
:mod:`polkit.jobs.dispersion.comparison`.

Which picture does a map support: the bare cavity mode crossing an uncoupled exciton line
(weak coupling, ``g = 0``), one exciton coupled to the photon (two oscillators), or two
excitons (three oscillators)?  Each model is fitted to the same map with the same noise
model, and the fits are ranked by their expected log predictive density (elpd) for a new
spectrum, estimated by Pareto-smoothed importance-sampling leave-one-out cross-validation
(PSIS-LOO; Vehtari, Gelman and Gabry, Stat. Comput. 27, 1413, 2017) with ArviZ, and by
WAIC (Watanabe, JMLR 11, 3571, 2010) as a cross-check.

The unit left out is one **spectrum** (one angle or k): the pixels of a spectrum share its
amplitudes and background, so they are not exchangeable one by one.  The pointwise
log-likelihood of spectrum ``a`` for a posterior draw is the Gaussian log density of its
pixels with the amplitudes and background solved for that draw (variable projection),
including the normalisation (the noise scale and the per-pixel variances), so models are
compared on the same data in the same units (nats).

Caveats (also written into every comparison's summary):

* The linear amplitudes and backgrounds are solved per spectrum, not sampled, so they are
  fitted to the very spectrum that LOO leaves out.  Their optimism is removed by the
  Akaike correction of one nat per solved coefficient (Akaike, IEEE Trans. Autom. Control
  19, 716, 1974), counting only the *active* coefficients (non-zero amplitudes, plus the
  background), which are the degrees of freedom of a non-negative least-squares fit
  (Meyer and Woodroofe, Ann. Stat. 28, 1083, 2000).  It is exact for a linear-Gaussian
  model with known noise and an approximation otherwise.
* The criteria compare predictive accuracy, not the truth of a model: a three-oscillator
  model that nests the two-oscillator one can tie with it when the second exciton is not
  needed; a tie favours the simpler model by convention, not by evidence.
* PSIS-LOO is reliable only where the Pareto shape ``k`` stays below 0.7 (Vehtari et al.
  2017); spectra above it are counted and the result says so.  A model whose fit did not
  converge is ranked but marked, and the comparison is then not reported as converged.
* The noise model is calibrated once (on the residuals of the reference model's mode)
  and shared; a poor noise model affects all models alike but can still tilt the ranking.
"""

from __future__ import annotations

import logging
import os
import warnings
from collections.abc import Mapping, Sequence
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import xarray as xr

from polkit.config.priors import read_prior_file
from polkit.errors import ConfigError, ConvergenceWarning, DataWarning
from polkit.inference import SamplerSettings
from polkit.jobs.dispersion.comparison import (
    MIN_DIFFERENCE_NATS,
    MIN_DIFFERENCE_SE,
    ModelComparison,
    ModelScore,
)
from polkit.jobs.dispersion.criteria import (
    PARETO_K_LIMIT,
    information_criteria,
    pointwise_log_likelihood,
    sum_and_se,
)
from polkit.jobs.dispersion.problem import MODELS, DispersionProblem
from polkit.jobs.dispersion.run import (
    DEFAULT_STEPS,
    build_dispersion_result,
    camera_provenance,
    prepare_dispersion,
)
from polkit.jobs.dispersion.stages import (
    DispersionStart,
    calibrate_problem_noise,
    loader_changes,
    refine_mode,
    whole_map_start,
)
from polkit.jobs.steps import (
    checkpoint_file,
    job_identity,
    job_sampler,
    locks_output,
    posterior_theta,
    sample_problem,
)

if TYPE_CHECKING:
    from polkit.data import LoadOptions

__all__ = ["compare_models"]

log = logging.getLogger(__name__)


#: posterior probability below which the second exciton is "not identified" as strongly
#: coupled (common practice, no published source)
IDENTIFIED_PROBABILITY = 0.95


def _mark_unidentified(scores: dict[str, ModelScore], fits: Mapping[str, Any]) -> None:
    """Mark a three-oscillator fit whose second exciton the map does not identify.

    When the three-oscillator fit did not converge, is not clearly better than the
    two-oscillator fit, and its second exciton is not shown to be strongly coupled (the
    posterior probability that ``2 g_2 > (gamma_C + gamma_X2)/2``, the visibility
    condition of a splitting, Savona et al., Solid State Commun. 93, 733 (1995), is below
    ``IDENTIFIED_PROBABILITY``), the second exciton is not needed: its coupling, energy
    and width trade off along directions the data do not constrain, which is why the
    sampler did not converge.  The score is kept and marked; the comparison's
    convergence is judged on the identified models.
    """
    three, two = scores.get("three"), scores.get("two")
    if three is None or two is None or three.converged or "three" not in fits:
        return
    fit = fits["three"]
    try:
        r2 = fit.draws("rabi_splitting2")
        visible = 0.5 * (fit.draws("cavity_linewidth") + fit.draws("exciton2_linewidth"))
    except Exception:  # noqa: BLE001 - a fit without these draws is left as it is
        return
    p_strong = float(np.mean(r2 > visible))
    d, se = sum_and_se(three.elpd_i - two.elpd_i)
    clearly_better = d > MIN_DIFFERENCE_NATS and d > MIN_DIFFERENCE_SE * se
    if p_strong < IDENTIFIED_PROBABILITY and not clearly_better:
        three.identified = False
        three.identification = (
            f"the map does not identify a second exciton (P(2g2 > (gamma_C + gamma_X2)/2) = "
            f"{p_strong:.2f}; elpd {d:+.1f} +/- {se:.1f} nat against two oscillators), so its "
            "fit could not converge; the data do not need it")
        log.info("comparison: %s", three.identification)


def _split_priors(priors, spaces: Mapping[str, Any]) -> dict[str, dict | None]:
    """One prior dict per model: the tables naming that model's parameters."""
    if priors is None:
        return {m: None for m in spaces}
    table = dict(read_prior_file(priors)) if not isinstance(priors, Mapping) else dict(priors)
    known = set().union(*(s.names for s in spaces.values()))
    unknown = sorted(set(table) - known)
    if unknown:
        raise ConfigError(
            f"unknown parameter {unknown[0]!r}: none of the compared models has it "
            f"(known: {', '.join(sorted(known))}); remove it or fix the name.",
            path=None if isinstance(priors, Mapping) else priors, key=unknown[0])
    return {m: {k: v for k, v in table.items() if k in s.names} or None
            for m, s in spaces.items()}


def _cross_started_modes(prepared: Mapping[str, tuple]) -> dict[str, np.ndarray]:
    """Whole-map mode of each model, started from its own peak table and from the others.

    The peak table is matched to the branches of each model; for the uncoupled model, a
    cavity line crossing the exciton line gives peaks that a per-angle fit places poorly
    and its table mode can be far off.  Each model is therefore started from its table mode
    and from its raw guess (:func:`whole_map_start`), then from the other models'
    whole-map modes (shared parameters copied, the rest from its own mode), and the start
    with the highest whole-map posterior is kept.  # common practice, no published source
    """
    own = {}
    for m, (problem, begin) in prepared.items():
        own[m] = whole_map_start(problem, begin.x0)
    best = dict(own)
    for m, (problem, _) in prepared.items():
        names = problem.space.names
        for other, mode in own.items():
            if other == m:
                continue
            theirs = dict(zip(prepared[other][0].space.names, mode.x, strict=True))
            x = np.array([theirs.get(n, v) for n, v in zip(names, own[m].x, strict=True)])
            inside = np.isfinite(problem.space.log_prior(x[None, :])).all()
            if not inside:
                continue
            cand = refine_mode(problem, x, staged=True)
            if cand.log_post > best[m].log_post:
                log.info("comparison: the %s model starts from the %s mode", m, other)
                best[m] = cand
    return {m: r.x for m, r in best.items()}


def _checked_models(models: Sequence[str], resume: bool, seed) -> list[str]:
    """The models to compare, in order and without repeats; refuse what cannot run."""
    if resume and seed is None:
        raise ConfigError("resuming a comparison needs the seed of the interrupted run (it "
                          "was printed when the run started); pass --seed N with --resume.",
                          key="seed")
    models = list(dict.fromkeys(models))
    bad = [m for m in models if m not in MODELS]
    if bad or len(models) < 2:
        raise ConfigError(
            f"expected two or more of {', '.join(MODELS)}; found {', '.join(models) or 'none'}",
            key="models")
    return models


def _prepared_models(source, models: list[str], priors, load: LoadOptions
                     ) -> dict[str, tuple[DispersionProblem, DispersionStart]]:
    """Each model's problem and start; a prior table is split among the models."""
    prepared = {m: prepare_dispersion(source, model=m, load=load) for m in models}
    per_model = _split_priors(priors, {m: p.space for m, (p, _) in prepared.items()})
    if priors is not None:
        prepared = {m: prepare_dispersion(source, model=m, priors=per_model[m], load=load)
                    for m in models}
    return prepared


def _shared_noise(prepared: Mapping[str, tuple], modes: Mapping[str, np.ndarray],
                  models: list[str]) -> tuple[str, DispersionProblem, str]:
    """The reference model, its problem and the noise model calibrated on its mode."""
    reference = next((m for m in ("two", "three") if m in models), models[0])
    ref_problem, ref_begin = prepared[reference]
    noise_note = calibrate_problem_noise(ref_problem, modes[reference],
                                         ref_begin.source.data.attrs)
    noise_note = f"shared by all models, calibrated on the '{reference}' mode: {noise_note}"
    return reference, ref_problem, noise_note


def _model_checkpoint(out, model: str, resume: bool) -> Path | None:
    """The checkpoint of one model's fit, ``out/<model>/chains.h5`` (its folder made)."""
    ckpt = checkpoint_file(Path(out) / model if out is not None else None, resume,
                           refusal=ConfigError("resume needs the output folder of the "
                                               "comparison; pass out= (--out).",
                                               key="resume"))
    if ckpt is not None:
        ckpt.parent.mkdir(parents=True, exist_ok=True)
    return ckpt


def _scored(problem: DispersionProblem, output, model: str, n_draws: int) -> ModelScore:
    """The information criteria of one model's run, from at most ``n_draws`` draws."""
    theta = posterior_theta(output, problem.space)  # (chain, draw, P)
    step = max(1, int(np.ceil(theta.shape[0] * theta.shape[1] / n_draws)))
    theta = theta[:, ::step]
    ll, active = pointwise_log_likelihood(problem, theta)
    post = {n: theta[..., i] for i, n in enumerate(problem.space.names)}
    crit = information_criteria(ll, active, post)
    return ModelScore(model=model, n_parameters=len(problem.space),
                      converged=bool(output.converged), **crit)


def _warn_unreliable(comparison: ModelComparison) -> None:
    """Warn about fits that did not converge and spectra where PSIS-LOO is unreliable."""
    scores = comparison.scores
    if not comparison.converged:
        which = [m for m, s in scores.items() if not s.converged and s.identified]
        warnings.warn(f"model comparison: the {', '.join(which)} fit did not converge; its "
                      "elpd is not reliable (rerun with a larger max_steps).",
                      ConvergenceWarning, stacklevel=3)
    high = {m: s.n_high_k for m, s in scores.items() if s.n_high_k}
    if high:
        warnings.warn("model comparison: PSIS-LOO is unreliable for some spectra (Pareto k > "
                      f"{PARETO_K_LIMIT}): " + ", ".join(f"{m} {n}" for m, n in high.items())
                      + "; compare the WAIC column and read the differences with care.",
                      DataWarning, stacklevel=3)


@locks_output
def compare_models(
    source: str | os.PathLike | xr.DataArray,
    *,
    models: Sequence[str] = ("weak", "two", "three"),
    priors: str | os.PathLike | dict | None = None,
    seed: int | np.random.SeedSequence | None = None,
    out: str | os.PathLike | None = None,
    resume: bool = False,
    sampler: SamplerSettings | Mapping[str, Any] | None = None,
    load: LoadOptions | Mapping[str, Any] | None = None,
    n_draws: int = 2000,
    figures: bool = False,
) -> ModelComparison:
    """Fit several dispersion models to one map and rank them by PSIS-LOO.

    Parameters
    ----------
    source
        A map file or a canonical map (whole-map fits; emission or reflectance).
    models
        Two or more of ``"weak"`` (uncoupled modes), ``"two"`` and ``"three"``.
    priors, load
        As in :func:`polkit.jobs.dispersion.run.fit_dispersion`; a prior table naming a
        parameter applies to every model that has it.
    seed
        Root seed; each model gets its own child of it (recorded in its result).
    out
        Output folder: ``comparison.json``, ``comparison_pointwise.nc`` and one folder
        per model with its ``posterior.nc`` and ``summary.json``.
    resume
        Continue each model's fit from its checkpoint in ``out/<model>/chains.h5`` (same
        map, priors, seed and limits as the interrupted run).
    sampler
        Sampler settings of each fit (a :class:`polkit.inference.SamplerSettings` or a
        dict of its fields; step limits, walkers, progress bars).
    n_draws
        Posterior draws (over all walkers) used for the criteria.
    figures
        Also write each model's figures.

    Returns
    -------
    ModelComparison

    Warns
    -----
    ConvergenceWarning
        When a fit did not converge (the comparison is then not converged).
    DataWarning
        When some spectra have Pareto k above 0.7 (PSIS-LOO unreliable there).
    """
    from polkit.data import LoadOptions

    models = _checked_models(models, resume, seed)
    sampler = job_sampler(DEFAULT_STEPS, sampler)
    load = LoadOptions.of(load)
    settings = dict(kind=load.kind, wavelength_medium=load.wavelength_medium,
                    angle_window=load.angle_window, energy_window=load.energy_window,
                    load_options=loader_changes(load) or None, models=list(models))
    prepared = _prepared_models(source, models, priors, load)
    # what the camera steps masked decides the posterior too (a resume must see the same)
    settings["camera"] = camera_provenance(prepared[models[0]][1])
    # modes, then one noise model from the reference model's mode, shared by all
    modes = _cross_started_modes(prepared)
    reference, ref_problem, noise_note = _shared_noise(prepared, modes, models)
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    children = dict(zip(models, root.spawn(len(models)), strict=True))
    scores, fits = {}, {}
    for m in models:
        problem, begin = prepared[m]
        problem.set_noise(ref_problem.inv_var, noise_note)
        start = refine_mode(problem, modes[m])
        ckpt = _model_checkpoint(out, m, resume)
        log.info("comparison: sampling the %s model", m)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)  # summarised below
            output = sample_problem(problem, start, sampler=sampler,
                                    seed=children[m], pre_burn=True, checkpoint=ckpt,
                                    resume=resume,
                                    identity=job_identity(
                                        begin.source.sha256, f"{m} {begin.source.kind}",
                                        "whole_map", noise_note, settings))
            fits[m] = build_dispersion_result(problem, output, begin.source,
                                              noise_note=noise_note, table=begin.table,
                                              provenance={"model_comparison": ", ".join(models)})
        scores[m] = _scored(problem, output, m, n_draws)
    _mark_unidentified(scores, fits)
    first_problem, first_begin = prepared[models[0]]
    comparison = ModelComparison(scores, fits, reference, noise_note, first_problem.axis,
                                 np.asarray(first_problem.in_plane),
                                 source=str(first_begin.source.source_name))
    _warn_unreliable(comparison)
    if out is not None:
        comparison.save(out, figures=figures)
    return comparison

"""Inference engine: priors, MAP start, emcee ensembles with checkpoints, diagnostics, results.

The engine knows nothing of physics or input files.  A workflow gives it a
:class:`ParameterSpace` (named parameters with units and priors) and a vectorised
log-likelihood ``theta[W, P] -> [W]``; it returns a :class:`SamplerOutput`, which the
workflow turns into a :class:`FitResult` together with derived quantities computed
per posterior draw.  Sampling is left to emcee, diagnostics to ArviZ.  Prior files are
read by :mod:`polkit.config.priors` (:func:`~polkit.config.priors.apply_priors`).
"""

from __future__ import annotations

from polkit.inference.diagnostics import (
    arviz_diagnostics,
    autocorr_time,
    convergence_gate,
    nested_rhat,
    stuck_walkers,
    walker_acceptance,
)
from polkit.inference.optimize import MapResult, check_ensemble, find_map, initial_ball
from polkit.inference.posterior import LogPosterior
from polkit.inference.priors import PRIOR_KINDS, Parameter, ParameterSpace, Prior
from polkit.inference.result import FitResult
from polkit.inference.sampler import SamplerOutput, default_moves, run_ensemble
from polkit.inference.settings import GateSettings, SamplerSettings

__all__ = [
    "PRIOR_KINDS",
    "Prior",
    "Parameter",
    "ParameterSpace",
    "LogPosterior",
    "MapResult",
    "find_map",
    "initial_ball",
    "check_ensemble",
    "SamplerOutput",
    "SamplerSettings",
    "GateSettings",
    "run_ensemble",
    "default_moves",
    "FitResult",
    "autocorr_time",
    "walker_acceptance",
    "stuck_walkers",
    "nested_rhat",
    "arviz_diagnostics",
    "convergence_gate",
]

"""Inference engine: priors, MAP start, emcee ensembles with checkpoints, diagnostics, results.

The engine knows nothing of physics or input files.  A workflow gives it a
:class:`ParameterSpace` (named parameters with units and priors) and a vectorised
log-likelihood ``theta[W, P] -> [W]``; it returns a :class:`SamplerOutput`, which the
workflow turns into a :class:`FitResult` together with derived quantities computed
per posterior draw.  Sampling is left to emcee, diagnostics to ArviZ.
"""

from __future__ import annotations

from .diagnostics import (
    arviz_diagnostics,
    autocorr_time,
    convergence_gate,
    nested_rhat,
    stuck_walkers,
    walker_acceptance,
)
from .optimize import MapResult, check_ensemble, find_map, initial_ball
from .posterior import LogPosterior
from .priors import PRIOR_KINDS, Parameter, ParameterSpace, Prior, apply_priors
from .result import FitResult
from .sampler import SamplerOutput, default_moves, run_ensemble

__all__ = [
    "PRIOR_KINDS",
    "Prior",
    "Parameter",
    "ParameterSpace",
    "apply_priors",
    "LogPosterior",
    "MapResult",
    "find_map",
    "initial_ball",
    "check_ensemble",
    "SamplerOutput",
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

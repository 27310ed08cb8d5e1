"""The end of an ensemble run: the stored chains, their diagnostics and the verdict.

:func:`collect` cuts the ensembles to a common length, stacks their chains (and the
log-likelihood's side results), computes burn-in, thinning, acceptance, stuck walkers,
ArviZ's ESS and R-hat and nested R-hat, and returns the :class:`SamplerOutput` with its
JSON-ready diagnostics; it warns (:class:`~polkit.errors.ConvergenceWarning`) when a gate
failed.
"""

from __future__ import annotations

import logging
import math
import warnings

import numpy as np

from polkit.errors import ConvergenceWarning, FitError
from polkit.inference import diagnostics as diag
from polkit.inference.checkpoint import entropy_int
from polkit.inference.output import SamplerOutput
from polkit.inference.plan import RunPlan, burn_thin, to_nested

__all__ = ["collect", "describe_moves"]

log = logging.getLogger(__name__)

_RHAT_NOTE = ("R-hat over walkers of one ensemble is informational (walkers are not "
              "independent chains); strict mode gates on nested R-hat across ensembles")


def describe_moves(moves) -> str:
    """The emcee moves as text, e.g. ``"DEMove:1"``."""
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


def _length_and_reasons(ensembles, available, gate, length, stopped):
    """The length to report and the failed gates so far."""
    reasons: list[str] = []
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
    return length, reasons


def _stacked(available, length, extras_units):
    """Chains (E, S, W, P), log-probabilities (E, S, W) and extras of the first ``length``
    steps of every ensemble."""
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
    return chains, log_prob, extras


def _arviz_numbers(output, gate, available, stopped, length, ess_rhat, names):
    """ESS and R-hat of the reported draws (reused from the gate's last check when it saw
    exactly these draws) and the grouped R-hat."""
    reuse = (gate.get(0) if len(available) == 1 and not stopped else None)
    group_rhat = None
    if reuse is not None and reuse.steps == length and reuse.ess is not None:
        # the gate's last check saw exactly these draws: its ArviZ numbers are reused
        az_diag, group_rhat = reuse.ess, reuse.group_rhat
    elif ess_rhat:
        az_diag = diag.arviz_diagnostics(output.posterior_draws()[names])
    else:
        nan = {name: math.nan for name in names}
        az_diag = {"ess_bulk": nan, "ess_tail": dict(nan), "rhat": dict(nan),
                   "min_ess_bulk": math.nan, "min_ess_tail": math.nan, "max_rhat": math.nan}
    return az_diag, group_rhat


def _diagnostics(output, plan: RunPlan, found: dict, reasons, stopped) -> dict:
    """The JSON-ready diagnostics of the run (see :func:`polkit.inference.run_ensemble`)."""
    chains, taus, acceptance = output.chains, output.autocorr_time, output.acceptance
    az_diag, length, n_walkers = found["arviz"], found["length"], plan.n_walkers
    rule, nested_rhat_max = plan.rule, plan.settings.gate.nested_rhat_max
    return {
        "converged": not reasons,
        "steps": int(length),
        "walkers": int(n_walkers),
        "n_ensembles": found["n_ensembles"],
        "max_autocorr_time": float(np.max(taus)),
        "autocorr_time": {n: float(np.max(taus[:, j])) for j, n in enumerate(output.names)},
        "min_ess_bulk": az_diag["min_ess_bulk"],
        "min_ess_tail": az_diag["min_ess_tail"],
        "max_rhat": az_diag["max_rhat"],
        "ess_bulk": az_diag["ess_bulk"],
        "ess_tail": az_diag["ess_tail"],
        "rhat": az_diag["rhat"],
        "rhat_note": _RHAT_NOTE,
        "nested_rhat": found["nested"],
        "acceptance_fraction": float(np.mean(acceptance)),
        "acceptance_min": float(np.min(acceptance)),
        "acceptance_max": float(np.max(acceptance)),
        "burn_in": int(output.burn_in),
        "thin": int(output.thin),
        "draws": int(output.posterior_draws().sizes["draw"] * chains.shape[0] * n_walkers),
        "stuck_walkers": found["stuck"],
        "reasons": list(reasons),
        "strict": bool(plan.strict),
        "stopped": bool(stopped),
        "moves": describe_moves(plan.moves),
        "autocorr_factor": rule.autocorr_factor,
        "tau_rtol": rule.tau_rtol,
        "ess_target": dict(rule.targets) if rule.targets is not None else None,
        "group_rhat": found["group_rhat"],
        "group_rhat_max": rule.rhat_max,
        "walker_groups": rule.walker_groups,
        "acceptance_range": [float(a) for a in rule.acceptance_range],
        "nested_rhat_max": float(nested_rhat_max),
        "seed_entropy": str(output.seed_entropy),
        "seed_spawn_key": list(output.seed_spawn_key),
    }


def collect(ensembles, gate, length, space, root, stopped, plan: RunPlan) -> SamplerOutput:
    """The output of a finished (or stopped) run; warns when a gate failed.

    The warning points at the caller of :func:`polkit.inference.run_ensemble` (which calls
    this through one private step).
    """
    available = [ens for ens in ensembles if ens.steps > 0]
    if not available:
        raise FitError("sampling stopped before the first step was stored; nothing to report")
    length, reasons = _length_and_reasons(ensembles, available, gate, length, stopped)
    chains, log_prob, extras = _stacked(available, length, plan.extras_units)

    taus, burn, thin = burn_thin(chains, length)
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
        diagnostics={}, seed_entropy=entropy_int(root),
        seed_spawn_key=tuple(int(k) for k in root.spawn_key), extras=extras,
        extras_units=plan.extras_units,
    )
    az_diag, group_rhat = _arviz_numbers(output, gate, available, stopped, length,
                                         plan.settings.gate.ess_rhat, space.names)
    nested = None
    if len(available) >= 2:
        nested_values = diag.nested_rhat(to_nested(chains[:, burn::thin]))
        nested = float(np.max(nested_values))
        nested_rhat_max = plan.settings.gate.nested_rhat_max
        if plan.strict and not stopped and not nested <= nested_rhat_max:
            reasons.append(
                f"nested R-hat {nested:.4f} > {nested_rhat_max:g} over {len(available)} "
                f"ensembles at max_steps = {length}"
            )
    found = {"arviz": az_diag, "group_rhat": group_rhat, "nested": nested, "stuck": stuck,
             "length": length, "n_ensembles": len(available)}
    output.diagnostics = _diagnostics(output, plan, found, reasons, stopped)
    output.converged = converged = output.diagnostics["converged"]
    if converged:
        log.info("converged after %d steps (tau max %.1f, min bulk ESS %.0f)", length,
                 output.diagnostics["max_autocorr_time"], output.diagnostics["min_ess_bulk"])
    else:
        warnings.warn(
            "MCMC did not converge: " + "; ".join(reasons), ConvergenceWarning, stacklevel=4
        )
    return output

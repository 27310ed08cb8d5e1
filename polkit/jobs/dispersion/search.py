"""The whole-map modes of a dispersion posterior, found before sampling and checked after.

A start from the peak table can land in a poor local mode (a dim branch the table does
not see, an uncoupled cavity line); an ensemble sampler started there usually stays,
and its diagnostics cannot tell.  This module looks for the other modes first and
checks the run against them afterwards:

* :func:`search_modes`: a scrambled Sobol design (:class:`scipy.stats.qmc.Sobol`) over the
  prior box of the physics parameters, evaluated with the vectorised whole-map posterior
  (the noise scale held at the usual start's value), a vectorised hill climb of the best
  mutually distant design points, then local optimisation (L-BFGS-B, finished by
  :func:`polkit.inference.find_map`) from the best distant climbed points, beside the usual
  starts (:func:`~polkit.jobs.dispersion.stages.whole_map_start`);
  optima that agree within a few local spreads are one mode.
* :meth:`ModeSearch.rescored`: after the noise model is calibrated at the chosen mode,
  every mode is optimised again under it and gets a Laplace log-evidence from the
  finite-difference Hessian of the log posterior (one vectorised call per mode).
* :func:`check_mode_margin`: after sampling, a mode that beats the best sampled point by
  more than :data:`MODE_MARGIN_NATS` fails the run (a better mode exists); the modes, their
  log posterior, Laplace evidence and weight go into the diagnostics (``mode_search``).
* :func:`weigh_strong_coupling`: when another mode carries evidence weight, the
  strong-coupling probability becomes the evidence-weighted mixture of the sampled
  posterior and the other modes' Laplace Gaussians (stated in the result).

Design choice: the best mode is sampled; other modes are not sampled but reported with
their Laplace weight (Source: Laplace approximation, MacKay, Information Theory,
Inference and Learning Algorithms (2003), ch. 27).  A mode that wins outright (more than
the margin) is always the one sampled, so a summary never comes from where a start
happened to land.
"""

from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass, field, replace
from typing import Any

import numpy as np
from scipy import special
from threadpoolctl import threadpool_limits

from polkit.errors import ConvergenceWarning
from polkit.inference import LogPosterior, MapResult, SamplerOutput, find_map
from polkit.inference.laplace import central_hessian
from polkit.jobs.dispersion.exploration import (
    DESIGN_SEED,
    branch_grid,
    hill_climb,
    polish,
    sobol_design,
)

__all__ = [
    "MODE_MARGIN_NATS",
    "Mode",
    "ModeSearch",
    "search_modes",
    "laplace_log_evidence",
    "check_mode_margin",
    "weigh_strong_coupling",
]

log = logging.getLogger(__name__)

#: a mode this many nats above the best sampled point fails the run
MODE_MARGIN_NATS = 2.0
#: Sobol points over the prior box (a power of two)
DESIGN_POINTS = 4096
#: design points improved together by the vectorised hill climb
CLIMB_CANDIDATES = 16
#: local optimisations started from the best distant climbed points
LOCAL_STARTS = 3
#: minimum Euclidean distance between two design starts in unit-box coordinates
START_SEPARATION = 0.2
#: modes this far below the sampled one after the noise calibration are not re-optimised
RESCORE_WINDOW_NATS = 50.0
#: optima closer than this many local spreads in every parameter are one mode
SAME_MODE_SPREADS = 3.0
#: quantities reported per mode (with units from the space or here)
_KEY_DERIVED = {"detuning": "meV"}


@dataclass
class Mode:
    """One local optimum of the whole-map posterior.

    Attributes
    ----------
    x
        The parameter vector at the optimum.
    log_post
        Log posterior there (nats).
    scale
        Local spread of each parameter (from the optimiser's curvature).
    origin
        Where the optimisation started (``"usual start"``, ``"design point 3"``, ...).
    log_evidence
        Laplace log-evidence of the mode (nats), ``None`` when the Hessian is not negative
        definite or the mode lies on a prior bound.
    cov
        The Laplace covariance (inverse of minus the Hessian), or ``None``.
    note
        Why the evidence is missing, if it is.
    """

    x: np.ndarray
    log_post: float
    scale: np.ndarray
    origin: str
    log_evidence: float | None = None
    cov: np.ndarray | None = None
    note: str = ""

    def as_result(self) -> MapResult:
        """This mode as a :class:`~polkit.inference.MapResult` (the sampler's start)."""
        return MapResult(np.array(self.x), float(self.log_post), np.array(self.scale), True,
                         f"mode search: {self.origin}")


@dataclass
class ModeSearch:
    """The distinct modes found, best first, and how they were found."""

    names: list[str]
    units: list[str]
    modes: list[Mode]
    design_points: int
    design_best: float
    evaluations: int
    chosen: int = 0
    extras: dict[str, Any] = field(default_factory=dict)

    @property
    def best(self) -> MapResult:
        """The mode to start sampling from (the highest log posterior)."""
        return self.modes[self.chosen].as_result()

    def rescored(self, problem, start: MapResult) -> ModeSearch:
        """The modes optimised again under the problem's current noise model.

        ``start`` is the refined mode the sampler will start from; it becomes mode 0 (the
        sampled one), any other optimum that lands on it is dropped, and every mode gets
        its Laplace log-evidence.
        """
        with threadpool_limits(limits=1, user_api="blas"):
            return self._rescored(problem, start)

    def _rescored(self, problem, start: MapResult) -> ModeSearch:
        post = LogPosterior(problem.log_likelihood, problem.space)
        space = problem.space
        fresh = [Mode(np.array(start.x), float(start.log_post), np.array(start.scale),
                      self.modes[self.chosen].origin)]
        others = [m for i, m in enumerate(self.modes) if i != self.chosen]
        again = (np.asarray(post(np.array([m.x for m in others])), dtype=float) if others
                 else np.empty(0))
        for m, value in zip(others, again, strict=True):
            if value >= start.log_post - RESCORE_WINDOW_NATS:
                r = find_map(post, space, m.x)
                cand = Mode(r.x, float(r.log_post), r.scale, m.origin)
            else:  # far below: its value under the new noise, not optimised again
                cand = Mode(np.array(m.x), float(value), np.array(m.scale), m.origin,
                            note=f"more than {RESCORE_WINDOW_NATS:g} nats below the sampled "
                                 "mode: not optimised again under the calibrated noise")
            if not any(_same(cand, f) for f in fresh):
                fresh.append(cand)
        for m in fresh:
            if m.note:
                continue
            m.log_evidence, m.cov, m.note = laplace_log_evidence(post, space, m.x, m.scale,
                                                                 m.log_post)
        order = [0] + sorted(range(1, len(fresh)), key=lambda i: -fresh[i].log_post)
        return replace(self, modes=[fresh[i] for i in order], chosen=0)

    def weights(self) -> np.ndarray:
        """Evidence weight of each mode (Laplace; a mode without evidence gets 0)."""
        z = np.array([m.log_evidence if m.log_evidence is not None else -np.inf
                      for m in self.modes])
        if not np.isfinite(z).any():
            w = np.zeros(len(self.modes))
            w[self.chosen] = 1.0
            return w
        return np.exp(z - special.logsumexp(z[np.isfinite(z)]))

    def record(self, problem=None, *, limit: int = 8) -> dict[str, Any]:
        """JSON-ready description (the ``mode_search`` entry of the diagnostics)."""
        w = self.weights()
        rows = []
        for i, m in enumerate(self.modes[:limit]):
            params = {n: {"value": float(v), "units": u}
                      for n, u, v in zip(self.names, self.units, m.x, strict=True)}
            if problem is not None:
                for key, units in _KEY_DERIVED.items():
                    d = problem.derived(m.x[None, :])
                    if key in d:
                        params[key] = {"value": float(np.asarray(d[key][0])[0]), "units": units}
            rows.append({
                "sampled": i == self.chosen,
                "log_posterior": float(m.log_post),
                "log_evidence_laplace": None if m.log_evidence is None else float(m.log_evidence),
                "weight": float(w[i]),
                "origin": m.origin,
                "parameters": params,
                **({"note": m.note} if m.note else {}),
            })
        return {
            "units": "nat",
            "design_points": int(self.design_points),
            "design": "scrambled Sobol design over the prior box of the physics parameters "
                      "(noise scale held), a vectorised hill climb of the best distant points, "
                      "then local optimisation from the best climbed ones, beside the usual "
                      "start",
            "evaluations": int(self.evaluations),
            "modes_found": len(self.modes),
            "modes": rows,
            "weights_note": "weights from Laplace log-evidence (Gaussian approximation at each "
                            "mode); the sampled mode's posterior is the chain, other modes are "
                            "not sampled",
            **self.extras,
        }


# --------------------------------------------------------------------------------------
# the search
# --------------------------------------------------------------------------------------
def _diverse(order: np.ndarray, u: np.ndarray, values: np.ndarray, k: int,
             separation: float) -> list[int]:
    """Up to ``k`` of the best points, each at least ``separation`` apart in the unit box."""
    chosen: list[int] = []
    for i in order:
        if not np.isfinite(values[i]):
            break
        if all(np.linalg.norm(u[i] - u[j]) >= separation for j in chosen):
            chosen.append(int(i))
        if len(chosen) == k:
            break
    return chosen


def _same(a: Mode, b: Mode) -> bool:
    tol = SAME_MODE_SPREADS * np.maximum(np.maximum(a.scale, b.scale), 1e-12)
    return bool(np.all(np.abs(a.x - b.x) <= tol))


def search_modes(problem, starts: list[tuple[str, MapResult]], *,
                 n_design: int = DESIGN_POINTS, n_climb: int = CLIMB_CANDIDATES,
                 n_local: int = LOCAL_STARTS) -> ModeSearch:
    # the optimiser's many small calls stall on idle BLAS worker threads on a busy machine
    # (measured: 8.5 s against 1.6 s on the demo map with two shared cores)
    with threadpool_limits(limits=1, user_api="blas"):
        return _search_modes(problem, starts, n_design=n_design, n_climb=n_climb,
                             n_local=n_local)


def _search_modes(problem, starts: list[tuple[str, MapResult]], *,
                  n_design: int = DESIGN_POINTS, n_climb: int = CLIMB_CANDIDATES,
                  n_local: int = LOCAL_STARTS) -> ModeSearch:
    """Explore the prior box with the whole-map posterior and collect the distinct modes.

    Parameters
    ----------
    problem
        The :class:`~polkit.jobs.dispersion.problem.DispersionProblem`.
    starts
        ``(label, MapResult)`` pairs already found (e.g. the usual start); the first one's
        noise scale is held in the design.  They are modes of the search too.
    n_design
        Sobol points (rounded to a power of two).
    n_climb
        The best mutually distant design points improved together by a vectorised hill
        climb (:func:`~polkit.jobs.dispersion.exploration.hill_climb`).
    n_local
        Local optimisations (:func:`~polkit.inference.find_map`) from the best mutually
        distant climbed points.

    Returns
    -------
    ModeSearch
        Distinct modes sorted by log posterior; ``best`` is the highest, except that the
        first start is kept when the best is the same mode (the same start vector).
    """
    space = problem.space
    post = LogPosterior(problem.log_likelihood, space)
    held = starts[0][1].x
    theta, u = sobol_design(space, held, n_design)
    values = np.concatenate([np.asarray(post(theta[i:i + 1024]), dtype=float)
                             for i in range(0, theta.shape[0], 1024)])
    values = np.where(np.isfinite(values), values, -np.inf)
    evaluations = theta.shape[0]
    order = np.argsort(-values, kind="stable")
    design_best = float(values[order[0]])
    picks = _diverse(order, u, values, n_climb, START_SEPARATION)
    rng = np.random.default_rng(DESIGN_SEED)
    c_theta, c_u, c_val, calls = hill_climb(post, space, theta[picks], u[picks], held, rng=rng)
    evaluations += calls
    c_order = np.argsort(-c_val, kind="stable")
    local = _diverse(c_order, c_u, c_val, n_local, 0.5 * START_SEPARATION)
    modes = [Mode(np.array(r.x), float(r.log_post), np.array(r.scale), label)
             for label, r in starts]
    for rank, i in enumerate(local):
        r = polish(post, space, c_theta[i])
        cand = Mode(r.x, float(r.log_post), r.scale, f"design point {rank}")
        if not any(_same(cand, m) for m in modes):
            modes.append(cand)
    grid = branch_grid(problem, held)
    if grid is not None:
        g_theta, g_u = grid
        g_val = np.concatenate([np.asarray(post(g_theta[i:i + 1024]), dtype=float)
                                for i in range(0, g_theta.shape[0], 1024)])
        g_val = np.where(np.isfinite(g_val), g_val, -np.inf)
        evaluations += g_theta.shape[0]
        g_order = np.argsort(-g_val, kind="stable")
        for rank, i in enumerate(_diverse(g_order, g_u, g_val, n_local, 0.5 * START_SEPARATION)):
            r = polish(post, space, g_theta[i])
            cand = Mode(r.x, float(r.log_post), r.scale, f"branch grid point {rank}")
            if not any(_same(cand, m) for m in modes):
                modes.append(cand)
    modes.sort(key=lambda m: -m.log_post)
    # keep the usual start when the best is the same mode reached another way (same
    # start vector: same summary for the same seed)
    best = modes[0]
    for m in modes:
        if m.origin == starts[0][0] and (m is best or (_same(m, best)
                                                        and best.log_post - m.log_post < 0.1)):
            modes.remove(m)
            modes.insert(0, m)
            break
    log.info("mode search: %d distinct mode(s), best log posterior %.2f (%s)", len(modes),
             modes[0].log_post, modes[0].origin)
    return ModeSearch(space.names, space.units, modes, int(theta.shape[0]), design_best,
                      evaluations)


# --------------------------------------------------------------------------------------
# Laplace evidence
# --------------------------------------------------------------------------------------
def laplace_log_evidence(post, space, x: np.ndarray, scale: np.ndarray,
                         log_post: float) -> tuple[float | None, np.ndarray | None, str]:
    """Laplace log-evidence of a mode: ``log p(x*) + P/2 log 2 pi - 1/2 log det(-H)``.

    ``H`` is the Hessian of the log posterior at ``x`` by central differences with steps
    of half the local spread, all stencil points in one vectorised call.
    # Source: Laplace approximation, MacKay, Information Theory, Inference and Learning
    # Algorithms (2003), ch. 27, eq. 27.10

    Returns
    -------
    tuple
        ``(log_evidence, covariance, note)``; ``(None, None, why)`` when a stencil point
        leaves the prior (a mode on a bound) or ``-H`` is not positive definite.
    """
    x = np.asarray(x, dtype=float)
    p = x.size
    h = 0.5 * np.asarray(scale, dtype=float)
    lo, hi = space.bounds.T
    if np.any(x - 2 * h <= lo) or np.any(x + 2 * h >= hi):
        near = [space.names[j] for j in np.flatnonzero((x - 2 * h <= lo) | (x + 2 * h >= hi))]
        return None, None, f"mode on or next to a prior bound ({near}): no Laplace evidence"
    hess = central_hessian(post, x, h)
    if not np.all(np.isfinite(hess)):
        return None, None, "log posterior not finite around the mode: no Laplace evidence"
    neg = -hess
    # eigenvalues in the scaled coordinates x / h (the matrix is badly conditioned in
    # physical units)
    scaled = neg * np.outer(h, h)
    evals = np.linalg.eigvalsh(scaled)
    if not np.all(evals > 0):
        return None, None, "the log posterior is not concave at the mode: no Laplace evidence"
    logdet = float(np.sum(np.log(evals)) - 2 * np.sum(np.log(h)))
    cov = np.linalg.inv(scaled) * np.outer(h, h)
    return float(log_post + 0.5 * p * math.log(2 * math.pi) - 0.5 * logdet), cov, ""


# --------------------------------------------------------------------------------------
# after sampling
# --------------------------------------------------------------------------------------
def check_mode_margin(output: SamplerOutput, search: ModeSearch, problem=None, *,
                      margin: float = MODE_MARGIN_NATS) -> SamplerOutput:
    """Gate the run on the modes found: none may beat the best sampled point by ``margin``.

    The best sampled point is the highest log posterior after burn-in over every
    ensemble.  A violation marks the run not converged with a reason naming the better
    mode, and warns (:class:`~polkit.errors.ConvergenceWarning`).  The modes go into
    ``output.diagnostics["mode_search"]`` either way.
    """
    kept = output.log_prob[:, output.burn_in:]
    best_sampled = float(np.max(kept)) if kept.size else -math.inf
    record = search.record(problem)
    record["best_sampled_log_posterior"] = best_sampled
    record["margin"] = float(margin)
    record["margin_units"] = "nat"
    better = [(i, m) for i, m in enumerate(search.modes)
              if i != search.chosen and m.log_post > best_sampled + margin]
    reason = None
    if better:
        i, m = max(better, key=lambda t: t[1].log_post)
        where = ", ".join(f"{n} = {v:.5g} {u}" for n, u, v in
                          zip(search.names, search.units, m.x, strict=True)
                          if n != "noise_scale")
        reason = (f"a better mode exists: the mode search found log posterior "
                  f"{m.log_post - best_sampled:.1f} nats above the best sampled point (margin "
                  f"{margin:g} nats) at {where}; the chain sampled another mode")
    record["passed"] = reason is None
    diagnostics = dict(output.diagnostics)
    diagnostics["mode_search"] = record
    if reason is not None:
        output.reasons = list(output.reasons) + [reason]
        diagnostics["reasons"] = list(diagnostics.get("reasons", [])) + [reason]
        diagnostics["converged"] = False
        output.converged = False
        warnings.warn("MCMC did not converge: " + reason, ConvergenceWarning, stacklevel=2)
    output.diagnostics = diagnostics
    return output


def _mode_strong_probability(problem, mode: Mode, rng: np.random.Generator,
                             n: int = 4000) -> float:
    """Strong-coupling probability of a mode's Laplace Gaussian (draws inside the prior)."""
    draws = rng.multivariate_normal(mode.x, mode.cov, size=n, method="eigh")
    ok = np.isfinite(problem.space.log_prior(draws))
    if not ok.any():
        return float("nan")
    flag = np.asarray(problem.derived(draws[ok])["strong_coupling"][0], dtype=float)
    return float(flag.mean())


def weigh_strong_coupling(result, search: ModeSearch, problem, *,
                          min_weight: float = 1e-3):
    """The strong-coupling probability mixed over modes by their evidence weight.

    When every other mode's weight is below ``min_weight`` the result is returned
    unchanged (the sampled posterior carries the answer).  Otherwise the probability
    becomes ``sum_i w_i P_i``: the chain's value for the sampled mode and the fraction of
    Laplace-Gaussian draws that pass the criterion for each other mode, and the
    diagnostics say so.  Deterministic (fixed generator seed).
    """
    w = search.weights()
    others = [i for i in range(len(search.modes))
              if i != search.chosen and w[i] >= min_weight and search.modes[i].cov is not None]
    if not others:
        return result
    tree = result._tree
    name = "strong_coupling_probability"
    if "probabilities" not in tree.children or name not in tree["probabilities"].data_vars:
        return result
    sampled = float(tree["probabilities"][name].values)
    rng = np.random.default_rng(DESIGN_SEED)
    probs = {search.chosen: sampled}
    for i in others:
        probs[i] = _mode_strong_probability(problem, search.modes[i], rng)
    used = {i: p for i, p in probs.items() if np.isfinite(p)}
    total = sum(w[i] for i in used)
    mixed = sum(w[i] * p for i, p in used.items()) / total
    ds = tree["probabilities"].to_dataset()
    attrs = dict(ds[name].attrs)
    attrs["long_name"] = (str(attrs.get("long_name", name))
                          + ", mixed over modes by Laplace evidence weight")
    ds[name] = ((), np.asarray(mixed), attrs)
    tree["probabilities"] = ds
    diag = result.diagnostics
    record = diag.get("mode_search", {})
    record["strong_coupling_probability"] = {
        "value": float(mixed), "units": "1", "sampled_mode": sampled,
        "per_mode": {str(i): float(p) for i, p in used.items()},
        "note": "other modes carry evidence weight; the probability is the evidence-weighted "
                "mixture (other modes from their Laplace Gaussian, not sampled)",
    }
    diag["mode_search"] = record
    tree.attrs["diagnostics"] = _json(diag)
    return result


def _json(value) -> str:
    import json

    from polkit.files import json_safe

    return json.dumps(json_safe(value), allow_nan=False)

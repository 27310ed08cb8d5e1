"""A first answer in seconds: the Laplace (curvature) summary at the most probable point.

At the mode ``x*`` of the log posterior ``f``, the Laplace approximation treats the
posterior as the Gaussian ``N(x*, (-H)^-1)`` with ``H`` the Hessian of ``f`` at ``x*``
(Laplace 1774; e.g. Gelman et al., Bayesian Data Analysis, 3rd ed., section 4.1).  The
medians are then the mode, the standard deviations the square roots of the diagonal of
``(-H)^-1``, and the central 68 % and 95 % intervals ``x* +- 0.9945 sd`` and ``x* +- 1.96
sd``.  It is exact for a linear model with Gaussian noise and flat priors and good
whenever the posterior is close to Gaussian; the comparison with MCMC
(:func:`compare_with_mcmc`) tells how close it was.

The Hessian is taken by central finite differences in units of the mode's curvature
scale (:attr:`MapResult.scale`), all points in one vectorised call of the log posterior.
When the Hessian is not negative definite (a flat or saddle direction) no summary is given
and the reason says so: the curvature alone cannot identify the parameters.
"""

from __future__ import annotations

import math
from collections.abc import Callable, Sequence
from typing import Any

import numpy as np
from scipy import stats

from polkit.inference.optimize import MapResult
from polkit.inference.posterior import LogPosterior
from polkit.inference.priors import ParameterSpace

__all__ = ["LABEL", "laplace_summary", "format_quick", "compare_with_mcmc"]

#: how the quick answer is labelled wherever it is shown
LABEL = "approximate (Laplace, before MCMC)"
#: step of the finite differences, in units of the curvature scale of each parameter
_STEP = 0.2
_Z68 = float(stats.norm.ppf(0.84))
_Z95 = float(stats.norm.ppf(0.975))


def central_hessian(log_post: Callable, x: np.ndarray, h: np.ndarray) -> np.ndarray:
    """Central-difference Hessian of ``log_post`` at ``x`` with steps ``h`` (one batch).

    Every point is evaluated in one vectorised call; a point where ``log_post`` is not
    finite leaves non-finite entries (callers check ``np.isfinite``).

    Source: the standard second-order central differences, e.g. Abramowitz and Stegun,
    Handbook of Mathematical Functions, 25.3.23 and 25.3.26.
    """
    p = x.size
    eye = np.diag(h)
    points = [x]
    for i in range(p):
        points += [x + eye[i], x - eye[i]]
    pairs = [(i, j) for i in range(p) for j in range(i + 1, p)]
    for i, j in pairs:
        points += [x + eye[i] + eye[j], x + eye[i] - eye[j], x - eye[i] + eye[j],
                   x - eye[i] - eye[j]]
    values = np.asarray(log_post(np.array(points)), dtype=float)
    values = values.reshape(values.shape[0], -1)[:, 0]
    f0, k = values[0], 1
    hess = np.empty((p, p))
    for i in range(p):
        hess[i, i] = (values[k] - 2.0 * f0 + values[k + 1]) / h[i] ** 2
        k += 2
    for i, j in pairs:
        fpp, fpm, fmp, fmm = values[k : k + 4]
        hess[i, j] = hess[j, i] = (fpp - fpm - fmp + fmm) / (4.0 * h[i] * h[j])
        k += 4
    return hess


def laplace_summary(log_likelihood: Callable[[np.ndarray], np.ndarray], space: ParameterSpace,
                    start: MapResult, *, nuisance: Sequence[str] | None = None
                    ) -> dict[str, Any]:
    """The Laplace summary of the parameters at the mode ``start``.

    Parameters
    ----------
    log_likelihood
        The vectorised log-likelihood the run will sample (the log prior is added here).
    space
        Its parameter space.
    start
        The most probable point (:class:`MapResult`, with its curvature scale).
    nuisance
        Parameters left out of the summary (default: names containing ``noise``); they are
        still part of the Hessian, so the others are marginalised over them.

    Returns
    -------
    dict
        JSON-ready: ``method`` (:data:`LABEL`), ``available`` (bool), ``reason`` (why not,
        or ""), ``log_posterior_at_mode``, and ``parameters`` ``{name: {median, sd, q16,
        q84, q2_5, q97_5, units}}`` (median = mode; intervals clipped to the prior support,
        ``clipped`` true when that happened).
    """
    x = np.asarray(start.x, dtype=float)
    names = space.names
    nuisance = [n for n in names if "noise" in n] if nuisance is None else list(nuisance)
    log_post = LogPosterior(log_likelihood, space)
    lo, hi = space.bounds.T
    scale = np.where(np.isfinite(start.scale) & (start.scale > 0), start.scale, space.scales)
    # keep every difference point inside the prior support
    room = np.minimum(x - lo, hi - x)
    h = np.minimum(_STEP * scale, 0.45 * room)
    out: dict[str, Any] = {
        "method": LABEL,
        "available": False,
        "reason": "",
        "log_posterior_at_mode": float(start.log_post),
        "units_note": "median = the mode; sd from the inverse Hessian of the log posterior",
        "parameters": {},
    }
    if not np.all(h > 0):
        stuck = [names[j] for j in np.flatnonzero(~(h > 0))]
        out["reason"] = (f"the mode sits on the prior bound of {stuck}: the curvature there "
                         "does not describe the posterior")
        return out
    hess = central_hessian(log_post, x, h)
    if not np.all(np.isfinite(hess)):
        out["reason"] = "the log posterior is not finite around the mode"
        return out
    # work in units of the step so that the matrix is well scaled
    scaled = -hess * np.outer(h, h)
    eig = np.linalg.eigvalsh(scaled)
    if not eig.min() > 1e-10 * max(eig.max(), 1e-300):
        out["reason"] = ("the curvature at the mode is not negative definite (a flat or "
                         "saddle direction): the parameters are not identifiable from it")
        return out
    cov = np.linalg.inv(scaled) * np.outer(h, h)
    sd = np.sqrt(np.diag(cov))
    for j, p in enumerate(space):
        if p.name in nuisance:
            continue
        m, s = float(x[j]), float(sd[j])
        ends = {"q16": m - _Z68 * s, "q84": m + _Z68 * s,
                "q2_5": m - _Z95 * s, "q97_5": m + _Z95 * s}
        clipped = any(not lo[j] <= v <= hi[j] for v in ends.values())
        ends = {k: float(min(max(v, lo[j]), hi[j])) for k, v in ends.items()}
        out["parameters"][p.name] = {"median": m, "sd": s, **ends, "units": p.units,
                                     "clipped": bool(clipped)}
    out["available"] = True
    return out


def format_quick(summary: dict[str, Any]) -> str:
    """A text table of the quick answer, labelled approximate."""
    head = f"quick answer -- {summary['method']}"
    if not summary.get("available"):
        return f"{head}: not available: {summary.get('reason', '')}"
    w = max([20, *(len(n) for n in summary["parameters"])])
    u = max([6, *(len(v["units"]) for v in summary["parameters"].values())])
    rows = [head, f"{'parameter':{w}s} {'units':{u}s} {'median':>14s} {'sd':>12s}  68 % interval"]
    for name, v in summary["parameters"].items():
        rows.append(f"{name:{w}s} {v['units']:{u}s} {v['median']:14.7g} {v['sd']:12.4g}  "
                    f"[{v['q16']:.7g}, {v['q84']:.7g}]" + (" (clipped at prior bound)"
                                                           if v.get("clipped") else ""))
    return "\n".join(rows)


#: the quick answer is called close to the MCMC one when every physics parameter's mode lies
#: within this many MCMC sd of the MCMC median ...
_SHIFT_OK = 0.1
#: ... and its sd is within this relative distance of the MCMC sd
_SD_OK = 0.1


def compare_with_mcmc(summary: dict[str, Any], draws: dict[str, np.ndarray]) -> dict[str, Any]:
    """How far the Laplace summary lies from the MCMC draws, per parameter.

    ``shift_in_sd`` = (MCMC median - mode) / MCMC sd and ``sd_ratio`` = Laplace sd / MCMC sd
    (MCMC sd: half the central 68 % interval).  ``gaussian_enough`` is true when every
    ``|shift_in_sd| <= 0.1`` and ``|sd_ratio - 1| <= 0.1`` (common practice, no published
    source: a tenth of a standard deviation is below what the reported digits resolve).
    """
    out: dict[str, Any] = {"method": LABEL, "available": bool(summary.get("available")),
                           "parameters": {}}
    if not summary.get("available"):
        out["gaussian_enough"] = False
        out["note"] = summary.get("reason", "")
        return out
    ok = True
    for name, v in summary["parameters"].items():
        if name not in draws:
            continue
        d = np.asarray(draws[name], dtype=float).ravel()
        q16, med, q84 = np.quantile(d, [0.16, 0.5, 0.84])
        sd = 0.5 * (q84 - q16)
        shift = float((med - v["median"]) / sd) if sd > 0 else math.inf
        ratio = float(v["sd"] / sd) if sd > 0 else math.inf
        out["parameters"][name] = {"shift_in_sd": shift, "sd_ratio": ratio}
        ok &= abs(shift) <= _SHIFT_OK and abs(ratio - 1.0) <= _SD_OK
    out["gaussian_enough"] = bool(ok)
    out["note"] = ("the quick answer matches the MCMC medians and spreads within 0.1 sd and "
                   "10 %" if ok else "the posterior is not Gaussian enough for the quick "
                   "answer: use the MCMC summary")
    return out

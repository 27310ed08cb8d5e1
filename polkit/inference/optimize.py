"""Maximum a posteriori start and the initial walker ensemble.

:func:`find_map` finds the posterior mode with SciPy (``least_squares`` when the
caller gives a residual vector, ``minimize`` otherwise) and a per-parameter scale
from the local curvature; :func:`initial_ball` places walkers in a small ball of
that scale inside the prior support and checks that they span every dimension.
"""

from __future__ import annotations

import logging
import math
from collections.abc import Callable
from dataclasses import dataclass

import numpy as np
from scipy import optimize

from polkit.errors import FitError
from polkit.inference.posterior import describe_point
from polkit.inference.priors import ParameterSpace

__all__ = ["MapResult", "find_map", "initial_ball", "check_ensemble"]

log = logging.getLogger(__name__)


@dataclass
class MapResult:
    """Outcome of :func:`find_map`.

    Attributes
    ----------
    x
        The mode, shape ``(P,)``, in the parameters' units.
    log_post
        Log posterior at ``x``.
    scale
        Local posterior spread of each parameter (from the curvature), shape ``(P,)``.
    success
        Whether the optimiser reported convergence.
    message
        The optimiser's message, plus any fallback taken.
    """

    x: np.ndarray
    log_post: float
    scale: np.ndarray
    success: bool
    message: str


def _scalar_log_post(log_post: Callable, x: np.ndarray) -> float:
    value = np.asarray(log_post(np.asarray(x, dtype=float)[None, :]), dtype=float)
    return float(value.reshape(value.shape[0], -1)[0, 0])


def _vector_log_post(log_post: Callable, theta: np.ndarray) -> np.ndarray:
    value = np.asarray(log_post(theta), dtype=float)
    return value.reshape(value.shape[0], -1)[:, 0]


def _inside(x: np.ndarray, bounds: np.ndarray, widths: np.ndarray) -> np.ndarray:
    """Move ``x`` strictly inside finite bounds (by a tiny fraction of the width)."""
    lo, hi = bounds[:, 0], bounds[:, 1]
    margin = 1e-9 * np.where(np.isfinite(hi - lo), hi - lo, widths)
    return np.clip(x, lo + margin, hi - margin)


def _starting_point(log_post, space, x0, rng) -> tuple[np.ndarray, float, str]:
    bounds = space.bounds
    note = ""
    if x0 is not None:
        x0 = np.asarray(x0, dtype=float).reshape(-1)
        if x0.shape != (space.ndim,):
            raise FitError(
                f"x0 has {x0.size} values; expected {space.ndim} for {space.names}"
            )
        x0 = _inside(x0, bounds, space.scales)
        f0 = _scalar_log_post(log_post, x0)
        if np.isfinite(f0):
            return x0, f0, note
        note = f"the start ({describe_point(space, x0)}) has zero posterior; "
    draws = space.sample_prior(rng, 256)
    values = _vector_log_post(log_post, draws)
    finite = np.isfinite(values)
    if not finite.any():
        raise FitError(
            note + "no finite log posterior at 256 draws from the prior either; check the "
            "priors against the data and the model"
        )
    best = int(np.argmax(np.where(finite, values, -np.inf)))
    note += "started from the best of 256 prior draws; "
    return draws[best], float(values[best]), note


def _curvature_scale(f: Callable[[np.ndarray], float], x: np.ndarray, s: np.ndarray,
                     bounds: np.ndarray) -> tuple[np.ndarray, list[str]]:
    """Scale from the diagonal of the finite-difference Hessian of ``-log_post``.

    Works in units of ``s``; the step is shrunk until it is below the implied spread,
    and becomes one-sided next to a prior bound.
    """
    f0 = f(x)
    out = np.empty_like(s)
    failed = []
    for j in range(x.size):
        h = 0.05
        sd = math.nan
        for _ in range(8):
            e = np.zeros_like(x)
            e[j] = h * s[j]
            up_ok = x[j] + 2 * e[j] <= bounds[j, 1]
            down_ok = x[j] - 2 * e[j] >= bounds[j, 0]
            if up_ok and down_ok:
                fp, fm = f(x + e), f(x - e)
                d2 = (fp - 2 * f0 + fm) / h**2
            elif up_ok:
                d2 = (f(x + 2 * e) - 2 * f(x + e) + f0) / h**2
            elif down_ok:
                d2 = (f(x - 2 * e) - 2 * f(x - e) + f0) / h**2
            else:
                h /= 10.0
                continue
            # f is the log posterior: curvature of -f is -d2
            if not np.isfinite(d2) or d2 >= 0.0:
                h /= 4.0
                continue
            sd = 1.0 / math.sqrt(-d2)
            if h <= sd:
                break
            h = 0.5 * sd
        if np.isfinite(sd) and sd > 0:
            out[j] = sd * s[j]
        else:
            out[j] = s[j]
            failed.append(j)
    return out, failed


def find_map(
    log_post: Callable[[np.ndarray], np.ndarray],
    space: ParameterSpace,
    x0: np.ndarray | None,
    *,
    residuals: Callable[[np.ndarray], np.ndarray] | None = None,
    rng: np.random.Generator | None = None,
) -> MapResult:
    """Find the posterior mode and a local scale for each parameter.

    Parameters
    ----------
    log_post
        Vectorised log posterior ``theta[W, P] -> [W]`` (e.g. a
        :class:`~polkit.inference.posterior.LogPosterior`); ``-inf`` outside the prior.
    space
        The parameter space (bounds and typical scales).
    x0
        Starting point ``(P,)``.  If it is ``None`` or has zero posterior, the best of
        256 prior draws is used instead.
    residuals
        Optional ``theta[P] -> r[N]`` with ``chi^2 = sum r^2``.  When given,
        :func:`scipy.optimize.least_squares` runs within the prior bounds and the
        scale is ``sqrt(diag((J^T J)^-1))`` (regularised, capped at the prior spread).
        Otherwise :func:`scipy.optimize.minimize` (L-BFGS-B, then Powell if that
        fails) runs on ``-log_post`` and the scale comes from a finite-difference
        Hessian diagonal.
    rng
        Generator for the prior draws of a fallback start (default: seeded with 0).

    Returns
    -------
    MapResult
    """
    rng = np.random.default_rng(0) if rng is None else rng
    caps = np.array([p.prior.width for p in space])
    start, f_start, note = _starting_point(log_post, space, x0, rng)

    def f(x):
        return _scalar_log_post(log_post, x)

    if residuals is not None:
        found = _least_squares_map(f, residuals, space, start, caps, note)
        if isinstance(found, MapResult):
            return found
        note = found
    return _minimize_map(f, space, start, f_start, caps, note)


def _least_squares_map(f, residuals, space, start, caps, note) -> MapResult | str:
    """The mode by :func:`scipy.optimize.least_squares` within the prior bounds, or the
    note to go on with when its optimum has zero posterior."""
    bounds = space.bounds
    s = space.scales
    r0 = np.asarray(residuals(start), dtype=float)
    if not np.all(np.isfinite(r0)):
        raise FitError(
            f"the residuals are not finite at the start ({describe_point(space, start)})"
        )

    def fun(x):
        r = np.asarray(residuals(x), dtype=float)
        return np.where(np.isfinite(r), r, 1e100)

    res = optimize.least_squares(
        fun, start, bounds=(bounds[:, 0], bounds[:, 1]), x_scale=s, method="trf"
    )
    x = res.x
    value = f(x)
    if np.isfinite(value):
        js = res.jac * s  # Jacobian in units of the typical scales
        h = js.T @ js
        ridge = 1e-10 * max(np.trace(h) / h.shape[0], 1e-300)
        cov = np.linalg.pinv(h + ridge * np.eye(h.shape[0]), hermitian=True)
        scale = s * np.sqrt(np.clip(np.diag(cov), 0.0, None))
        bad = ~np.isfinite(scale) | (scale <= 0) | (scale > caps)
        scale = np.where(bad, caps, scale)
        if bad.any():
            note += (
                "curvature undefined or weaker than the prior for "
                f"{[space.names[j] for j in np.flatnonzero(bad)]} (prior spread used); "
            )
        log.debug("least_squares MAP: %s", describe_point(space, x))
        return MapResult(x, value, scale, bool(res.success), note + str(res.message))
    return note + "least-squares optimum has zero posterior; minimising -log_post instead; "


def _minimize_map(f, space, start, f_start, caps, note) -> MapResult:
    """The mode by :func:`scipy.optimize.minimize` on ``-log_post`` in units of the typical
    scales (L-BFGS-B, then Powell if that fails), with a finite-difference scale."""
    bounds = space.bounds
    s = space.scales
    penalty = -f_start + 1e10

    def objective(z):
        v = f(start + s * z)
        return -v if np.isfinite(v) else penalty

    zb = [
        (None if not np.isfinite(lo) else (lo - c) / sc, None if not np.isfinite(hi) else
         (hi - c) / sc)
        for (lo, hi), c, sc in zip(bounds, start, s, strict=True)
    ]
    res = optimize.minimize(objective, np.zeros_like(start), method="L-BFGS-B", bounds=zb)
    method = "L-BFGS-B"
    if not res.success or not np.isfinite(f(start + s * res.x)):
        res2 = optimize.minimize(objective, res.x, method="Powell", bounds=zb)
        if res2.fun <= res.fun or not res.success:
            res, method = res2, "Powell"
    x = start + s * res.x
    value = f(x)
    if not np.isfinite(value):
        raise FitError(
            note + f"the optimiser ended at zero posterior ({describe_point(space, x)})"
        )
    scale, failed = _curvature_scale(f, x, s, bounds)
    scale = np.minimum(scale, caps)
    if failed:
        note += (
            f"no positive curvature for {[space.names[j] for j in failed]} (prior spread "
            "used); "
        )
    return MapResult(x, value, scale, bool(res.success), note + f"{method}: {res.message}")


def check_ensemble(p0: np.ndarray, space: ParameterSpace) -> np.ndarray:
    """Check a starting ensemble ``p0[W, P]``: shape, support, and non-degeneracy.

    Raises
    ------
    FitError
        If ``W < 2 P``, a walker lies outside the prior support, or the walkers span
        fewer than ``P`` dimensions (which would trap the ensemble in a subspace).
    """
    p0 = np.asarray(p0, dtype=float)
    n_params = space.ndim
    if p0.ndim != 2 or p0.shape[1] != n_params:
        raise FitError(
            f"initial ensemble has shape {p0.shape}; expected (walkers, {n_params}) for "
            f"{space.names}"
        )
    n_walkers = p0.shape[0]
    if n_walkers < 2 * n_params:
        raise FitError(
            f"{n_walkers} walkers for {n_params} parameters; use at least {2 * n_params}"
        )
    if not np.all(np.isfinite(p0)):
        raise FitError("the initial ensemble holds NaN or infinite values")
    lp = space.log_prior(p0)
    if not np.all(np.isfinite(lp)):
        bad = int(np.flatnonzero(~np.isfinite(lp))[0])
        raise FitError(
            f"walker {bad} starts outside the prior support: {describe_point(space, p0[bad])}"
        )
    spread = p0.std(axis=0)
    flat = [space.names[j] for j in np.flatnonzero(spread == 0.0)]
    if flat:
        raise FitError(
            f"degenerate initial ensemble: every walker has the same value of {flat}; give "
            "a positive scale for these parameters"
        )
    centred = (p0 - p0.mean(axis=0)) / spread
    sv = np.linalg.svd(centred, compute_uv=False)
    rank = int(np.sum(sv > sv[0] * 1e-8))
    if rank < n_params:
        raise FitError(
            f"degenerate initial ensemble: the {n_walkers} walkers span {rank} of "
            f"{n_params} dimensions ({space.names}); the sampler could never leave that "
            "subspace"
        )
    return p0


def initial_ball(
    x: np.ndarray,
    scale: np.ndarray,
    n_walkers: int,
    rng: np.random.Generator,
    space: ParameterSpace,
    *,
    spread: float = 0.1,
) -> np.ndarray:
    """Walkers in a small Gaussian ball around ``x``, inside the prior support.

    Parameters
    ----------
    x
        Centre ``(P,)`` (usually the MAP).
    scale
        Per-parameter spread ``(P,)`` (usually :attr:`MapResult.scale`).
    n_walkers
        Number of walkers ``W``.
    rng
        The generator to draw from.
    space
        Parameter space (prior support).
    spread
        Ball radius in units of ``scale``.

    Returns
    -------
    ndarray
        Shape ``(W, P)``; checked by :func:`check_ensemble`.

    Raises
    ------
    FitError
        If the centre is outside the prior or the ball is degenerate.
    """
    x = np.asarray(x, dtype=float).reshape(-1)
    scale = np.asarray(scale, dtype=float).reshape(-1)
    if x.shape != (space.ndim,) or scale.shape != (space.ndim,):
        raise FitError(
            f"centre and scale need {space.ndim} values for {space.names}; got "
            f"{x.size} and {scale.size}"
        )
    if not np.isfinite(space.log_prior(x)):
        raise FitError(f"the ball centre is outside the prior: {describe_point(space, x)}")
    bounds = space.bounds
    lo, hi = bounds[:, 0], bounds[:, 1]
    # a curvature measured across a kink of the posterior (e.g. a coupling pressed to zero,
    # where two complex branch energies meet) can be so large that the ball rounds to one
    # point in floating point; keep every spread above 1e-9 of the parameter's magnitude or
    # prior width so the ensemble always spans the space (the pre-burn widens it).  A
    # scale of exactly zero is the caller's request and is refused below.
    # common practice, no published source
    width = np.where(np.isfinite(hi - lo), hi - lo, 0.0)
    scale = np.where(scale > 0, np.maximum(scale, 1e-9 * np.maximum(np.abs(x), width)), scale)
    p0 = x + spread * scale * rng.standard_normal((n_walkers, space.ndim))
    for _ in range(100):
        out = (p0 < lo) | (p0 > hi)
        if not out.any():
            break
        fresh = x + spread * scale * rng.standard_normal((n_walkers, space.ndim))
        p0 = np.where(out, fresh, p0)
    out = (p0 < lo) | (p0 > hi)
    if out.any():  # centre pressed against a bound: spread between centre and bound
        u = rng.uniform(size=p0.shape)
        target = np.where(p0 < lo, lo, hi)
        p0 = np.where(out, x + u * (target - x), p0)
    return check_ensemble(p0, space)

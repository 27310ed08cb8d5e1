"""The log posterior the engine samples: a vectorised log-likelihood plus the log prior.

The combined function evaluates the likelihood only where the prior is positive,
returns ``-inf`` elsewhere, and refuses NaN (and ``+inf``) with a :class:`FitError`
that names the offending parameter values: a NaN in a log-probability is a bug in
the model or the data, never something to sample through.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

from polkit.errors import FitError
from polkit.inference.priors import ParameterSpace

__all__ = ["LogPosterior", "describe_point"]


def describe_point(space: ParameterSpace, theta: np.ndarray) -> str:
    """``"name = value units, ..."`` for one parameter vector (for error messages)."""
    theta = np.asarray(theta, dtype=float).reshape(-1)
    return ", ".join(
        f"{p.name} = {v!r} {p.units}" for p, v in zip(space, theta.tolist(), strict=True)
    )


class LogPosterior:
    """Vectorised log posterior ``log p(theta) + log L(theta)``.

    Parameters
    ----------
    log_likelihood
        ``theta[W, P] -> log L[W]``; with ``n_extras > 0`` it returns a pair
        ``(log L[W], extras[W, n_extras])`` of per-walker side results.
    space
        The parameter space (priors, names, units).
    n_extras
        Number of side results per walker (0 for none).

    Calling the object with ``theta[W, P]`` returns ``log_post[W]``, or an array of
    shape ``(W, 1 + n_extras)`` whose first column is the log posterior when
    ``n_extras > 0`` (the layout emcee stores as per-walker blobs).  Extras are NaN
    where the prior vanishes.
    """

    def __init__(
        self,
        log_likelihood: Callable[[np.ndarray], np.ndarray],
        space: ParameterSpace,
        *,
        n_extras: int = 0,
    ):
        self.log_likelihood = log_likelihood
        self.space = space
        self.n_extras = int(n_extras)
        self.n_calls = 0

    def __call__(self, theta: np.ndarray) -> np.ndarray:
        theta = np.asarray(theta, dtype=float)
        if theta.ndim != 2 or theta.shape[1] != self.space.ndim:
            raise FitError(
                f"the log posterior takes theta of shape (W, {self.space.ndim}) for "
                f"{self.space.names}; got {theta.shape}"
            )
        n_walkers = theta.shape[0]
        self.n_calls += 1
        log_post = self.space.log_prior(theta)
        extras = np.full((n_walkers, self.n_extras), np.nan) if self.n_extras else None
        inside = np.isfinite(log_post)
        n_inside = int(np.count_nonzero(inside))
        if np.isnan(theta).any():
            bad = int(np.flatnonzero(np.isnan(theta).any(axis=1))[0])
            raise FitError(f"NaN parameter values reached the log posterior: "
                           f"{describe_point(self.space, theta[bad])}")
        if n_inside:
            every = n_inside == n_walkers  # the usual case: no gathered copy
            result = self.log_likelihood(theta if every else theta[inside])
            if self.n_extras:
                if not (isinstance(result, tuple) and len(result) == 2):
                    raise FitError(
                        f"the log-likelihood must return (log L[W], extras[W, "
                        f"{self.n_extras}]) when extras are requested; got "
                        f"{type(result).__name__}"
                    )
                result, side = result
                side = np.asarray(side, dtype=float).reshape(n_inside, -1)
                if side.shape[1] != self.n_extras:
                    raise FitError(
                        f"the log-likelihood returned {side.shape[1]} extras per walker; "
                        f"expected {self.n_extras}"
                    )
                extras[inside] = side
            loglike = np.asarray(result, dtype=float)
            if loglike.shape != (n_inside,):
                raise FitError(
                    f"the log-likelihood returned shape {loglike.shape} for {n_inside} "
                    f"walkers; expected ({n_inside},)"
                )
            if not loglike.max() < np.inf:  # a NaN or +inf somewhere (one reduction)
                bad = np.isnan(loglike) | (loglike == np.inf)
                rows = theta[inside][bad]
                shown = "; ".join(describe_point(self.space, r) for r in rows[:3])
                more = f" (and {len(rows) - 3} more)" if len(rows) > 3 else ""
                what = "NaN" if np.isnan(loglike[bad][0]) else "+inf"
                raise FitError(
                    f"the log-likelihood returned {what} at {shown}{more}; a log-likelihood "
                    f"must be finite or -inf: check the model and the data at these values"
                )
            if every:
                log_post += loglike
            else:
                log_post[inside] += loglike
        if self.n_extras:
            return np.column_stack([log_post, extras])
        return log_post

    def scalar(self, x: np.ndarray) -> float:
        """Log posterior at one point ``x[P]`` as a float (for optimisers)."""
        value = self(np.asarray(x, dtype=float)[None, :])
        return float(value[0, 0] if self.n_extras else value[0])

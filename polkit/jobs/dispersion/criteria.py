"""The criteria of a dispersion model comparison: elpd by PSIS-LOO and WAIC, per spectrum.

The unit left out is one spectrum (one angle or k); its pointwise log-likelihood for a
posterior draw is the Gaussian log density of its pixels with the amplitudes and
background solved for that draw, normalisation included, so models are compared in the
same units (nats).  The optimism of the solved coefficients is removed by one nat per
active coefficient (the Akaike correction).  The reasoning and its caveats are in
:mod:`polkit.jobs.dispersion.compare`.
"""

from __future__ import annotations

import warnings
from collections.abc import Mapping
from typing import Any

import numpy as np

from polkit.jobs.dispersion.problem import DispersionProblem
from polkit.numerics import projection

__all__ = [
    "PARETO_K_LIMIT",
    "pointwise_log_likelihood",
    "information_criteria",
    "sum_and_se",
]

#: Pareto shape above which PSIS-LOO is unreliable (Vehtari et al., Stat. Comput. 27, 1413, 2017)
PARETO_K_LIMIT = 0.7


def pointwise_log_likelihood(
    problem: DispersionProblem, draws: np.ndarray, *, batch: int = 64
) -> tuple[np.ndarray, np.ndarray]:
    """Gaussian log density of each spectrum for each draw, and the active linear columns.

    Parameters
    ----------
    problem
        The fitted whole-map problem (its data, noise model and parameter space).
    draws
        Parameter vectors of shape ``(..., P)``.
    batch
        Draws evaluated per call (bounds the memory of the model maps).

    Returns
    -------
    (log_lik, active)
        ``log_lik`` of shape ``(..., A)`` in nats: ``sum_E log N(y | model, var / w)``
        over the unmasked pixels of each spectrum, with ``var = s^2 / inv_var`` (``s``
        the draw's noise scale); ``active`` of the same shape: solved coefficients of that
        spectrum that are not at their bound (non-zero amplitudes plus the background).
    """
    draws = np.asarray(draws, dtype=float)
    lead = draws.shape[:-1]
    flat = draws.reshape(-1, draws.shape[-1])
    w = problem.inv_var
    used = w > 0
    n_pix = used.sum(axis=1)  # (A,)
    # -1/2 sum log(2 pi var_pixel) for s = 1
    log_norm = -0.5 * np.sum(np.where(used, np.log(2.0 * np.pi) - np.log(np.where(used, w, 1.0)),
                                      0.0), axis=1)
    n_bg = problem.n_background_columns
    out = np.empty((flat.shape[0], w.shape[0]))
    act = np.empty_like(out)
    for start in range(0, flat.shape[0], batch):
        t = flat[start:start + batch]
        sol = projection.project_linear(problem._weighted, None, problem.basis(t), nonneg=True,
                                      return_parts=True)
        s = problem._noise_scale(t)[:, None]
        out[start:start + batch] = (-0.5 * sol.chi2_per_angle / (s * s)
                                    - n_pix[None, :] * np.log(s) + log_norm[None, :])
        act[start:start + batch] = np.count_nonzero(sol.amplitudes > 0, axis=-1) + n_bg
    no_data = n_pix == 0
    out[:, no_data], act[:, no_data] = 0.0, 0.0
    return out.reshape(lead + (w.shape[0],)), act.reshape(lead + (w.shape[0],))


def _elpd_arviz(log_lik: np.ndarray, posterior: Mapping[str, np.ndarray]) -> dict[str, Any]:
    """PSIS-LOO and WAIC from ArviZ for a ``(chain, draw, spectrum)`` log-likelihood."""
    from polkit._arviz import arviz

    az = arviz()

    idata = az.from_dict(posterior=dict(posterior), log_likelihood={"spectrum": log_lik})
    with warnings.catch_warnings():
        # ArviZ warns about high Pareto k and about WAIC's variance check; both are
        # reported in the result instead (k counted, p_waic per spectrum kept)
        warnings.simplefilter("ignore", UserWarning)
        loo = az.loo(idata, pointwise=True, var_name="spectrum")
        waic = az.waic(idata, pointwise=True, var_name="spectrum")
    return {
        "loo_i": np.asarray(loo["loo_i"]).reshape(-1),
        "pareto_k": np.asarray(loo["pareto_k"]).reshape(-1),
        "waic_i": np.asarray(waic["waic_i"]).reshape(-1),
        "p_loo": float(loo["p_loo"]),
        "p_waic": float(waic["p_waic"]),
    }


def sum_and_se(pointwise: np.ndarray) -> tuple[float, float]:
    """Sum and standard error ``sqrt(n var)`` (Vehtari et al. 2017, eq. 23)."""
    n = pointwise.size
    return float(pointwise.sum()), float(np.sqrt(n * np.var(pointwise, ddof=1))) if n > 1 else 0.0


def information_criteria(
    log_lik: np.ndarray, active: np.ndarray, posterior: Mapping[str, np.ndarray]
) -> dict[str, Any]:
    """elpd by PSIS-LOO and WAIC with the correction for solved coefficients.

    Parameters
    ----------
    log_lik
        Pointwise log-likelihood, shape ``(chain, draw, spectrum)``, nats.
    active
        Active solved coefficients per draw and spectrum, same shape.
    posterior
        The draws ``{name: (chain, draw)}`` (ArviZ uses them for the relative
        efficiency of the importance sampling).

    Returns
    -------
    dict
        ``elpd_loo``, ``elpd_loo_se``, ``p_loo`` (sampled plus solved), ``elpd_waic``,
        ``elpd_waic_se``, ``p_waic``, ``linear_per_spectrum`` (mean active coefficients),
        ``max_pareto_k``, ``n_high_k`` and the corrected pointwise ``elpd_i`` and
        ``pareto_k``.
    """
    res = _elpd_arviz(log_lik, posterior)
    correction = active.reshape(-1, active.shape[-1]).mean(axis=0)  # (A,)
    loo_i = res["loo_i"] - correction
    waic_i = res["waic_i"] - correction
    elpd_loo, se_loo = sum_and_se(loo_i)
    elpd_waic, se_waic = sum_and_se(waic_i)
    k = res["pareto_k"]
    return {
        "elpd_loo": elpd_loo,
        "elpd_loo_se": se_loo,
        "p_loo": res["p_loo"] + float(correction.sum()),
        "elpd_waic": elpd_waic,
        "elpd_waic_se": se_waic,
        "p_waic": res["p_waic"] + float(correction.sum()),
        "linear_per_spectrum": float(correction.mean()),
        "max_pareto_k": float(np.nanmax(k)) if k.size else float("nan"),
        "n_high_k": int(np.count_nonzero(k > PARETO_K_LIMIT)),
        "elpd_i": loo_i,
        "pareto_k": k,
    }

"""Convergence diagnostics for ensemble MCMC.

* integrated autocorrelation time (emcee's estimator, averaged over walkers);
* per-walker acceptance read off the stored chain, and stuck-walker detection;
* nested R-hat over independently seeded ensembles, written out from
  Margossian et al., "Nested R-hat: assessing the convergence of Markov chain
  Monte Carlo when running many short chains", arXiv:2110.13017 (2022), because
  ArviZ 0.23 does not provide it;
* ArviZ bulk/tail effective sample sizes and rank-normalised split R-hat.

Walkers of one affine-invariant ensemble are *not* independent chains (each
proposal is built from the other walkers), so R-hat computed over the walkers of a
single ensemble raises false alarms; polkit reports it for information and gates
on it only through nested R-hat across independent ensembles (strict mode).
"""

from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

__all__ = [
    "autocorr_time",
    "walker_acceptance",
    "stuck_walkers",
    "nested_rhat",
    "arviz_diagnostics",
    "GateCheck",
    "convergence_gate",
    "burn_and_thin",
    "grouped_rhat",
    "ess_targets",
]

log = logging.getLogger(__name__)


def _arviz():
    from polkit._arviz import arviz

    return arviz()


def autocorr_time(chain: np.ndarray) -> np.ndarray:
    """Integrated autocorrelation time of each parameter, in steps.

    Parameters
    ----------
    chain
        Shape ``(steps, walkers, P)``.

    Returns
    -------
    ndarray
        Shape ``(P,)``: emcee's estimator (normalised autocorrelation averaged over
        walkers, Sokal's automatic window with ``c = 5``, as
        :func:`emcee.autocorr.integrated_time`), computed for all walkers and parameters
        in one real FFT instead of one complex FFT per walker and parameter.  Walkers
        that never move are left out; a parameter no walker moves in gets ``inf``.
    """
    chain = np.asarray(chain, dtype=float)
    n_steps, _, n_params = chain.shape
    out = np.full(n_params, np.inf)
    if n_steps < 2:
        return out
    moving = np.ptp(chain, axis=0) > 0  # (W, P)
    if not moving.any():
        return out
    # Source: emcee.autocorr.function_1d -- the autocorrelation by FFT of the centred
    # series, normalised at lag 0.  emcee pads to twice the next power of two; any length
    # of at least 2 N - 1 gives the same linear (not circular) autocorrelation, so the
    # fastest such length is taken (the values agree to rounding)
    from scipy import fft

    n_fft = fft.next_fast_len(2 * n_steps - 1, real=True)
    centred = np.ascontiguousarray((chain - chain.mean(axis=0)).transpose(1, 2, 0))
    spectrum = fft.rfft(centred, n=n_fft, axis=-1)  # (W, P, frequencies)
    acf = fft.irfft(spectrum.real**2 + spectrum.imag**2, n=n_fft, axis=-1)[..., :n_steps]
    with np.errstate(invalid="ignore", divide="ignore"):
        acf = acf / acf[..., :1]
    n_moving = moving.sum(axis=0)
    f = np.where(moving[..., None], acf, 0.0).sum(axis=0).T / np.maximum(n_moving, 1)
    # Source: emcee.autocorr.integrated_time and auto_window (Sokal's window, c = 5)
    taus = 2.0 * np.cumsum(f, axis=0) - 1.0
    inside = np.arange(n_steps)[:, None] < 5.0 * taus
    window = np.where(inside.any(axis=0), np.argmin(inside, axis=0), n_steps - 1)
    tau = taus[window, np.arange(n_params)]
    return np.where(n_moving > 0, tau, out)


def walker_acceptance(chain: np.ndarray) -> np.ndarray:
    """Fraction of steps in which each walker moved, shape ``(walkers,)``.

    An accepted proposal moves a walker to a new point (landing exactly on the old
    point has probability zero), so this equals the acceptance fraction over the
    window ``chain`` covers.
    """
    chain = np.asarray(chain)
    if chain.shape[0] < 2:
        return np.full(chain.shape[1], np.nan)
    moved = np.any(chain[1:] != chain[:-1], axis=-1)
    return moved.mean(axis=0)


def stuck_walkers(
    acceptance: np.ndarray,
    log_prob: np.ndarray,
    n_params: int,
    *,
    min_acceptance: float = 0.05,
) -> np.ndarray:
    """Indices of walkers that are stuck.

    A walker is stuck when it accepts fewer than ``min_acceptance`` of its
    proposals, or when its median log-probability lies more than ``max(10, P)``
    below the median over walkers (``-2 log p`` of a ``P``-dimensional Gaussian
    posterior spreads over about ``P``, so such a walker sits where the bulk never
    goes -- typically a minor mode).

    Parameters
    ----------
    acceptance
        Shape ``(walkers,)``.
    log_prob
        Shape ``(steps, walkers)``.
    n_params
        ``P``.
    """
    acceptance = np.asarray(acceptance, dtype=float)
    med = np.median(np.asarray(log_prob, dtype=float), axis=0)
    finite = np.isfinite(med)
    centre = np.median(med[finite]) if finite.any() else -np.inf
    low_lp = ~finite | (med < centre - max(10.0, float(n_params)))
    return np.flatnonzero((acceptance < min_acceptance) | low_lp)


def nested_rhat(draws: np.ndarray) -> np.ndarray | float:
    """Nested R-hat of Margossian et al. (arXiv:2110.13017, 2022).

    With ``K`` superchains of ``M`` subchains of ``N`` draws ``f[k, m, n]``::

        fbar_.mk = mean_n f[k, m, n]          (subchain means)
        fbar_..k = mean_m fbar_.mk            (superchain means)
        fbar_... = mean_k fbar_..k
        B_nu  = 1/(K-1) sum_k (fbar_..k - fbar_...)^2
        Btilde_k = 1/(M-1) sum_m (fbar_.mk - fbar_..k)^2      (0 when M = 1)
        Wtilde_k = 1/M sum_m 1/(N-1) sum_n (f[k,m,n] - fbar_.mk)^2   (0 when N = 1)
        W_nu  = 1/K sum_k (Btilde_k + Wtilde_k)
        nRhat = sqrt(1 + B_nu / W_nu)

    In polkit the superchains are independently seeded ensembles and the
    subchains are their walkers.

    Parameters
    ----------
    draws
        Shape ``(K, M, N)`` or ``(K, M, N, P)``, ``K >= 2``.

    Returns
    -------
    float or ndarray
        One value, or shape ``(P,)``.
    """
    f = np.asarray(draws, dtype=float)
    single = f.ndim == 3
    if single:
        f = f[..., None]
    if f.ndim != 4:
        raise ValueError(f"nested R-hat needs draws of shape (K, M, N[, P]); got {f.shape}")
    n_super, n_sub, n_draw, _ = f.shape
    if n_super < 2:
        raise ValueError(f"nested R-hat needs at least 2 superchains; got {n_super}")
    sub_mean = f.mean(axis=2)  # (K, M, P)
    super_mean = sub_mean.mean(axis=1)  # (K, P)
    b_nu = super_mean.var(axis=0, ddof=1)
    b_tilde = sub_mean.var(axis=1, ddof=1) if n_sub > 1 else np.zeros_like(super_mean)
    w_tilde = f.var(axis=2, ddof=1).mean(axis=1) if n_draw > 1 else np.zeros_like(super_mean)
    w_nu = (b_tilde + w_tilde).mean(axis=0)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.sqrt(1.0 + b_nu / w_nu)
    out = np.where((w_nu == 0) & (b_nu == 0), 1.0, out)
    return float(out[0]) if single else out


def arviz_diagnostics(draws: xr.Dataset) -> dict:
    """ArviZ bulk/tail ESS and rank-normalised split R-hat of every variable.

    Parameters
    ----------
    draws
        Dataset with dims ``(chain, draw)``.

    Returns
    -------
    dict
        ``ess_bulk``, ``ess_tail``, ``rhat`` (``{name: value}``) and their extremes
        ``min_ess_bulk``, ``min_ess_tail``, ``max_rhat``.  R-hat here treats walkers as
        chains and is informational (see the module notes).
    """
    az = _arviz()
    with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        bulk = az.ess(draws, method="bulk")
        tail = az.ess(draws, method="tail")
        rhat = az.rhat(draws)

    def as_dict(ds):
        return {name: float(ds[name].values) for name in draws.data_vars}

    out = {"ess_bulk": as_dict(bulk), "ess_tail": as_dict(tail), "rhat": as_dict(rhat)}

    def extreme(values, fn):
        finite = [v for v in values if math.isfinite(v)]
        return fn(finite) if len(finite) == len(values) and finite else math.nan

    out["min_ess_bulk"] = extreme(list(out["ess_bulk"].values()), min)
    out["min_ess_tail"] = extreme(list(out["ess_tail"].values()), min)
    out["max_rhat"] = extreme(list(out["rhat"].values()), max)
    return out


def burn_and_thin(tau_max: float, length: int) -> tuple[int, int]:
    """Burn-in (5 tau, at most half the chain) and thinning (tau / 2) of a chain of ``length``.

    At least two draws per walker are kept.  An undefined ``tau`` burns half the chain and
    keeps every step.  # common practice, no published source (burn-in of a few tau,
    thinning below tau loses little effective sample size)
    """
    if math.isfinite(tau_max):
        burn = min(int(math.ceil(5.0 * tau_max)), length // 2)
        thin = max(1, int(0.5 * tau_max))
    else:
        burn, thin = length // 2, 1
    thin = min(thin, max(1, (length - burn) // 2))
    return burn, thin


def _draws_dataset(kept: np.ndarray, names: Sequence[str]) -> xr.Dataset:
    """(D, W, P) kept steps -> Dataset with walkers as chains, dims (chain, draw)."""
    return xr.Dataset({n: (("chain", "draw"), kept[:, :, j].T) for j, n in enumerate(names)})


def grouped_rhat(kept: np.ndarray, names: Sequence[str], groups: int = 4) -> dict[str, float]:
    """Rank-normalised split R-hat over disjoint groups of walkers of one ensemble.

    The walkers are cut into ``groups`` groups of neighbouring indices (emcee draws the
    complementary halves of its moves at random at every step, so the indices carry no
    meaning); each group's draws, in step order and walker by walker within a step, are
    one chain of ArviZ's R-hat (Vehtari et al., Bayesian Analysis 16, 667 (2021)).  A
    group that wandered off, or a trend within the window, shows as R-hat above 1.

    Parameters
    ----------
    kept
        Burned-in, thinned steps, shape ``(D, W, P)``.
    names
        Parameter names.
    groups
        Number of groups (at most ``W // 2``; walkers beyond equal groups are left out).
    """
    n_draw, n_walk, _ = kept.shape
    g = max(2, min(int(groups), n_walk // 2))
    size = n_walk // g
    cut = kept[:, : g * size].reshape(n_draw, g, size, -1)  # (D, G, Wg, P)
    chains = np.moveaxis(cut, 1, 0).reshape(g, n_draw * size, -1)  # step-major within a group
    ds = xr.Dataset({n: (("chain", "draw"), chains[..., j]) for j, n in enumerate(names)})
    az = _arviz()
    with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        rhat = az.rhat(ds, method="rank")
    return {n: float(rhat[n].values) for n in names}


@dataclass
class GateCheck:
    """One evaluation of the convergence gate on the first ``steps`` steps of a chain.

    ``ess`` (ArviZ bulk/tail ESS of the draws the run would report, see
    :func:`arviz_diagnostics`) and ``group_rhat`` are ``None`` when the cheaper tests
    failed first and they were not computed.
    """

    steps: int
    tau: np.ndarray
    tau_change: float
    acceptance: np.ndarray
    stuck: np.ndarray
    passed: bool
    reasons: list[str] = field(default_factory=list)
    burn_in: int = 0
    thin: int = 1
    ess: dict | None = None
    group_rhat: dict | None = None


def ess_targets(names: Sequence[str], target: float | Mapping[str, float],
                nuisance: Sequence[str] = (), nuisance_target: float = 400.0
                ) -> dict[str, float]:
    """Per-parameter ESS targets: ``target`` for physics parameters, less for nuisance ones.

    A noise scale is never reported for itself; ``nuisance_target`` (default 400, the
    floor Vehtari et al., Bayesian Analysis 16, 667 (2021) recommend for bulk and tail
    ESS) is enough for it to be marginalised over.  A mapping gives the targets by name.
    """
    if isinstance(target, Mapping):
        return {n: float(target.get(n, nuisance_target if n in nuisance else 0.0))
                for n in names}
    return {n: float(min(target, nuisance_target) if n in nuisance else target)
            for n in names}


def convergence_gate(
    chain: np.ndarray,
    log_prob: np.ndarray,
    previous_tau: np.ndarray | None = None,
    *,
    names: Sequence[str],
    autocorr_factor: float = 25.0,
    tau_rtol: float | None = None,
    acceptance_range: tuple[float, float] = (0.15, 0.7),
    ess_target: float | Mapping[str, float] | None = 1000.0,
    rhat_max: float = 1.01,
    walker_groups: int = 4,
) -> GateCheck:
    """Evaluate the convergence gate on a chain of ``n`` steps.

    The gate passes when

    1. the chain is at least ``autocorr_factor`` autocorrelation times long (a safety
       floor: ``tau`` must be estimable; it need not have settled);
    2. every walker's acceptance lies in ``acceptance_range`` and no walker is stuck
       (:func:`stuck_walkers`);
    3. the draws the run would report (burn-in and thinning of :func:`burn_and_thin`)
       have bulk and tail ESS of at least ``ess_target`` for every parameter (ArviZ,
       walkers as chains, as in the run's diagnostics);
    4. rank-normalised R-hat over ``walker_groups`` groups of walkers
       (:func:`grouped_rhat`) is at most ``rhat_max`` for every parameter;
    5. with ``tau_rtol`` given, also every ``tau`` changed by less than ``tau_rtol``
       (relative) since ``previous_tau`` (the former, stricter rule).

    ``tau``, acceptance and stuck walkers use the chain after its first quarter.  Tests 3
    and 4 are computed only when 1 and 2 pass.  The result depends on the chain alone, so
    a resumed run takes the same decisions.

    Parameters
    ----------
    chain
        Shape ``(n, walkers, P)``.
    log_prob
        Shape ``(n, walkers)``.
    previous_tau
        ``tau`` from the previous check (used only with ``tau_rtol``).
    names
        Parameter names, for the reasons.
    ess_target
        One target for all parameters or ``{name: target}`` (see :func:`ess_targets`);
        ``None`` skips tests 3 and 4 (a short run whose draws are not reported).
    """
    n = chain.shape[0]
    start = n // 4
    window = chain[start:]
    tau = autocorr_time(window)
    reasons = []
    tau_max = _length_reasons(tau, n, autocorr_factor, names, reasons)
    change = math.nan
    if tau_rtol is not None:
        change = _tau_change_reasons(tau, previous_tau, tau_rtol, reasons)
    acceptance = walker_acceptance(window)
    stuck = _walker_reasons(acceptance, log_prob[start:], chain.shape[2], acceptance_range,
                            reasons)
    burn, thin = burn_and_thin(tau_max, n)
    ess = group = None
    if not reasons and ess_target is not None:
        ess, group = _draws_reasons(chain[burn::thin], names, ess_target, rhat_max,
                                    walker_groups, reasons)
    return GateCheck(n, tau, change, acceptance, stuck, not reasons, reasons, burn, thin,
                     ess, group)


def _length_reasons(tau, n, autocorr_factor, names, reasons) -> float:
    """Gate test 1 (the chain long enough); returns the largest ``tau``."""
    jmax = int(np.argmax(np.where(np.isfinite(tau), tau, np.inf)))
    tau_max = float(tau[jmax])
    if not np.isfinite(tau_max):
        reasons.append(f"no walker moves in {names[jmax]!r}: the autocorrelation time is "
                       "undefined")
    elif n < autocorr_factor * tau_max:
        reasons.append(
            f"chain of {n} steps is shorter than {autocorr_factor:g} x the autocorrelation "
            f"time ({autocorr_factor * tau_max:.0f} steps; tau = {tau_max:.1f} for "
            f"{names[jmax]!r})"
        )
    return tau_max


def _tau_change_reasons(tau, previous_tau, tau_rtol, reasons) -> float:
    """Gate test 5 (``tau`` settled); returns the largest relative change (NaN: none)."""
    change = math.nan
    if previous_tau is None:
        reasons.append("no previous autocorrelation estimate to compare with")
    else:
        with np.errstate(invalid="ignore", divide="ignore"):
            rel = np.abs(tau - previous_tau) / tau
        change = float(np.max(np.where(np.isfinite(rel), rel, np.inf)))
        if not change < tau_rtol:
            reasons.append(
                f"autocorrelation time still changing ({100 * change:.1f} % since the "
                f"previous check; limit {100 * tau_rtol:g} %)"
            )
    return change


def _walker_reasons(acceptance, log_prob, ndim, acceptance_range, reasons) -> np.ndarray:
    """Gate test 2 (acceptance in range, no stuck walker); returns the stuck walkers."""
    lo, hi = acceptance_range
    outside = np.flatnonzero((acceptance < lo) | (acceptance > hi))
    if outside.size:
        reasons.append(
            f"{outside.size} walker(s) with acceptance outside {lo:g}-{hi:g} "
            f"(range {np.nanmin(acceptance):.3f}-{np.nanmax(acceptance):.3f}; walkers "
            f"{outside[:10].tolist()})"
        )
    stuck = stuck_walkers(acceptance, log_prob, ndim)
    if stuck.size:
        reasons.append(
            f"stuck walkers {stuck[:10].tolist()} (acceptance < 0.05 or log-probability far "
            "below the rest)"
        )
    return stuck


def _draws_reasons(kept, names, ess_target, rhat_max, walker_groups, reasons):
    """Gate tests 3 and 4 on the reported draws; returns ArviZ's numbers and grouped R-hat."""
    ess = arviz_diagnostics(_draws_dataset(kept, names))
    targets = ess_targets(names, ess_target)
    for kind in ("ess_bulk", "ess_tail"):
        short = [f"{p} {ess[kind][p]:.0f}" for p in names
                 if not ess[kind][p] >= targets[p]]
        if short:
            reasons.append(
                f"{kind.replace('ess_', '')} ESS below the target "
                f"({', '.join(short)}; target {_target_text(targets)})"
            )
    group = grouped_rhat(kept, names, walker_groups)
    high = [f"{p} {v:.4f}" for p, v in group.items() if not v <= rhat_max]
    if high:
        reasons.append(f"R-hat over groups of walkers above {rhat_max:g} "
                       f"({', '.join(high)})")
    return ess, group


def _target_text(targets: Mapping[str, float]) -> str:
    values = sorted(set(targets.values()))
    if len(values) == 1:
        return f"{values[0]:g}"
    return ", ".join(f"{n} {t:g}" for n, t in targets.items() if t != max(values)) + \
        f", others {max(values):g}"

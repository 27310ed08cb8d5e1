"""Does the power-series model describe the data?  A check that does not use the fitted noise.

A fit that samples its own noise scale can always make its residuals look normal: a model
that misses the data by ten times their noise just fits a noise scale of ten, and the
intervals stay tight around the wrong numbers.  This check judges the residuals against a
noise floor that owes nothing to the fit:

* the data's own error column where the table has one (per point, in fit space);
* otherwise the data alone: within each sweep, along power, each interior point minus the
  straight line through its two neighbours (``r = A y``, a second difference); for a
  smooth response this is noise, so ``s^2 = |r|^2 / tr(A A^T)`` estimates the variance,
  with ``nu = tr(A A^T)^2 / tr((A A^T)^2)`` effective degrees of freedom (Satterthwaite,
  Biometrics Bulletin 2, 110, 1946).  Steps over 5 robust standard deviations (the jump
  of a bistable loop, a stray point) are left out first, so the floor is taken away from
  jumps.  Curvature of the response can only raise this floor, which makes the check
  lenient, never strict.  The reservoir model's log-space intensity is differenced along
  ``ln P``.

Two tests per observable, on the posterior draw that fits best under that floor (the
fitted noise parameters are ignored):

* chi-square per degree of freedom, ``sum(r^2 / sigma^2) / (N - k)`` (``k`` physics
  parameters shared between observables by their number of points), against its upper
  quantile: the chi-square distribution with an error column, the F distribution
  ``F(N - k, nu)`` with a floor estimated from the data (common practice, no published
  source for this use);
* a runs test on the signs of the residuals along power within each sweep (Wald and
  Wolfowitz, Ann. Math. Stat. 11, 147, 1940): too few runs means the model misses the data
  systematically, whatever their noise.

The check fails when any test falls below ``ALPHA`` divided by the number of tests
(Bonferroni), so a model that describes the data fails it about once in 500 series.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass
from typing import Any

import numpy as np
from scipy import stats

from polkit.jobs.power.channels import Channel
from polkit.jobs.power.problem import PowerProblem

__all__ = ["ALPHA", "NoiseFloor", "noise_floor", "model_check", "observed_jumps", "check_line"]

log = logging.getLogger(__name__)

#: family-wise false-alarm probability of the check on data the model describes
ALPHA = 0.002
#: fewest second differences (or degrees of freedom) the check needs to say anything
MIN_RESIDUALS = 4
_OUTLIER_SD = 5.0
_MAX_DRAWS = 256


@dataclass
class NoiseFloor:
    """Noise of one observable in fit space, independent of the fit.

    Attributes
    ----------
    sigma
        Per-point standard deviation in fit space (NaN where unused).
    source
        ``"error column"`` or ``"neighbouring points"``.
    dof
        Effective degrees of freedom of the estimate (``inf`` for an error column).
    data_estimate
        The data-alone estimate (one standard deviation in fit space), or NaN when too
        few points; given beside an error column so a person can compare the two.
    n_differences
        Number of second differences behind ``data_estimate``.
    """

    sigma: np.ndarray
    source: str
    dof: float
    data_estimate: float
    n_differences: int


def _second_differences(x: np.ndarray, y: np.ndarray, segments, used) -> tuple:
    """Rows of ``A`` (interior point minus the line through its neighbours) and ``A y``."""
    rows, res = [], []
    n = y.size
    for start, stop, _label in segments:
        idx = np.arange(start, stop)[used[start:stop]]
        for j in range(1, idx.size - 1):
            i0, i1, i2 = idx[j - 1], idx[j], idx[j + 1]
            span = x[i2] - x[i0]
            if not span != 0:
                continue
            a = (x[i2] - x[i1]) / span
            b = (x[i1] - x[i0]) / span
            row = np.zeros(n)
            row[[i0, i1, i2]] = (-a, 1.0, -b)
            rows.append(row)
            res.append(y[i1] - a * y[i0] - b * y[i2])
    if not rows:
        return np.zeros((0, n)), np.zeros(0)
    return np.array(rows), np.array(res)


def _data_alone(problem: PowerProblem, ch: Channel) -> tuple[float, float, int]:
    """(sigma, nu, count) of the second-difference estimate, NaNs when too few."""
    x = problem.power.astype(float)
    if ch.log_space:
        x = np.log(np.where(x > 0, x, np.nan))
    used = ch.used & np.isfinite(x)
    a, r = _second_differences(x, ch.values, problem.segments, used)
    if r.size:
        norm = np.sqrt(np.sum(a * a, axis=1))
        z = r / norm
        robust = 1.4826 * float(np.median(np.abs(z)))
        keep = np.abs(z) <= _OUTLIER_SD * robust if robust > 0 else np.ones(z.size, bool)
        a, r = a[keep], r[keep]
    if r.size < MIN_RESIDUALS:
        return math.nan, math.nan, int(r.size)
    c = a @ a.T
    tr = float(np.trace(c))
    var = float(r @ r) / tr
    nu = tr * tr / float(np.sum(c * c))
    return math.sqrt(var), nu, int(r.size)


def noise_floor(problem: PowerProblem) -> dict[str, NoiseFloor]:
    """The noise floor of every fitted observable: the error column, else the data alone."""
    out = {}
    for name, ch in problem.channels.items():
        est, nu, count = _data_alone(problem, ch)
        if ch.has_errors:
            sigma = np.where(ch.used, ch.sigma, np.nan)
            out[name] = NoiseFloor(sigma, "error column", math.inf, est, count)
        else:
            sigma = np.where(ch.used, est, np.nan)
            out[name] = NoiseFloor(sigma, "neighbouring points", nu, est, count)
    return out


def _runs(signs: np.ndarray, segments) -> tuple[int, float, float]:
    """Observed runs, their expectation and variance, summed over the sweeps."""
    runs, mean, var = 0, 0.0, 0.0
    for start, stop, _label in segments:
        s = signs[start:stop]
        s = s[s != 0]
        n = s.size
        if n < 2:
            continue
        n_pos = int(np.sum(s > 0))
        n_neg = n - n_pos
        runs += 1 + int(np.sum(s[1:] != s[:-1]))
        if n_pos == 0 or n_neg == 0:
            mean += 1.0
            continue
        prod = 2.0 * n_pos * n_neg
        mean += prod / n + 1.0
        var += prod * (prod - n) / (n * n * (n - 1.0))
    return runs, mean, var


def _units(problem: PowerProblem, name: str) -> str:
    return {"intensity": problem.intensity_units}.get(name, "meV")


def _display(problem: PowerProblem, ch: Channel, sigma: float) -> dict[str, Any]:
    """A fit-space standard deviation in the observable's own terms, with units."""
    if ch.log_space:
        return {"value": sigma, "units": "1", "meaning": "standard deviation of ln(intensity)"}
    return {"value": sigma, "units": _units(problem, ch.name)}


def observed_jumps(problem: PowerProblem) -> list[dict[str, Any]]:
    """The largest step of the measured intensity in each sweep run, with its powers.

    Returns
    -------
    list of dict
        ``{"sweep", "power_before", "power_after", "units": "mW", "step",
        "step_units"}`` per run with at least two usable points.
    """
    ch = problem.channels["intensity"]
    y = np.exp(ch.values) if ch.log_space else ch.values
    out = []
    for start, stop, label in problem.segments:
        idx = np.arange(start, stop)[ch.used[start:stop]]
        if idx.size < 2:
            continue
        steps = np.diff(y[idx])
        k = int(np.argmax(np.abs(steps)))
        out.append({"sweep": label, "power_before": float(problem.power[idx[k]]),
                    "power_after": float(problem.power[idx[k + 1]]), "units": "mW",
                    "step": float(steps[k]), "step_units": problem.intensity_units})
    return out


def _advice(problem: PowerProblem, passed: bool, ran: bool, floors, failing) -> str:
    if not ran:
        return ("too few points to judge the model without its fitted noise; measure more "
                "powers per sweep or give an error column (intensity_error)")
    if passed:
        return ("the residuals are consistent with the noise floor: the model describes these "
                "data within their noise")
    text = ("the model does not describe these data: the residuals exceed the noise floor "
            "or run in long stretches, so its numbers and intervals are not to be trusted")
    if problem.model == "coherent" and problem.spot != "gaussian":
        text += ("; a loop measured with a Gaussian pump spot and a camera integrating the "
                 "whole spot is smeared and widened: refit with --spot gaussian "
                 "(calibration=PowerCalibration(spot=\"gaussian\") in fit_power)")
    elif problem.model == "coherent":
        text += ("; the Gaussian-spot average does not describe them either: check the spot "
                 "profile, detector saturation, drift between sweeps and the sweep labels")
    else:
        text += ("; check for detector saturation, a second threshold, or a pump spot much "
                 "larger than the condensate")
    for name in failing:
        fl = floors[name]
        if fl.source == "error column" and np.isfinite(fl.data_estimate):
            quoted = float(np.nanmedian(fl.sigma))
            if fl.data_estimate > 2.0 * quoted:
                text += (f"; the {name} errors may understate the noise: neighbouring points "
                         f"scatter by about {fl.data_estimate / quoted:.1f} times the quoted "
                         "errors")
    return text


def model_check(problem: PowerProblem, draws: np.ndarray) -> dict[str, Any]:
    """The model check of a fitted power series (the ``model_check`` entry of summary.json).

    Parameters
    ----------
    problem
        The fitted problem, with its parameter space.
    draws
        Posterior draws ``(D, P)``; at most 256, evenly thinned, are scored.

    Returns
    -------
    dict
        ``passed`` (bool), ``ran`` (bool: false when too few points to judge), ``statistic``
        and ``threshold`` (chi-square per degree of freedom of the worst observable and its
        critical value), ``p_value``, ``runs``, ``noise_floor`` (per observable, with units
        and source), ``channels`` (each observable's tests), ``worst`` (the three points
        farthest from the model, powers in mW, residuals in noise standard deviations),
        ``alpha`` and ``advice``.
    """
    draws = np.atleast_2d(np.asarray(draws, dtype=float))
    if draws.shape[0] > _MAX_DRAWS:
        draws = draws[np.linspace(0, draws.shape[0] - 1, _MAX_DRAWS).astype(int)]
    floors = noise_floor(problem)
    usable = {n: f for n, f in floors.items() if np.any(np.isfinite(f.sigma))}
    model = problem.fit_space_model(draws)
    best = _best_draw(problem, floors, usable, model, draws.shape[0])
    tested = _Tested()
    for name, ch in problem.channels.items():
        tested.add(problem, name, ch, floors[name], model[name][best] if name in usable
                   else None)
    tested.worst.sort(key=lambda w: -abs(w["residual_sd"]))
    worst = tested.worst[:3]
    tests, channels = tested.tests, tested.channels
    ran = bool(tests) and any(t[1] == "chi2" for t in tests)
    level = ALPHA / max(len(tests), 1)
    failing = sorted({n for n, _kind, p in tests if p < level})
    passed = not failing
    name, statistic, threshold, p_value, runs = _worst_chi2(tests, channels, floors, level)
    result = {
        "passed": bool(passed),
        "ran": ran,
        "statistic": statistic,
        "statistic_is": "chi-square per degree of freedom against the noise floor",
        "observable": name,
        "threshold": threshold,
        "p_value": p_value,
        "runs": runs,
        "alpha": ALPHA,
        "level_per_test": level,
        "noise_floor": tested.floors,
        "channels": channels,
        "worst": worst,
        "failing": failing,
        "advice": _advice(problem, passed, ran, floors, failing),
    }
    log.info("model check: %s", "passed" if passed else f"failed ({', '.join(failing)})")
    return result


def _best_draw(problem: PowerProblem, floors, usable, model, n_draws: int) -> int:
    """The draw with the smallest chi-square against the noise floor (0 when none usable)."""
    chi2 = np.zeros(n_draws)
    for name in usable:
        ch, sig = problem.channels[name], floors[name].sigma
        r = (ch.values[ch.used] - model[name][:, ch.used]) / sig[ch.used]
        chi2 = chi2 + np.sum(r * r, axis=1)
    return int(np.argmin(chi2)) if usable else 0


class _Tested:
    """The per-observable results of a model check, gathered one channel at a time."""

    def __init__(self) -> None:
        self.channels: dict[str, Any] = {}
        self.floors: dict[str, Any] = {}
        self.tests: list[tuple[str, str, float]] = []
        self.worst: list[dict[str, Any]] = []

    def add(self, problem: PowerProblem, name: str, ch: Channel, fl: NoiseFloor,
            best_model: np.ndarray | None) -> None:
        """Record the noise floor of one observable and, with ``best_model``, its tests."""
        entry = _display(problem, ch, float(np.nanmedian(fl.sigma)) if best_model is not None
                         else math.nan)
        entry["source"] = fl.source
        if fl.source == "error column":
            entry["value_is"] = "median of the quoted errors"
            if np.isfinite(fl.data_estimate):
                entry["from_neighbouring_points"] = fl.data_estimate
        self.floors[name] = entry
        if best_model is None:
            return
        r = (ch.values - best_model) / fl.sigma
        r = np.where(ch.used, r, np.nan)
        self.channels[name] = self._tests(problem, name, ch, fl, r)
        self._worst(problem, name, r)

    def _tests(self, problem: PowerProblem, name: str, ch: Channel, fl: NoiseFloor,
               r: np.ndarray) -> dict[str, Any]:
        """The chi-square and runs tests of one observable's residuals ``r``."""
        n_noise = sum(1 for p in problem.space.names if p.endswith(("_noise", "_noise_scale",
                                                                    "_log_noise")))
        k_total = len(problem.space.names) - n_noise
        n_total = sum(c.n_used for c in problem.channels.values())
        dof = ch.n_used - k_total * ch.n_used / n_total
        c2 = float(np.nansum(r * r))
        info: dict[str, Any] = {"n_points": ch.n_used, "dof": dof}
        if dof >= 1:
            stat = c2 / dof
            if math.isinf(fl.dof):
                p = float(stats.chi2.sf(c2, dof))
            else:
                p = float(stats.f.sf(stat, dof, fl.dof))
            info.update(chi2_per_dof=stat, p_value=p,
                        noise_dof=None if math.isinf(fl.dof) else fl.dof)
            self.tests.append((name, "chi2", p))
        n_runs, mean, var = _runs(np.sign(np.nan_to_num(r)), problem.segments)
        if var > 0:
            z = (n_runs - mean) / math.sqrt(var)
            p_runs = float(stats.norm.cdf(z))
            info["runs"] = {"observed": n_runs, "expected": mean, "z": z, "p_value": p_runs}
            self.tests.append((name, "runs", p_runs))
        return info

    def _worst(self, problem: PowerProblem, name: str, r: np.ndarray) -> None:
        """The three points of one observable farthest from the model."""
        order = np.argsort(-np.nan_to_num(np.abs(r), nan=-1.0))[:3]
        labels = {i: lab for s, e, lab in problem.segments for i in range(s, e)}
        for i in order:
            if np.isfinite(r[i]):
                self.worst.append({"observable": name, "power": float(problem.power[i]),
                                   "units": "mW", "sweep": labels[int(i)],
                                   "residual_sd": float(r[i])})


def _worst_chi2(tests, channels, floors, level: float) -> tuple:
    """``(observable, statistic, threshold, p_value, runs)`` of the lowest chi-square p-value."""
    chi_tests = [(n, channels[n]) for n, kind, _p in tests if kind == "chi2"]
    if not chi_tests:
        return None, None, None, None, None
    name, info = min(chi_tests, key=lambda t: t[1]["p_value"])
    fl = floors[name]
    if math.isinf(fl.dof):
        crit = float(stats.chi2.isf(level, info["dof"]) / info["dof"])
    else:
        crit = float(stats.f.isf(level, info["dof"], fl.dof))
    return name, info["chi2_per_dof"], crit, info["p_value"], channels[name].get("runs")


def check_line(check: dict[str, Any]) -> str:
    """One line on a model check: the verdict, the numbers behind it and the advice."""
    parts = []
    if check.get("statistic") is not None:
        parts.append(f"chi-square per degree of freedom {check['statistic']:.3g} of "
                     f"{check['observable']} (at most {check['threshold']:.3g} expected)")
    runs = check.get("runs")
    if runs:
        parts.append(f"{runs['observed']} runs of residual signs ({runs['expected']:.1f} "
                     "expected)")
    if check.get("worst"):
        w = check["worst"][0]
        parts.append(f"worst at {w['power']:.4g} {w['units']} ({w['sweep']} sweep, "
                     f"{w['residual_sd']:+.1f} sd)")
    verdict = ("model check passed" if check["passed"] else "model check failed") if \
        check.get("ran", True) else "model check not run"
    return f"{verdict}: " + "; ".join(parts) + ("; " if parts else "") + check["advice"]

"""Does the dispersion model describe the map?  A check that does not trust the fitted noise.

The whole-map likelihood calibrates its noise model on the residuals of the mode, so the
fitted residuals always look like "1 sigma".  This check estimates the noise floor from
the data alone and compares the residuals of the fit with it:

* noise floor (:func:`noise_floor`): the detector model ``J s / gain + (J read_noise)^2``
  when the camera's gain and read noise are known
  (:func:`~polkit.jobs.dispersion.noise.detector_terms`); otherwise from the second
  differences of neighbouring pixels along energy, ``d = y[i-1] - 2 y[i] + y[i+1]`` with
  ``var d = 6 var y`` for a signal smooth on the pixel scale, robust scale (1.4826 MAD) in
  bins of the signal level, then ``var = a level + b`` fitted to the bins; pixels where the
  fitted map curves strongly (steep lines, where curvature dominates ``d``) are left out of
  the bins.  # common practice (difference-based noise estimation), no published source
* statistics (:func:`check_model`): chi-square per degree of freedom of the residuals
  against the floor over the whole map and per angle, the lag-1 autocorrelation of the
  normalised residuals along energy (misfit is banded along the branches, noise is not),
  and masked outliers that line up over several angles (an unmodelled line, not spikes).

Thresholds were set from simulations of clean maps (an independent generator, several
samples, cameras and seeds) so that a clean map fails at most about 5 % of the time;
the measured rate is in the README.  # common practice, no published source
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import Any

import numpy as np
from scipy import ndimage

from polkit.jobs.dispersion.noise import DetectorTerms

__all__ = ["noise_floor", "check_model", "THRESHOLDS"]

#: check thresholds (from clean simulations, see the module notes)
THRESHOLDS = {
    # whole-map chi-square per degree of freedom against the independent floor
    "chi2_per_dof": 1.25,
    # the worst angle: its chi-square per dof beyond this many sampling sd (Bonferroni-like)
    "angle_sd": 5.0,
    # ... and at least this fraction above the floor (the floor's own uncertainty)
    "angle_excess": 0.5,
    # lag-1 autocorrelation of normalised residuals along energy
    "lag1": 0.15,
    # masked outliers connected over at least this many angles
    "outlier_angles": 3,
}

_ADVICE = {
    "chi2": "the residuals are larger than the noise floor: another oscillator "
            "(--model three)? an unmodelled line (crop it with --exclude or an energy "
            "window)? a background the model lacks?",
    "angle": "some angles are not described: an unmodelled line there (crop it with "
             "--exclude or an angle window)? another oscillator?",
    "lag1": "the residuals are banded along energy: a line shape or background the model "
            "lacks, or another oscillator?",
    "outliers": "gross pixels line up over several angles: an unmodelled line, not spikes "
                "(crop it with --exclude or an energy window)",
}


def _difference_floor(y: np.ndarray, model: np.ndarray, ok: np.ndarray) -> tuple[float, float]:
    """``a, b`` of ``var = a level + b`` from binned second differences along energy."""
    d = y[:, :-2] - 2.0 * y[:, 1:-1] + y[:, 2:]
    level = (y[:, :-2] + y[:, 1:-1] + y[:, 2:]) / 3.0
    curv = np.abs(model[:, :-2] - 2.0 * model[:, 1:-1] + model[:, 2:])
    good = ok[:, :-2] & ok[:, 1:-1] & ok[:, 2:] & np.isfinite(d)
    if np.count_nonzero(good) < 30:
        d_all = d[good] if np.any(good) else np.array([0.0, 1.0])
        s = 1.4826 * np.median(np.abs(d_all - np.median(d_all))) / np.sqrt(6.0)
        return 0.0, float(max(s * s, 1e-300))
    # a first, global scale; then keep the pixels where the map is flat on that scale
    s0 = 1.4826 * np.median(np.abs(d[good])) / np.sqrt(6.0)
    flat = good & (curv < 0.5 * np.sqrt(6.0) * s0)
    use = flat if np.count_nonzero(flat) >= 200 else good
    lv, dv = level[use], d[use]
    edges = np.unique(np.quantile(lv, np.linspace(0.0, 1.0, 11)))
    which = np.clip(np.searchsorted(edges, lv, side="right") - 1, 0, max(edges.size - 2, 0))
    xs, vs, ns = [], [], []
    for k in range(max(edges.size - 1, 1)):
        sel = which == k
        n = int(np.count_nonzero(sel))
        if n < 30:
            continue
        dd = dv[sel]
        xs.append(float(np.median(lv[sel])))
        vs.append(float((1.4826 * np.median(np.abs(dd - np.median(dd)))) ** 2 / 6.0))
        ns.append(n)
    xs, vs, ns = np.array(xs), np.array(vs), np.array(ns, dtype=float)
    if xs.size < 2 or np.ptp(xs) <= 0:
        return 0.0, float(max(np.mean(vs) if vs.size else s0 * s0, 1e-300))
    # weighted least squares, relative errors sqrt(2 / n) of each bin's variance
    w = np.sqrt(ns) / np.maximum(vs, 1e-300)
    a, b = np.polyfit(xs, vs, 1, w=w)
    if a < 0.0:
        a, b = 0.0, float(np.average(vs, weights=ns))
    if b <= 0.0:
        b = float(max(np.min(vs), 1e-300))
    return float(a), float(b)


def noise_floor(y: np.ndarray, model: np.ndarray, ok: np.ndarray,
                detector: DetectorTerms | None = None) -> tuple[np.ndarray, str]:
    """Variance per pixel from the data alone (or the camera), and how it was obtained.

    ``model`` is the fitted map: the level at which the detector model is evaluated, and
    the curvature that keeps steep lines out of the neighbour-difference bins.
    """
    if detector is not None:
        return detector.variance(model) * np.ones_like(model), "detector model"
    a, b = _difference_floor(y, model, ok)
    return a * np.clip(model, 0.0, None) + b, "neighbour differences"


def _lag1(z: np.ndarray, ok: np.ndarray) -> float:
    pair = ok[:, :-1] & ok[:, 1:]
    num = np.sum(np.where(pair, z[:, :-1] * z[:, 1:], 0.0))
    den = np.sum(np.where(ok, z * z, 0.0))
    return float(num / den) if den > 0 else 0.0


def _lined_up_outliers(mask: np.ndarray) -> int:
    """The most angles one connected group of masked pixels spans (3 x 3 connectivity)."""
    if not mask.any():
        return 0
    labels, n = ndimage.label(mask, structure=np.ones((3, 3)))
    spans = ndimage.find_objects(labels)
    return max(s[0].stop - s[0].start for s in spans if s is not None)


def _worst_places(z: np.ndarray, ok: np.ndarray, active: np.ndarray, chi_row: np.ndarray,
                  in_plane: np.ndarray, energy: np.ndarray, axis: str) -> tuple[list, list]:
    """The three angles (or k) and the three energies with the largest chi-square per pixel."""
    units = "degree" if axis == "angle" else "1/um"
    order = np.argsort(-np.where(active, chi_row, -np.inf))[:3]
    worst_angles = [{axis: float(in_plane[i]), "units": units,
                     "chi2_per_pixel": float(chi_row[i])} for i in order if active[i]]
    n_col = ok.sum(axis=0)
    chi_col = np.where(n_col > 0, np.sum(z * z, axis=0) / np.maximum(n_col, 1), 0.0)
    order_e = np.argsort(-chi_col)[:3]
    worst_energies = [{"energy": float(energy[j]), "units": "eV",
                       "chi2_per_pixel": float(chi_col[j])} for j in order_e if n_col[j] > 0]
    return worst_angles, worst_energies


def check_model(
    y: np.ndarray,
    model: np.ndarray,
    weighted: np.ndarray,
    *,
    in_plane: np.ndarray,
    energy: np.ndarray,
    axis: str = "angle",
    n_columns: int,
    n_parameters: int,
    outlier_mask: np.ndarray | None = None,
    detector: DetectorTerms | None = None,
    thresholds: Mapping[str, float] | None = None,
) -> dict[str, Any]:
    """The model check of a fitted map (the ``model_check`` entry of summary.json).

    Parameters
    ----------
    y, model
        The map and the fitted map (posterior median or MAP), shape ``(A, E)``.
    weighted
        Pixels in the likelihood (bool, ``(A, E)``): finite, not masked.
    in_plane, energy
        Axes (degree or 1/um; eV).
    axis
        ``"angle"`` or ``"k"``.
    n_columns
        Linear coefficients solved per angle (amplitudes and background).
    n_parameters
        Nonlinear parameters of the model.
    outlier_mask
        Pixels the noise model left out as outliers (their pattern is checked).
    detector
        The camera's noise terms, when known.

    Returns
    -------
    dict
        ``passed``, ``statistic`` (whole-map chi-square per dof), ``threshold``,
        ``noise_floor``, ``tests`` (each statistic with its threshold), ``worst_angles``,
        ``worst_energies``, ``advice``.
    """
    th = {**THRESHOLDS, **(thresholds or {})}
    ok = weighted & np.isfinite(y) & np.isfinite(model)
    var, how = noise_floor(y, model, ok, detector)
    z = np.where(ok, (y - model) / np.sqrt(np.maximum(var, 1e-300)), 0.0)
    n_a = y.shape[0]
    n_pix = int(np.count_nonzero(ok))
    active = ok.any(axis=1)
    dof = max(n_pix - int(active.sum()) * n_columns - n_parameters, 1)
    chi2 = float(np.sum(z * z))
    per_dof = chi2 / dof
    # per angle
    n_row = ok.sum(axis=1)
    dof_row = np.maximum(n_row - n_columns - n_parameters / max(n_a, 1), 1.0)
    chi_row = np.sum(z * z, axis=1) / dof_row
    sd_row = np.sqrt(2.0 / dof_row)
    excess = (chi_row - 1.0) / sd_row
    angle_bad = active & (excess > th["angle_sd"]) & (chi_row > 1.0 + th["angle_excess"])
    lag1 = _lag1(z, ok)
    span = _lined_up_outliers(outlier_mask) if outlier_mask is not None else 0
    tests = [
        {"name": "chi2_per_dof", "value": per_dof, "threshold": th["chi2_per_dof"],
         "passed": per_dof <= th["chi2_per_dof"]},
        {"name": "worst_angle_chi2_per_pixel", "value": float(np.max(chi_row[active]))
         if active.any() else 0.0,
         "threshold": f"{th['angle_sd']:g} sampling sd and {1 + th['angle_excess']:g}",
         "passed": not bool(angle_bad.any())},
        {"name": "lag1_autocorrelation", "value": lag1, "threshold": th["lag1"],
         "passed": lag1 <= th["lag1"]},
        {"name": "outliers_lined_up_over_angles", "value": span,
         "threshold": th["outlier_angles"], "passed": span < th["outlier_angles"]},
    ]
    passed = all(t["passed"] for t in tests)
    worst_angles, worst_energies = _worst_places(z, ok, active, chi_row, in_plane, energy, axis)
    keys = ["chi2", "angle", "lag1", "outliers"]
    advice = " ".join(_ADVICE[k] for k, t in zip(keys, tests, strict=True) if not t["passed"])
    return {
        "passed": bool(passed),
        "statistic": per_dof,
        "threshold": th["chi2_per_dof"],
        "statistic_name": "chi-square per degree of freedom against the noise floor",
        "noise_floor": how,
        "tests": tests,
        "worst_angles": worst_angles,
        "worst_energies": worst_energies,
        "advice": advice or "the residuals are consistent with the noise floor",
    }


def problem_model_check(problem, theta: np.ndarray, data: Any = None) -> dict[str, Any]:
    """:func:`check_model` of a :class:`~polkit.jobs.dispersion.problem.DispersionProblem`
    at one parameter vector ``theta`` (posterior median or mode).

    ``data`` is the map (DataArray) or its attributes, for the detector terms; pixels the
    noise model left out (``problem.noise_calibration["mask"]``) are left out here too and
    their pattern is checked.
    """
    from polkit.jobs.dispersion.noise import detector_terms

    theta = np.asarray(theta, dtype=float)
    sol = problem.model_map(theta)
    model = np.asarray(sol.model).reshape(problem.y.shape)
    cal = getattr(problem, "noise_calibration", None) or {}
    mask = cal.get("mask")
    detector = detector_terms(data, problem.kind) if data is not None else None
    n_free = len([n for n in problem.space.names if n != "noise_scale"])
    return check_model(
        problem.y, model, problem.inv_var > 0, in_plane=problem.in_plane,
        energy=problem.energy, axis=problem.axis,
        n_columns=problem.n_linear_columns + problem.n_background_columns,
        n_parameters=n_free, outlier_mask=mask, detector=detector)

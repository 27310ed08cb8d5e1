"""The noise model of the whole-map dispersion likelihood: a variance function of the model.

:func:`calibrate_noise` sets ``var = a * max(model, 0) + b`` per pixel, from the detector
(gain and read noise) where the map carries them, else from the squared residuals of the
mode with the leverage of the per-angle linear columns taken out.  The fit to the residuals
is protected against gross pixels (cosmic-ray spikes, clipped pixels): pixels whose
standardised residual exceeds :func:`outlier_cut` are left out and the fit repeated.
:func:`outlier_mask` then marks those pixels for the likelihood (inverse variance 0).
Before any mode is known, :func:`noise_inverse_variance` gives the first noise model from
the map alone.

Detector model (:func:`detector_terms`): a map converted from wavelengths may carry a 1-D
coordinate ``jacobian`` along ``energy`` (signal = jacobian * raw counts) with ``gain``
(electrons per raw count), ``read_noise`` and ``saturation`` in raw counts
(``attrs["raw_units"] = "counts"``); then ``var = J s / gain + (J read_noise)^2`` per pixel.
A map in plain ``counts`` (no Jacobian) uses ``J = 1``.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import numpy as np
import xarray as xr
from scipy import stats

__all__ = ["calibrate_noise", "detector_terms", "outlier_cut", "outlier_mask", "premask_spikes",
           "DetectorTerms", "noise_inverse_variance"]

#: a clean map exceeds the outlier cut at one pixel in this many maps (Gaussian noise)
MAPS_PER_FALSE_OUTLIER = 100


@dataclass(frozen=True)
class DetectorTerms:
    """The camera's noise terms in the units of the map's signal.

    ``jacobian`` is 1 (plain counts) or the per-energy-pixel factor (shape ``(E,)``);
    ``gain`` in electrons per raw count, ``read_noise`` and ``saturation`` in raw counts.
    """

    jacobian: np.ndarray
    gain: float
    read_noise: float
    saturation: float | None

    def variance(self, level: np.ndarray) -> np.ndarray:
        """``J max(level, 0) / gain + (J read_noise)^2``: shot noise of the signal level plus
        read noise, both carried through ``s = J c``.
        # Source: Janesick, Photon Transfer (SPIE Press, 2007), ch. 2-4 (shot + read noise)
        """
        j = self.jacobian
        return j * np.clip(level, 0.0, None) / self.gain + (j * self.read_noise) ** 2

    def saturated(self, y: np.ndarray) -> np.ndarray:
        """Pixels at or above the saturation level (raw counts ``y / J``)."""
        if self.saturation is None:
            return np.zeros(np.shape(y), dtype=bool)
        with np.errstate(invalid="ignore"):
            return np.isfinite(y) & (y / self.jacobian >= self.saturation * (1.0 - 1e-9))


def detector_terms(data: Any, kind: str = "emission") -> DetectorTerms | None:
    """The detector terms of a map (a DataArray, or its attribute mapping), or None.

    Used for emission maps whose signal is raw counts (``units == "counts"``, ``J = 1``)
    or Jacobian-scaled raw counts (a ``jacobian`` coordinate along ``energy`` and
    ``attrs["raw_units"] == "counts"``), when both ``gain`` and ``read_noise`` are given.
    """
    if kind != "emission":
        return None
    attrs: Mapping[str, Any] = getattr(data, "attrs", data) or {}
    gain, rn = attrs.get("gain"), attrs.get("read_noise")
    if gain is None or rn is None:
        return None
    sat = attrs.get("saturation")
    coords = getattr(data, "coords", None)
    if coords is not None and "jacobian" in coords:
        if str(attrs.get("raw_units", "")).strip() != "counts":
            return None
        jac = np.asarray(coords["jacobian"].values, dtype=float)
        if coords["jacobian"].dims != ("energy",):
            return None
        return DetectorTerms(jac, float(gain), float(rn), None if sat is None else float(sat))
    if str(attrs.get("units", "")).strip() == "counts":
        return DetectorTerms(np.ones(1), float(gain), float(rn),
                             None if sat is None else float(sat))
    return None


def outlier_cut(n_pixels: int, maps: int = MAPS_PER_FALSE_OUTLIER) -> float:
    """The standardised residual a Gaussian pixel exceeds (either sign) once in ``maps`` maps
    of ``n_pixels`` pixels: ``Phi^-1(1 - 1 / (2 maps n_pixels))``.
    # common practice (a Bonferroni-type cut for outliers), no published source
    """
    n = max(int(n_pixels), 1)
    return float(stats.norm.isf(0.5 / (maps * n)))


def outlier_mask(y: np.ndarray, model: np.ndarray, inv_var: np.ndarray, scale: float = 1.0,
                 cut: float | None = None) -> np.ndarray:
    """Pixels whose standardised residual ``|y - model| sqrt(inv_var) / scale`` exceeds ``cut``
    (default :func:`outlier_cut` of the number of weighted pixels)."""
    ok = np.isfinite(y) & (inv_var > 0)
    if cut is None:
        cut = outlier_cut(int(np.count_nonzero(ok)))
    z = np.zeros(np.shape(y))
    z[ok] = np.abs(y - model)[ok] * np.sqrt(inv_var[ok]) / scale
    return ok & (z > cut)


def _leverage(design: np.ndarray, inv_var: np.ndarray) -> np.ndarray:
    """Diagonal of the weighted hat matrix per angle, ``h = w x^T (X^T W X)^-1 x``.

    Computed stably from a thin QR factorisation of ``sqrt(W) X`` (``h`` is the row sum of
    ``Q^2``); nearly collinear columns (a reflectance column close to the constant
    background) then give leverages in [0, 1] instead of round-off.  ``design`` has shape
    ``(A, E, K)``.
    """
    q, r = np.linalg.qr(design * np.sqrt(inv_var)[..., None])
    diag = np.abs(np.diagonal(r, axis1=-2, axis2=-1))
    keep = diag > 1e-10 * np.max(diag, axis=-1, keepdims=True)  # drop dependent columns
    return np.einsum("aek,ak->ae", q * q, keep.astype(float))


def _variance_fit(m: np.ndarray, r2: np.ndarray, gain: float | None) -> tuple[float, float]:
    """``a, b`` of ``E[r^2] = a m + b`` by IRLS (weights ``1 / (a m + b)^2``)."""
    if gain is not None:
        a = 1.0 / float(gain)
        return a, max(float(np.mean(r2 - a * m)), 1e-12 * float(np.mean(r2)) + 1e-300)
    design = np.stack([m, np.ones_like(m)], axis=1)
    a, b = 0.0, float(np.mean(r2)) or 1.0
    for _ in range(6):
        w = 1.0 / (a * m + b) ** 2
        coef, *_ = np.linalg.lstsq(design * np.sqrt(w)[:, None], r2 * np.sqrt(w), rcond=None)
        a, b = float(coef[0]), float(coef[1])
        if a < 0.0:  # no shot-noise term: the variance is a constant, its mean
            a, b = 0.0, float(np.mean(r2))
        if b <= 0:
            b = max(float(np.mean(r2 - a * m)), 1e-3 * float(np.mean(r2)))
    return a, b


def calibrate_noise(
    y: np.ndarray,
    model: np.ndarray,
    *,
    gain: float | None = None,
    read_noise: float | None = None,
    design: np.ndarray | None = None,
    robust: bool = True,
    detector: DetectorTerms | None = None,
) -> tuple[np.ndarray, float, float]:
    """Variance function ``var = a * max(model, 0) + b`` for the whole-map likelihood.

    The variance is a function of the *model* (not of the noisy data), so the weights do
    not correlate with the noise.  With a known CCD gain (electrons per count) and read
    noise the detector model is used as it stands: ``a = 1/gain``, ``b = read_noise^2``;
    with ``detector`` (:func:`detector_terms`) it is ``J m / gain + (J read_noise)^2``
    per pixel (then ``a`` and ``b`` are reported at ``J`` = its median).
    Otherwise ``a`` and ``b`` are estimated from the squared residuals ``r^2`` of the MAP,
    whose expectation is ``a m + b``: iteratively reweighted least squares with weights
    ``1/(a m + b)^2`` (the variance of ``r^2`` for Gaussian noise is ``2 var^2``), which is
    unbiased, unlike a robust loss on the skewed ``r^2``.  With ``design`` (the per-angle
    linear columns, shape ``(A, E, K)``) the squared residuals are first divided by
    ``1 - h`` (``h`` the leverage): a fitted amplitude absorbs part of the noise where its
    column is large, so ``E[r^2] = var (1 - h)``.  # common practice (variance-function
    estimation by IRLS with leverage correction, e.g. Carroll and Ruppert, Transformation
    and Weighting in Regression, 1988)

    With ``robust`` (default) gross pixels cannot take the fit over: pixels whose
    standardised residual exceeds :func:`outlier_cut` are left out and the variance
    function fitted again, until the set of pixels left out no longer changes (at most
    eight rounds).  A Gaussian pixel passes that cut in all but one map in a hundred, so a
    clean map keeps (almost) every pixel; the truncation bias of the variance at that cut
    is below 1e-4 and is not corrected.  # common practice, no published source
    Returns ``(inverse_variance, a, b)``; pixels are not masked here (:func:`outlier_mask`).
    """
    ok = np.isfinite(y) & np.isfinite(model)
    m_all = np.clip(model, 0.0, None)
    if detector is not None:
        var = detector.variance(m_all) * np.ones_like(m_all)
        j_med = float(np.median(detector.jacobian))
        a, b = j_med / detector.gain, (j_med * detector.read_noise) ** 2
    elif gain is not None and read_noise is not None:
        a, b = 1.0 / float(gain), float(read_noise) ** 2
        var = a * m_all + b
    else:
        r2_all = (y - model) ** 2
        if design is not None:
            lev = _leverage(design, np.where(ok, 1.0 / (m_all + np.median(r2_all[ok])), 0.0))
            r2_all = r2_all / np.clip(1.0 - lev, 0.05, 1.0)  # h <= 0.95
        keep = ok.copy()
        a, b = _variance_fit(m_all[keep], r2_all[keep], gain)
        if robust:
            cut2 = outlier_cut(int(np.count_nonzero(ok))) ** 2
            for _ in range(8):
                new = ok & (r2_all <= cut2 * (a * m_all + b))
                if np.array_equal(new, keep):
                    break
                keep = new
                a, b = _variance_fit(m_all[keep], r2_all[keep], gain)
        var = a * m_all + b
    inv = np.where(np.isfinite(y), 1.0 / var, 0.0)
    return inv, float(a), float(b)


def premask_spikes(problem, data) -> int:
    """Leave the cosmic-ray spikes of a map out of ``problem``'s likelihood before any mode.

    A whole-map mode searched with spikes in the map chases them (a line narrowed to a
    pixel); the spikes are found from the data alone by
    :func:`polkit.data.remove_cosmic_rays` (directional neighbour medians, so pixels on
    lines are protected) and given inverse variance 0.  The noise model calibrated at the
    mode (:func:`~polkit.jobs.dispersion.stages.calibrate_problem_noise`) recomputes
    its own mask from scratch, so a pixel wrongly flagged here is restored there.
    Returns the number of pixels masked.
    """
    from polkit.data.preprocess import remove_cosmic_rays
    from polkit.errors import ConfigError, DataError

    y = np.asarray(problem.y, dtype=float)
    try:
        cleaned = np.asarray(remove_cosmic_rays(data).transpose(*data.dims).values, dtype=float)
    except (DataError, ConfigError) as err:  # a map the spike test refuses keeps every pixel
        import logging

        logging.getLogger(__name__).info("spike pre-mask skipped: %s", err)
        return 0
    if cleaned.shape != y.shape:
        return 0
    flagged = np.isfinite(y) & (cleaned != y)
    n = int(flagged.sum())
    if n:
        problem.set_noise(np.where(flagged, 0.0, problem.inv_var),
                          f"{problem.noise_note}; {n} spike pixel(s) left out")
    return n


# --------------------------------------------------------------------------------------
# the first noise model, from the map alone
# --------------------------------------------------------------------------------------
def _robust_sigma(values: np.ndarray) -> float:
    """Noise standard deviation from the second differences along energy.

    For a signal smooth on the pixel scale, d2 = y[i-1] - 2 y[i] + y[i+1] is noise with
    variance 6 sigma^2; the MAD estimator (1.4826 MAD) makes it robust to lines and spikes.
    # common practice, no published source
    """
    d2 = values[:, :-2] - 2.0 * values[:, 1:-1] + values[:, 2:]
    d2 = d2[np.isfinite(d2)]
    if d2.size == 0:
        return float("nan")
    mad = np.median(np.abs(d2 - np.median(d2)))
    return float(1.4826 * mad / np.sqrt(6.0))


def noise_inverse_variance(da: xr.DataArray) -> tuple[np.ndarray, str]:
    """Inverse variance per pixel and a sentence saying how it was obtained.

    Counts with a known gain (electrons per count, ``attrs['gain']``) use the CCD model
    variance = counts / gain + read_noise^2 (read noise from ``attrs['read_noise']`` or
    estimated from the map).  Anything else (reflectance, arbitrary units) uses one
    robust noise level for the whole map.  In both cases the fit samples a
    ``noise_scale`` factor, so a mis-stated gain widens the intervals instead of
    narrowing them.
    """
    y = np.asarray(da.values, dtype=float)
    sigma_hat = _robust_sigma(y)
    if not np.isfinite(sigma_hat) or sigma_hat <= 0:
        finite = y[np.isfinite(y)]
        sigma_hat = float(np.std(finite)) * 1e-3 if finite.size else 1.0
        sigma_hat = sigma_hat if sigma_hat > 0 else 1.0
    gain = da.attrs.get("gain")
    counts = str(da.attrs.get("units", "")).strip() == "counts"  # not after a Jacobian
    if da.attrs.get("kind", "emission") == "emission" and gain is not None and counts:
        gain = float(gain)
        rn = da.attrs.get("read_noise")
        # the second-difference estimate is dominated by the dark, low-count pixels
        rn = float(rn) if rn is not None else sigma_hat
        var = np.clip(y, 0.0, None) / gain + rn * rn
        how = f"CCD noise model: counts/gain + read_noise^2 (gain {gain:g}, read noise {rn:.3g})"
    else:
        var = np.full_like(y, sigma_hat * sigma_hat)
        how = f"uniform noise estimated from second differences (sigma {sigma_hat:.3g})"
    inv = np.where(np.isfinite(y), 1.0 / var, 0.0)
    return inv, how

"""The noise model of the whole-map dispersion likelihood: a variance function of the model.

:func:`calibrate_noise` sets ``var = a * max(model, 0) + b`` per pixel, from the detector
(gain and read noise) where the map carries them, else from the squared residuals of the
mode with the leverage of the per-angle linear columns taken out.
"""

from __future__ import annotations

import numpy as np

__all__ = ["calibrate_noise"]


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


def calibrate_noise(
    y: np.ndarray,
    model: np.ndarray,
    *,
    gain: float | None = None,
    read_noise: float | None = None,
    design: np.ndarray | None = None,
) -> tuple[np.ndarray, float, float]:
    """Variance function ``var = a * max(model, 0) + b`` for the whole-map likelihood.

    The variance is a function of the *model* (not of the noisy data), so the weights do
    not correlate with the noise.  With a known CCD gain (electrons per count) and read
    noise the detector model is used as it stands: ``a = 1/gain``, ``b = read_noise^2``.
    Otherwise ``a`` and ``b`` are estimated from the squared residuals ``r^2`` of the MAP,
    whose expectation is ``a m + b``: iteratively reweighted least squares with weights
    ``1/(a m + b)^2`` (the variance of ``r^2`` for Gaussian noise is ``2 var^2``), which is
    unbiased, unlike a robust loss on the skewed ``r^2``.  With ``design`` (the per-angle
    linear columns, shape ``(A, E, K)``) the squared residuals are first divided by
    ``1 - h`` (``h`` the leverage): a fitted amplitude absorbs part of the noise where its
    column is large, so ``E[r^2] = var (1 - h)``.  # common practice (variance-function
    estimation by IRLS with leverage correction, e.g. Carroll and Ruppert, Transformation
    and Weighting in Regression, 1988)
    Returns ``(inverse_variance, a, b)``.
    """
    ok = np.isfinite(y) & np.isfinite(model)
    m_all = np.clip(model, 0.0, None)
    if gain is not None and read_noise is not None:
        a, b = 1.0 / float(gain), float(read_noise) ** 2
    else:
        m = m_all[ok]
        r2_all = (y - model) ** 2
        if design is not None:
            lev = _leverage(design, np.where(ok, 1.0 / (m_all + np.median(r2_all[ok])), 0.0))
            r2_all = r2_all / np.clip(1.0 - lev, 0.05, 1.0)  # h <= 0.95
        r2 = r2_all[ok]
        design = np.stack([m, np.ones_like(m)], axis=1)
        if gain is not None:
            a = 1.0 / float(gain)
            b = max(float(np.mean(r2 - a * m)), 1e-12 * float(np.mean(r2)) + 1e-300)
        else:
            a, b = 0.0, float(np.mean(r2)) or 1.0
            for _ in range(6):
                w = 1.0 / (a * m + b) ** 2
                coef, *_ = np.linalg.lstsq(
                    design * np.sqrt(w)[:, None], r2 * np.sqrt(w), rcond=None
                )
                a, b = float(coef[0]), float(coef[1])
                if a < 0.0:  # no shot-noise term: the variance is a constant, its mean
                    a, b = 0.0, float(np.mean(r2))
                if b <= 0:
                    b = max(float(np.mean(r2 - a * m)), 1e-3 * float(np.mean(r2)))
    var = a * m_all + b
    inv = np.where(np.isfinite(y), 1.0 / var, 0.0)
    return inv, float(a), float(b)

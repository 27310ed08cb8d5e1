"""Fourier-plane (back-focal-plane) calibration: camera pixels to emission angle and k.

An objective obeying the Abbe sine condition maps emission angle linearly in
sin(theta), not in theta, onto the Fourier plane:

    sin(theta) = NA * (p - p0) / r_NA

with p0 the pixel of k = 0 (normal emission) and r_NA the radius (pixels) of the pupil
edge, where theta reaches the numerical aperture NA.  The in-plane wavevector of light
of photon energy E leaving at theta is

    k = (E / (hbar c)) sin(theta),   i.e.  k [1/um] = 5.0677 * E [eV] * sin(theta),

with hbar c from :data:`polkit.constants.HBARC_EV_UM`.  Pixels beyond the pupil
(|p - p0| > r_NA) carry no light from the sample and are dropped with a
:class:`~polkit.errors.DataWarning`.

When p0 or r_NA is not given, the pupil edges are found from the image: the
energy-integrated profile along the pixel axis is smoothed, the outermost pixels above
10 % of its dynamic range give the pupil region, and each edge is refined to the
steepest slope within a few pixels (parabolic sub-pixel interpolation).  For a
symmetric blur the steepest slope of a blurred step sits at the step itself.
"""

from __future__ import annotations

import logging
import math
import warnings
from dataclasses import dataclass

import numpy as np
import xarray as xr
from scipy.ndimage import gaussian_filter1d

from polkit.constants import HBARC_EV_UM
from polkit.data.schema import COORD_ATTRS, append_history
from polkit.errors import ConfigError, DataError, DataWarning

__all__ = [
    "FOURIER_KEYS",
    "PupilEdges",
    "sin_theta_from_pixel",
    "pixel_to_angle",
    "find_pupil_edges",
    "wavevector",
    "calibrate_pixel_axis",
    "to_k",
]

logger = logging.getLogger(__name__)

FOURIER_KEYS = ("na", "k0_pixel", "pupil_radius_px")


@dataclass(frozen=True)
class PupilEdges:
    """Pupil edges found on a Fourier-plane image (all in pixels)."""

    left: float
    right: float

    @property
    def k0_pixel(self) -> float:
        """Centre of the pupil: the pixel of normal emission."""
        return 0.5 * (self.left + self.right)

    @property
    def radius(self) -> float:
        """Pupil-edge radius r_NA."""
        return 0.5 * (self.right - self.left)


def _check_params(na, k0_pixel, pupil_radius_px, *, path=None) -> tuple[float, float, float]:
    values = {}
    for key, value in (("na", na), ("k0_pixel", k0_pixel), ("pupil_radius_px", pupil_radius_px)):
        try:
            values[key] = float(value)
        except (TypeError, ValueError):
            raise ConfigError(
                f"expected a number; found {value!r}. Fix: give {key} as a number",
                path=path,
                key=key,
            ) from None
        if not math.isfinite(values[key]):
            raise ConfigError(f"expected a finite number; found {value!r}", path=path, key=key)
    if not 0.0 < values["na"] <= 1.0:
        raise ConfigError(
            f"expected a numerical aperture in (0, 1] (emission into air); found {values['na']:g}. "
            "Fix: give the objective's NA",
            path=path,
            key="na",
        )
    if values["pupil_radius_px"] <= 0:
        raise ConfigError(
            f"expected a positive pupil radius in pixels; found {values['pupil_radius_px']:g}",
            path=path,
            key="pupil_radius_px",
        )
    return values["na"], values["k0_pixel"], values["pupil_radius_px"]


def sin_theta_from_pixel(
    pixel, *, na: float, k0_pixel: float, pupil_radius_px: float
) -> np.ndarray:
    """sin(theta) = NA (p - p0) / r_NA (Abbe sine condition).

    Parameters
    ----------
    pixel
        Pixel positions p along the Fourier-plane axis.
    na
        Numerical aperture of the objective.
    k0_pixel
        Pixel p0 of normal emission (k = 0).
    pupil_radius_px
        Radius r_NA of the pupil edge in pixels.

    Returns
    -------
    numpy.ndarray
        sin(theta); |values| > NA lie outside the pupil.
    """
    na, p0, r = _check_params(na, k0_pixel, pupil_radius_px)
    return na * (np.asarray(pixel, dtype=float) - p0) / r


def pixel_to_angle(pixel, *, na: float, k0_pixel: float, pupil_radius_px: float) -> np.ndarray:
    """Emission angle in degree of each pixel; NaN outside the pupil."""
    s = sin_theta_from_pixel(pixel, na=na, k0_pixel=k0_pixel, pupil_radius_px=pupil_radius_px)
    inside = np.abs(s) <= na * (1 + 1e-12)
    out = np.full(s.shape, np.nan)
    out[inside] = np.degrees(np.arcsin(np.clip(s[inside], -1.0, 1.0)))
    return out


def wavevector(angle_deg, energy_ev) -> np.ndarray:
    """In-plane wavevector k = (E / hbar c) sin(theta) in 1/um (broadcasting)."""
    return (
        np.asarray(energy_ev, dtype=float)
        / HBARC_EV_UM
        * np.sin(np.radians(np.asarray(angle_deg, dtype=float)))
    )


def _parabolic_peak(y: np.ndarray, i: int) -> float:
    if 0 < i < y.size - 1:
        a, b, c = y[i - 1], y[i], y[i + 1]
        den = a - 2 * b + c
        if den != 0:
            return i + 0.5 * (a - c) / den
    return float(i)


def find_pupil_edges(signal, pixel=None, *, axis: int = 0, smooth_px: float = 1.5) -> PupilEdges:
    """Find the two pupil edges on a Fourier-plane image.

    Parameters
    ----------
    signal
        2-D image; ``axis`` is the Fourier-plane pixel axis, the other is summed over.
    pixel
        Pixel positions along ``axis`` (default 0, 1, 2 ...).
    axis
        The pixel axis of ``signal``.
    smooth_px
        Gaussian smoothing (pixels) of the profile before the edge search.

    Returns
    -------
    PupilEdges
        Left and right edges in pixel units.

    Raises
    ------
    DataError
        When the profile has no drop at both sides (no pupil in the frame).
    """
    img = np.asarray(signal, dtype=float)
    profile = np.nansum(np.moveaxis(img, axis, 0).reshape(img.shape[axis], -1), axis=1)
    n = profile.size
    px = np.arange(n, dtype=float) if pixel is None else np.asarray(pixel, dtype=float)
    if n < 8:
        raise DataError(
            f"expected at least 8 pixels to find the pupil edges; found {n}",
            field="pixel",
        )
    smooth = gaussian_filter1d(profile, smooth_px, mode="nearest")
    lo, hi = np.percentile(smooth, 2), smooth.max()
    if not hi > lo:
        raise DataError(
            "expected a bright pupil on a darker background; found a flat profile. "
            "Fix: give k0_pixel and pupil_radius_px explicitly",
            field="pixel",
        )
    above = np.flatnonzero(smooth > lo + 0.1 * (hi - lo))
    first, last = int(above[0]), int(above[-1])
    if first == 0 or last == n - 1:
        raise DataError(
            "expected the intensity to drop at both sides of the pupil; found the pupil touching "
            "the frame edge. Fix: give k0_pixel and pupil_radius_px explicitly",
            field="pixel",
        )
    grad = np.gradient(smooth)
    w = int(math.ceil(3 * smooth_px)) + 3
    lo_i, hi_i = max(first - w, 1), min(first + w, n - 2)
    i_left = lo_i + int(np.argmax(grad[lo_i : hi_i + 1]))
    lo_i, hi_i = max(last - w, 1), min(last + w, n - 2)
    i_right = lo_i + int(np.argmin(grad[lo_i : hi_i + 1]))
    f_left = _parabolic_peak(grad, i_left)
    f_right = _parabolic_peak(-grad, i_right)
    step = np.interp([f_left, f_right], np.arange(n), px)
    edges = PupilEdges(float(step[0]), float(step[1]))
    logger.info("pupil edges at %.2f and %.2f px", edges.left, edges.right)
    return edges


def calibrate_pixel_axis(
    pixel, image, *, fourier: dict | None, attrs: dict, path=None, image_axis: int = 0
) -> tuple[np.ndarray, np.ndarray, dict]:
    """Turn a pixel axis into emission angles for a loader.

    Parameters
    ----------
    pixel
        The pixel axis.
    image
        The signal, with the pixel axis at ``image_axis`` (for edge finding).
    fourier
        ``{"na", "k0_pixel", "pupil_radius_px"}`` (the last two optional); values
        missing here are taken from ``attrs``, and p0/r_NA from the image if absent.
    attrs
        File attributes.
    path
        For messages.

    Returns
    -------
    angle_deg, keep, calibration
        Angles of the kept pixels, the boolean mask of kept pixels, and the
        calibration used (to be stored as attributes).
    """
    fourier = dict(fourier or {})
    unknown = sorted(set(fourier) - set(FOURIER_KEYS))
    if unknown:
        raise ConfigError(
            f"expected keys {FOURIER_KEYS}; found unknown key(s) {unknown}",
            path=path,
            key=unknown[0],
        )
    params = {k: fourier.get(k, attrs.get(k)) for k in FOURIER_KEYS}
    if params["na"] is None:
        raise DataError(
            "expected a Fourier-plane calibration for an angle axis in pixels; found no "
            "numerical aperture. Fix: pass fourier={'na': 0.55, 'k0_pixel': ..., "
            "'pupil_radius_px': ...} or store attributes na, k0_pixel, pupil_radius_px",
            path=path,
            field="na",
        )
    px = np.asarray(pixel, dtype=float)
    how = "given"
    if params["k0_pixel"] is None or params["pupil_radius_px"] is None:
        order = np.argsort(px)
        img = np.take(np.asarray(image, dtype=float), order, axis=image_axis)
        try:
            edges = find_pupil_edges(img, px[order], axis=image_axis)
        except DataError as exc:
            raise DataError(exc.reason, path=path, field="pupil_radius_px") from None
        if params["k0_pixel"] is None:
            params["k0_pixel"] = edges.k0_pixel
        if params["pupil_radius_px"] is None:
            params["pupil_radius_px"] = edges.radius
        how = f"pupil edges found at {edges.left:.2f} and {edges.right:.2f} px"
    na, p0, r = _check_params(
        params["na"], params["k0_pixel"], params["pupil_radius_px"], path=path
    )
    s = na * (px - p0) / r
    keep = np.abs(s) <= na * (1 + 1e-12)
    n_drop = int(np.count_nonzero(~keep))
    if n_drop:
        warnings.warn(
            f"{path}: field 'angle': {n_drop} pixel(s) beyond the pupil (|p - {p0:.2f}| > "
            f"{r:.2f} px, i.e. beyond NA {na:g}) were dropped",
            DataWarning,
            stacklevel=3,
        )
    if not np.any(keep):
        raise DataError(
            "expected pixels inside the pupil; found none. Fix: check k0_pixel and pupil_radius_px",
            path=path,
            field="angle",
        )
    angle = np.degrees(np.arcsin(np.clip(s[keep], -1.0, 1.0)))
    calibration = {"na": na, "k0_pixel": p0, "pupil_radius_px": r, "fourier_calibration": how}
    return angle, keep, calibration


def to_k(da: xr.DataArray, k=None) -> xr.DataArray:
    """Resample an angle map onto a regular in-plane wavevector grid.

    For each energy column the pixel wavevectors k_i = E sin(theta_i) / (hbar c) are
    computed and the signal is linearly interpolated onto ``k``.  Values are
    interpolated, not re-binned: a count per angle pixel stays a count per angle pixel.

    Parameters
    ----------
    da
        Canonical map on dim ``angle``.
    k
        Target grid in 1/um.  Default: as many points as angles, spanning the range
        that every energy covers.

    Returns
    -------
    xarray.DataArray
        Canonical map on dim ``k``.
    """
    from polkit.data.validate import validate_map

    da = validate_map(da)
    if da.dims[0] != "angle":
        raise DataError(
            f"expected a map on dim 'angle'; found dims {da.dims}",
            path=da.attrs.get("source"),
            field="angle",
        )
    energy = da["energy"].values
    sin_t = np.sin(np.radians(da["angle"].values))
    kk = np.outer(sin_t, energy) / HBARC_EV_UM  # (angle, energy)
    if k is None:
        kmin = kk[0].max()
        kmax = kk[-1].min()
        k = np.linspace(kmin, kmax, da.sizes["angle"])
    k = np.asarray(k, dtype=float)
    values = da.values
    out = np.empty((k.size, energy.size))
    for j in range(energy.size):
        out[:, j] = np.interp(k, kk[:, j], values[:, j], left=np.nan, right=np.nan)
    attrs = dict(da.attrs)
    if np.isnan(out).any() and not np.isnan(values).any():
        raise DataError(
            f"expected a k grid inside the range every energy covers ({kk[0].max():.4g} to "
            f"{kk[-1].min():.4g} 1/um); found {k.min():.4g} to {k.max():.4g}",
            path=attrs.get("source"),
            field="k",
        )
    attrs = append_history(attrs, "to_k: k = E sin(theta)/(hbar c); values interpolated per energy")
    res = xr.DataArray(
        out,
        dims=("k", "energy"),
        coords={"k": ("k", k, dict(COORD_ATTRS["k"])), "energy": da["energy"]},
        attrs=attrs,
        name=da.name,
    )
    return validate_map(res)

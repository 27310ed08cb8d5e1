"""Masks of a canonical map before a fit: cosmic-ray spikes, saturation, excluded windows.

Every step here *masks* (NaN with ``attrs["masked"] = 1``) and never replaces a value,
counts what it masked in ``attrs["preprocessing"]`` (JSON text, see
:mod:`polkit.data.camera`) and writes a history line.  :func:`prepare_camera_map` runs
them in order with one :class:`~polkit.data.camera.CameraOptions`.

Spike test (:func:`find_spikes`)
    A cosmic ray lights one or two pixels; a polariton branch is a line that is several
    pixels wide along energy (its linewidth) even where it disperses so fast that it
    crosses an angle row within one pixel.  A pixel is a spike only when it passes both
    tests, each allowing a spike two pixels wide:

    * energy: it stands ``threshold`` noise sigmas above both energy neighbours (or, with
      one neighbour as a pair, above the pixels beyond the pair), and its second difference
      is at least twice the difference between the first and second rings of neighbours (a
      Lorentzian line 2 pixels wide or wider fails this; a spike on a smooth slope passes);
    * angle: its rise over the running median of 5 pixels along energy stands ``threshold``
      sigmas above the tallest rise within ``reach`` energy pixels in both neighbouring
      angle rows (or, as a pair with the nearest pixels of one neighbouring row, above the
      rows beyond the pair): a narrow branch continues into the next rows at a shifted
      energy, a spike does not, and a wide line keeps little rise and protects nothing.

    The noise is the detector model of :func:`~polkit.data.camera.detector_variance_terms`
    at the brighter energy neighbour where the map carries a gain, else a robust local
    scale (1.4826 times the median absolute second difference in 7 x 7 pixel blocks, and
    at least its median over the map).  Pixels masked already protect their neighbours
    (a spike next to a saturated pixel is kept), and so do the two pixels at each end of
    the energy axis.  A second pass runs with the spikes of the first removed.  Limits: a
    feature one pixel wide in both directions cannot be told from a spike; a branch
    narrower than about 2 pixels along energy that moves more than ``reach`` pixels from
    one angle row to the next can be masked (raise ``reach``); a spike lower than a
    narrow line's rise within ``reach`` pixels in the next rows, or than
    ``threshold`` sigmas, is kept, and two spikes in neighbouring rows within ``reach``
    pixels can hide each other.
    # common practice, no published source
"""

from __future__ import annotations

import logging
import warnings

import numpy as np
import xarray as xr
from scipy.ndimage import binary_dilation, maximum_filter1d, median_filter

from polkit.data.camera import (
    CameraOptions,
    detector_variance_terms,
    find_saturated_raw,
    parse_exclude,
    preprocessing_record,
    raw_counts,
    record_step,
)
from polkit.data.preprocess import block_median
from polkit.data.schema import append_history
from polkit.data.validate import validate_map
from polkit.errors import ConfigError, DataWarning

__all__ = ["find_spikes", "mask_spikes", "mask_saturated_map", "mask_windows",
           "prepare_camera_map"]

logger = logging.getLogger(__name__)

_MAD_TO_SIGMA = 1.4826
_BLOCK = 7
#: a spike's second difference is this many times that of the pixels beside it (a
#: Lorentzian 2 pixels wide gives 1.7, one 1.5 pixels wide 2.7)
_NARROW_RATIO = 2.0


def _masked(da: xr.DataArray, values: np.ndarray, key: str, entry, line: str) -> xr.DataArray:
    attrs = append_history(record_step(dict(da.attrs), key, entry), line)
    if np.isnan(values).any():
        attrs["masked"] = 1
    return validate_map(da.copy(data=values).assign_attrs(attrs))


def _shift(x: np.ndarray, di: int, dj: int, fill: float) -> np.ndarray:
    """``out[i, j] = x[i + di, j + dj]``, ``fill`` outside the map."""
    out = np.full_like(x, fill)
    n0, n1 = x.shape
    src = x[max(di, 0):n0 + min(di, 0), max(dj, 0):n1 + min(dj, 0)]
    out[max(-di, 0):n0 + min(-di, 0), max(-dj, 0):n1 + min(-dj, 0)] = src
    return out


def _robust_sigma(x: np.ndarray) -> np.ndarray:
    """Local noise scale from second differences along energy (robust to spikes)."""
    with np.errstate(invalid="ignore"):
        r = x - 0.5 * (_shift(x, 0, -1, np.nan) + _shift(x, 0, 1, np.nan))
        r = np.abs(r) * (_MAD_TO_SIGMA / np.sqrt(1.5))  # var(x - mean of two) = 1.5 var
    finite = r[np.isfinite(r)]
    overall = float(np.median(finite)) if finite.size else 0.0
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)  # all-NaN blocks
        local = block_median(r, _BLOCK, np.nanmedian)
    return np.maximum(np.where(np.isfinite(local), local, overall), overall)


#: how many times taller than anything within reach in the neighbouring angle rows a spike
#: must rise (common practice, no published source)
SPIKE_RATIO = 3.0


def _spike_pass(x, protect, threshold, reach, terms):
    # energy neighbours: masked pixels and the ends of the axis protect (+inf)
    xe = np.where(protect, np.inf, x)
    pad = np.pad(xe, ((0, 0), (3, 3)), constant_values=np.inf)
    n1 = x.shape[1]
    l3, l2, l1, r1, r2, r3 = (pad[:, k:k + n1] for k in (0, 1, 2, 4, 5, 6))
    if terms is not None:
        a, b = terms
        level = np.where(np.isfinite(np.maximum(l1, r1)), np.maximum(l1, r1), x)
        sigma = np.sqrt(np.maximum(a * np.clip(level, 0, None) + b, a))
    else:
        sigma = _robust_sigma(np.where(protect, np.nan, x))
    finite = np.isfinite(x)
    floor = 1e-12 * (np.max(np.abs(x[finite])) if finite.any() else 1.0)
    limit = threshold * np.maximum(sigma, floor)
    with np.errstate(invalid="ignore"):
        # (height, excess over the two pixels beside it, first and second rings)
        modes = (
            (x, x - np.maximum(l1, r1), 0.5 * (l1 + r1), 0.5 * (l2 + r2)),
            (np.minimum(x, r1), np.minimum(x, r1) - np.maximum(l1, r2), 0.5 * (l1 + r2),
             0.5 * (l2 + r3)),
            (np.minimum(x, l1), np.minimum(x, l1) - np.maximum(l2, r1), 0.5 * (l2 + r1),
             0.5 * (l3 + r2)),
        )
        energy_ok = np.zeros(x.shape, dtype=bool)
        for height, excess, ring1, ring2 in modes:
            narrow = height - ring1 >= _NARROW_RATIO * np.abs(ring1 - ring2)
            energy_ok |= (excess > limit) & narrow
    # angle neighbours: the pixels' height over the running median of 5 along energy (a
    # narrow line keeps about half of its height, a wide line little, a spike all); the
    # tallest within +-reach energy pixels of each row: a narrow branch continues into the
    # next rows at a shifted energy, a spike does not
    with np.errstate(invalid="ignore"):
        rise = xe - median_filter(np.where(np.isfinite(xe), xe, -np.inf), size=(1, 5),
                                  mode="nearest")
    rise = np.where(protect, np.inf, np.where(np.isfinite(x), rise, -np.inf))
    env = maximum_filter1d(rise, size=2 * reach + 1, axis=1, mode="nearest")
    near = maximum_filter1d(rise, size=3, axis=1, mode="nearest")
    x = rise
    u1, d1 = _shift(env, -1, 0, -np.inf), _shift(env, 1, 0, -np.inf)
    u2, d2 = _shift(env, -2, 0, -np.inf), _shift(env, 2, 0, -np.inf)
    pu, pd = _shift(near, -1, 0, -np.inf), _shift(near, 1, 0, -np.inf)
    with np.errstate(invalid="ignore"):
        # a spike stands out from the rows beside it both absolutely (by the limit) and
        # relatively (SPIKE_RATIO times their tallest rise within reach): the peak pixel
        # of an undersampled line changes height from row to row with the sampling phase,
        # by far more than the noise on a bright line, but not by a factor of three
        alone = np.maximum.reduce([
            (x - np.maximum(u1, d1) > limit) & (x > SPIKE_RATIO * np.maximum(u1, d1)),
            (np.minimum(x, pd) - np.maximum(u1, d2) > limit)
            & (np.minimum(x, pd) > SPIKE_RATIO * np.maximum(u1, d2)),
            (np.minimum(x, pu) - np.maximum(u2, d1) > limit)
            & (np.minimum(x, pu) > SPIKE_RATIO * np.maximum(u2, d1)),
        ])
        return finite & energy_ok & alone  # noqa: RET504


def find_spikes(da: xr.DataArray, *, threshold: float = 8.0, reach: int = 12,
                passes: int = 2) -> tuple[np.ndarray, str]:
    """Boolean mask of cosmic-ray spike pixels of a map (see the module notes).

    Parameters
    ----------
    da
        Canonical map.
    threshold
        Excess over the neighbours, in noise sigmas, above which a narrow pixel is a spike.
    reach
        Energy pixels searched in the neighbouring angle rows for the continuation of a
        branch (the steepest dispersion told apart from a spike, in energy pixels per
        angle pixel).
    passes
        Repeat with the spikes found so far removed (finds spikes next to each other).

    Returns
    -------
    tuple
        ``(mask, noise)``: the spike pixels (shape of the map) and how the noise was set.
    """
    if not threshold > 0:
        raise ConfigError(f"expected a positive threshold; found {threshold!r}", key="threshold")
    if isinstance(reach, bool) or not isinstance(reach, (int, np.integer)) or reach < 1:
        raise ConfigError(f"expected an integer reach >= 1; found {reach!r}", key="reach")
    da = validate_map(da)
    x = np.asarray(da.values, dtype=float)
    terms = detector_variance_terms(da)
    noise = ("the detector model (gain, read noise)" if terms is not None
             else "a robust local scale (MAD of second differences)")
    masked = np.isnan(x)
    spikes = np.zeros(x.shape, dtype=bool)
    for _ in range(max(int(passes), 1)):
        work = np.where(spikes, -np.inf, x)  # removed spikes protect nothing
        found = _spike_pass(work, masked, float(threshold), int(reach), terms) & ~spikes
        if not found.any():
            break
        spikes |= found
    return spikes, noise


def mask_spikes(da: xr.DataArray, *, threshold: float = 8.0, reach: int = 12) -> xr.DataArray:
    """Mask cosmic-ray spikes and a one-pixel margin around each (NaN, ``masked = 1``).

    Returns
    -------
    xarray.DataArray
        The map; ``attrs["preprocessing"]`` gets ``spikes`` (spike pixels), ``pixels``
        (newly masked, with the margin), the threshold and the noise used.
    """
    da = validate_map(da)
    spikes, noise = find_spikes(da, threshold=threshold, reach=reach)
    x = np.array(da.values, dtype=float)
    hit = binary_dilation(spikes, structure=np.ones((3, 3), dtype=bool)) & np.isfinite(x)
    x[hit] = np.nan
    n_sp, n_px = int(spikes.sum()), int(hit.sum())
    logger.info("masked %d spike pixel(s), %d with the margin", n_sp, n_px)
    entry = {"spikes": n_sp, "pixels": n_px, "threshold": float(threshold), "reach": int(reach),
             "noise": noise}
    return _masked(da, x, "spikes", entry,
                   f"mask_spikes: {n_sp} spike pixel(s), {n_px} masked with a one-pixel margin "
                   f"(threshold {threshold:g} sigma, noise from {noise})")


def mask_saturated_map(da: xr.DataArray) -> xr.DataArray:
    """Mask clipped pixels of a canonical map, judged in raw counts (see the loader's test).

    The loader does this on the file's raw counts (``load_map(..., mask_saturated=True)``);
    this is for maps built in memory: raw counts are ``signal / jacobian`` plus
    ``offset_subtracted``.
    """
    da = validate_map(da)
    raw = raw_counts(da) + float(da.attrs.get("offset_subtracted", 0.0))
    raw = np.where(np.isfinite(raw), np.round(raw, 6), raw)  # undo round-off of J scaling
    hit, reasons = find_saturated_raw(raw, energy_axis=1, saturation=da.attrs.get("saturation"))
    x = np.array(da.values, dtype=float)
    x[hit] = np.nan
    n = int(hit.sum())
    return _masked(da, x, "saturated", {"pixels": n, "reasons": reasons},
                   f"mask_saturated_map: {n} saturated pixel(s) masked")


def mask_windows(da: xr.DataArray, windows) -> xr.DataArray:
    """Mask the pixels inside excluded windows (lines that are not polaritons).

    ``windows``: :class:`~polkit.data.camera.ExcludeWindow` items or text
    ``"E1:E2"``/``"E1:E2@A1:A2"`` (eV; the map's angle or k units).  A window that covers
    no pixel draws a :class:`~polkit.errors.DataWarning`.
    """
    da = validate_map(da)
    wins = [parse_exclude(w) for w in windows]
    if not wins:
        return da
    adim = da.dims[0]
    e = da["energy"].values
    a = da[adim].values
    x = np.array(da.values, dtype=float)
    total = np.zeros(x.shape, dtype=bool)
    for w in wins:
        sel = ((e >= w.energy[0]) & (e <= w.energy[1]))[None, :]
        if w.angle is not None:
            sel = sel & ((a >= w.angle[0]) & (a <= w.angle[1]))[:, None]
        else:
            sel = np.broadcast_to(sel, x.shape)
        if not sel.any():
            warnings.warn(
                f"{da.attrs.get('source', 'map')}: field 'exclude': the window {w} covers no "
                f"pixel (the map spans {e[0]:.4f}-{e[-1]:.4f} eV, {adim} {a[0]:g}-{a[-1]:g} "
                f"{da[adim].attrs.get('units', '')}); check --exclude",
                DataWarning, stacklevel=2)
        total |= sel
    hit = total & np.isfinite(x)
    x[hit] = np.nan
    n = int(hit.sum())
    texts = [str(w) for w in wins]
    return _masked(da, x, "excluded", {"pixels": n, "windows": texts},
                   f"mask_windows: {n} pixel(s) masked in {'; '.join(texts)}")


def prepare_camera_map(da: xr.DataArray, options: CameraOptions | None = None) -> xr.DataArray:
    """Apply the camera steps of ``options`` that the loader has not done already.

    Order: offset (for in-memory maps; a file's offset is subtracted by the loader),
    saturation, spikes, excluded windows.  Steps switched off are recorded as such.
    """
    from polkit.data import subtract_dark

    opts = options if options is not None else CameraOptions()
    da = validate_map(da)
    rec = preprocessing_record(da)
    if opts.dark is not None and "offset" not in rec:
        if isinstance(opts.dark, (int, float)):
            dark, what = float(opts.dark), f"level {float(opts.dark):g} counts (option)"
        else:
            from polkit.data import load_map

            dark, what = load_map(opts.dark), f"dark frame {opts.dark}"
        da = subtract_dark(da, dark)
        attrs = record_step(dict(da.attrs), "offset", {
            "what": what, "median_counts": float(np.median(np.asarray(
                dark.values if isinstance(dark, xr.DataArray) else dark)))})
        da = da.assign_attrs(attrs)
    if opts.mask_saturated:
        if "saturated" not in rec:
            da = mask_saturated_map(da)
    else:
        da = da.assign_attrs(record_step(dict(da.attrs), "saturated_off", True))
    if opts.mask_spikes:
        da = mask_spikes(da, threshold=opts.spike_threshold)
    else:
        da = da.assign_attrs(record_step(dict(da.attrs), "spikes_off", True))
    if opts.exclude:
        da = mask_windows(da, opts.exclude)
    return da

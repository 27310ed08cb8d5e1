"""Preprocessing of canonical maps: crop, background, cosmic rays, binning, saturation, symmetry.

Each step takes a canonical map and returns a new one (the input is never modified),
with a line appended to ``attrs["history"]`` saying what was done and with which
numbers; the result is validated again.  Parameters a caller gets wrong (windows,
factors, levels) raise :class:`~polkit.errors.ConfigError`; data that cannot be
processed raise :class:`~polkit.errors.DataError`.

Cosmic-ray test
    A cosmic ray hits one or two pixels; spectral lines and dispersion branches are
    extended along some direction of the map.  Each pixel is therefore compared with
    the median of its neighbours at one and two steps along several directions (along
    angle, along energy, and slopes of 1/2, 1, 2, ... ``max_slope`` energy pixels per
    angle pixel either way).  Its excess over the *best-matching* direction (the smallest excess)
    must exceed ``threshold`` noise sigmas, and so must its excess over the mean of
    the brightest pixels within +-``max_slope`` energy pixels in the two neighbouring
    angle rows, for the pixel to be a spike: a pixel on a line is protected by the
    direction the line runs along and by the same line in the next rows.  The noise is a robust
    local scale: for each direction, 1.4826 times the median of the absolute residuals
    in 7 x 7 pixel blocks, and the smallest of these (the direction that follows the
    local structure sees only noise); it is raised to the detector model
    sqrt(a signal + b) of :func:`polkit.data.camera.detector_variance_terms` when the
    map carries a gain.  A flagged pixel is
    replaced by the prediction of the direction whose four neighbours agree best
    (the direction running along the local contour of the map).  Bright lines narrower
    than about three pixels that disperse faster than ``max_slope`` energy pixels per
    angle pixel can be flagged; raise ``max_slope`` (or ``threshold``) for those.  A
    spike on the flank of a bright line is found only if it also stands ``threshold``
    sigmas above that line's peak in the neighbouring angle rows.  A feature one pixel
    wide in both angle and energy cannot be told from a spike.  This replacing remover is
    kept for existing scripts; :func:`polkit.data.spikes.mask_spikes` masks spikes instead
    (and is what the dispersion job uses).
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
import xarray as xr
from scipy.interpolate import interp1d
from scipy.optimize import minimize_scalar

from polkit._checks import window
from polkit.data.camera import detector_variance_terms, raw_counts
from polkit.data.schema import append_history
from polkit.data.validate import validate_map
from polkit.errors import ConfigError, DataError

__all__ = [
    "crop",
    "subtract_dark",
    "subtract_background",
    "remove_cosmic_rays",
    "bin_map",
    "flag_saturated",
    "SymmetryReport",
    "check_symmetry",
    "shift_axis",
]

logger = logging.getLogger(__name__)

_MAD_TO_SIGMA = 1.4826


def _with(da: xr.DataArray, values: np.ndarray, line: str, **attrs) -> xr.DataArray:
    new_attrs = append_history(dict(da.attrs), line)
    new_attrs.update(attrs)
    return validate_map(da.copy(data=values).assign_attrs(new_attrs))


def _region(da: xr.DataArray, windows: dict) -> dict[str, slice]:
    sel = {}
    for name, win in windows.items():
        if win is None:
            continue
        if name not in da.dims:
            raise ConfigError(f"expected a window on one of {da.dims}; found {name!r}", key=name)
        lo, hi = window(win, name)
        sel[name] = slice(lo, hi)
    return sel


def crop(da: xr.DataArray, *, angle=None, k=None, energy=None) -> xr.DataArray:
    """Keep the part of a map inside the given windows (inclusive).

    Parameters
    ----------
    da
        Canonical map.
    angle, k
        (low, high) in degree or 1/um, on whichever axis the map has.
    energy
        (low, high) in eV.

    Returns
    -------
    xarray.DataArray
        The cropped map (refused by validation if fewer than 5 angles or 20
        energies remain).
    """
    da = validate_map(da)
    sel = _region(da, {"angle": angle, "k": k, "energy": energy})
    out = da.sel(sel)
    text = ", ".join(
        f"{n} [{s.start:g}, {s.stop:g}] {da[n].attrs['units']}" for n, s in sel.items()
    )
    attrs = append_history(dict(da.attrs), f"crop: {text or 'nothing'}")
    return validate_map(out.assign_attrs(attrs))


def subtract_dark(da: xr.DataArray, dark) -> xr.DataArray:
    """Subtract a dark frame (a map on the same axes, an array of the same shape, or a number).

    A number or a plain array is in raw counts: on a Jacobian-scaled map (coordinate
    ``jacobian``) it is multiplied by the factor of each energy before it is subtracted.
    A dark map loaded like the map is subtracted as it is.  Prefer the loader's ``dark=``
    (:func:`polkit.data.load_map`), which subtracts in raw counts before any conversion.

    Raises
    ------
    DataError
        When the dark frame's shape or axes differ from the map's.
    """
    da = validate_map(da)
    path = da.attrs.get("source")
    if isinstance(dark, xr.DataArray):
        if dark.dims != da.dims or dark.shape != da.shape:
            raise DataError(
                f"expected a dark frame with dims {da.dims} and shape {da.shape}; found dims "
                f"{dark.dims} and shape {dark.shape}. Fix: record the dark frame with the same "
                "settings or crop both alike",
                path=path,
                field="dark",
            )
        for dim in da.dims:
            if not np.allclose(
                dark[dim].values,
                da[dim].values,
                rtol=0,
                atol=1e-9 * (1 + np.abs(da[dim].values).max()),
            ):
                raise DataError(
                    f"expected the dark frame on the same {dim} axis as the map; found different "
                    "axis values. Fix: crop or load both with the same options",
                    path=path,
                    field="dark",
                )
        d = np.asarray(dark.values, dtype=float)
        desc = f"dark frame {dark.attrs.get('source', 'in-memory')}"
    else:
        d = np.asarray(dark, dtype=float)
        if d.ndim and d.shape != da.shape:
            raise DataError(
                f"expected a dark frame of shape {da.shape} (or a number); found shape {d.shape}",
                path=path,
                field="dark",
            )
        desc = f"dark level {float(d):g}" if d.ndim == 0 else "dark frame array"
        if "jacobian" in da.coords:
            d = d * da["jacobian"].values[None, :]
            desc += " (raw counts, times the jacobian)"
    if not np.all(np.isfinite(d)):
        raise DataError("expected a finite dark frame; found NaN/Inf", path=path, field="dark")
    return _with(da, da.values - d, f"subtract_dark: {desc}")


def subtract_background(da: xr.DataArray, *, angle=None, k=None, energy=None) -> xr.DataArray:
    """Subtract the median of a background region (given by windows) from the whole map.

    Parameters
    ----------
    da
        Canonical map.
    angle, k, energy
        (low, high) windows selecting a region without signal.

    Returns
    -------
    xarray.DataArray
        The map minus the region's median; the level is stored in
        ``attrs["background_level"]``.
    """
    da = validate_map(da)
    sel = _region(da, {"angle": angle, "k": k, "energy": energy})
    if not sel:
        raise ConfigError("expected at least one window for the background region", key="energy")
    region = da.sel(sel).values
    finite = region[np.isfinite(region)]
    if finite.size == 0:
        raise DataError(
            "expected pixels in the background region; found none (or only masked ones). "
            "Fix: widen the windows",
            path=da.attrs.get("source"),
            field="background",
        )
    level = float(np.median(finite))
    text = ", ".join(f"{n} [{s.start:g}, {s.stop:g}]" for n, s in sel.items())
    return _with(
        da,
        da.values - level,
        f"subtract_background: median {level:.6g} {da.attrs['units']} of {finite.size} "
        f"pixels in {text}",
        background_level=level,
    )


def _directions(max_slope: int) -> list[tuple[int, int]]:
    """(angle step, energy step) pairs: along angle, along energy, slopes 1/2 .. max_slope."""
    out = [(1, 0), (0, 1), (2, 1), (2, -1)]
    for m in range(1, max_slope + 1):
        out += [(1, m), (1, -m)]
    return out


def _neighbour_stack(x: np.ndarray, direction: tuple[int, int], pad: int) -> np.ndarray:
    padded = np.pad(x, pad, mode="symmetric")
    n0, n1 = x.shape
    out = []
    for step in (-2, -1, 1, 2):
        i, j = pad + step * direction[0], pad + step * direction[1]
        out.append(padded[i : i + n0, j : j + n1])
    return np.stack(out)


def _row_envelope(x: np.ndarray, reach: int) -> np.ndarray:
    """Mean of the two neighbouring angle rows' maxima within +-reach energy pixels."""
    filled = np.where(np.isnan(x), -np.inf, x)
    pad = np.pad(filled, ((1, 1), (reach, reach)), mode="reflect")
    n0, n1 = x.shape
    sides = []
    for di in (0, 2):
        rows = pad[di : di + n0]
        sides.append(np.max([rows[:, dj : dj + n1] for dj in range(2 * reach + 1)], axis=0))
    return 0.5 * (sides[0] + sides[1])


_BLOCK = 7


def _median4(stack: np.ndarray, has_nan: bool) -> tuple[np.ndarray, np.ndarray]:
    """Median (mean of the middle two) and spread (max - min) of four values along axis 0."""
    if has_nan:
        return np.nanmedian(stack, axis=0), np.nanmax(stack, axis=0) - np.nanmin(stack, axis=0)
    hi, lo = stack.max(axis=0), stack.min(axis=0)
    return 0.5 * (stack.sum(axis=0) - hi - lo), hi - lo


def block_median(r: np.ndarray, size: int, median=np.median) -> np.ndarray:
    """Median over size x size blocks, spread back over the pixels of each block.

    ``median`` is the median function (``np.nanmedian`` to pass over masked pixels).
    """
    n0, n1 = r.shape
    m0, m1 = -(-n0 // size) * size, -(-n1 // size) * size
    padded = np.pad(r, ((0, m0 - n0), (0, m1 - n1)), mode="symmetric")
    blocks = padded.reshape(m0 // size, size, m1 // size, size).transpose(0, 2, 1, 3)
    med = median(blocks.reshape(m0 // size, m1 // size, size * size), axis=-1)
    return np.repeat(np.repeat(med, size, axis=0), size, axis=1)[:n0, :n1]


def _spike_pass(
    x: np.ndarray, threshold: float, terms, max_slope: int
) -> tuple[np.ndarray, np.ndarray]:
    has_nan = bool(np.isnan(x).any())
    pad = 2 * max_slope + 2
    pairs = [_median4(_neighbour_stack(x, d, pad), has_nan) for d in _directions(max_slope)]
    preds = np.stack([p for p, _ in pairs])
    spreads = np.stack([s for _, s in pairs])
    resid = x[None] - preds
    best = np.argmin(np.where(np.isnan(resid), np.inf, resid), axis=0)
    excess = np.take_along_axis(resid, best[None], axis=0)[0]
    pred = np.take_along_axis(preds, best[None], axis=0)[0]
    flattest = np.argmin(np.where(np.isnan(spreads), np.inf, spreads), axis=0)
    replacement = np.take_along_axis(preds, flattest[None], axis=0)[0]
    scales = []
    for r in np.abs(resid):
        fill = np.nanmedian(r) if np.isfinite(r).any() else 0.0
        r = np.where(np.isfinite(r), r, fill)
        scales.append(_MAD_TO_SIGMA * block_median(r, _BLOCK))
    sigma = np.min(scales, axis=0)
    if terms is not None:
        a, b = terms
        sigma = np.maximum(sigma, np.sqrt(a * np.clip(pred, 0, None) + b))
    finite = x[np.isfinite(x)]
    floor = 1e-12 * (np.max(np.abs(finite)) if finite.size else 1.0)
    sigma = np.maximum(sigma, floor)
    envelope = _row_envelope(x, max_slope)
    with np.errstate(invalid="ignore"):
        flagged = np.isfinite(x) & (excess > threshold * sigma) & (x - envelope > threshold * sigma)
    return flagged, replacement


def remove_cosmic_rays(
    da: xr.DataArray, *, threshold: float = 8.0, passes: int = 2, max_slope: int = 3
) -> xr.DataArray:
    """Replace cosmic-ray spikes by the prediction of their neighbours.

    Parameters
    ----------
    da
        Canonical map.
    threshold
        Excess over the best-matching directional neighbour median, in noise sigmas,
        above which a pixel is a spike.
    passes
        Repeat the test this many times (catches spikes hiding next to each other).
    max_slope
        Steepest dispersion, in energy pixels per angle pixel, that lines may have
        and still be told apart from spikes (a larger value protects steeper lines
        but makes spikes next to lines harder to see).

    Returns
    -------
    xarray.DataArray
        The cleaned map; ``attrs["cosmic_rays_replaced"]`` holds the number of pixels
        replaced (also written to the history).
    """
    da = validate_map(da)
    if not threshold > 0:
        raise ConfigError(f"expected a positive threshold; found {threshold!r}", key="threshold")
    if int(passes) < 1:
        raise ConfigError(f"expected passes >= 1; found {passes!r}", key="passes")
    if isinstance(max_slope, bool) or not isinstance(max_slope, (int, np.integer)) or max_slope < 1:
        raise ConfigError(
            f"expected an integer max_slope >= 1; found {max_slope!r}", key="max_slope"
        )
    x = da.values.copy()
    terms = detector_variance_terms(da)
    replaced = np.zeros(x.shape, dtype=bool)
    for _ in range(int(passes)):
        flagged, pred = _spike_pass(x, float(threshold), terms, int(max_slope))
        if not flagged.any():
            break
        x[flagged] = pred[flagged]
        replaced |= flagged
    n = int(replaced.sum())
    logger.info("replaced %d cosmic-ray pixel(s)", n)
    return _with(
        da,
        x,
        f"remove_cosmic_rays: {n} pixel(s) replaced (threshold {threshold:g} sigma)",
        cosmic_rays_replaced=n,
    )


def bin_map(da: xr.DataArray, *, angle: int = 1, k: int = 1, energy: int = 1) -> xr.DataArray:
    """Bin a map by integer factors along its axes.

    Emission counts are summed (the total is kept; ``read_noise`` grows by the square
    root of the pixels per bin); reflectance and transmission are averaged.  A
    ``jacobian`` coordinate is averaged over each bin, so
    :func:`polkit.data.camera.detector_variance_terms` describes the binned pixels.  Bin
    coordinates are the mean of their pixels; leftover pixels at the high end are
    dropped.  A bin holding a masked (NaN) pixel is masked.

    Returns
    -------
    xarray.DataArray
        The binned map (``saturation`` is removed from the attributes: a binned pixel
        has no single saturation level).
    """
    da = validate_map(da)
    factors = {"angle": angle, "k": k, "energy": energy}
    windows = {}
    for name, f in factors.items():
        if isinstance(f, bool) or not isinstance(f, (int, np.integer)) or f < 1:
            raise ConfigError(f"expected an integer factor >= 1; found {f!r}", key=name)
        if f > 1:
            if name not in da.dims:
                raise ConfigError(
                    f"expected a factor on one of {da.dims}; found {name!r}", key=name
                )
            windows[name] = int(f)
    if not windows:
        return da.copy()
    coarse = da.coarsen(windows, boundary="trim", coord_func="mean")
    kind = da.attrs["kind"]
    out = coarse.reduce(np.sum) if kind == "emission" else coarse.reduce(np.mean)
    attrs = dict(da.attrs)
    n = int(np.prod(list(windows.values())))
    if kind == "emission" and "read_noise" in attrs:
        attrs["read_noise"] = float(attrs["read_noise"]) * math.sqrt(n)
    attrs.pop("saturation", None)
    how = "summed" if kind == "emission" else "averaged"
    text = ", ".join(f"{name} x{f}" for name, f in windows.items())
    attrs = append_history(attrs, f"bin_map: {text} ({how}; leftover pixels dropped)")
    for dim in da.dims:
        out[dim].attrs = dict(da[dim].attrs)
    return validate_map(out.assign_attrs(attrs))


def flag_saturated(da: xr.DataArray, level: float | None = None) -> xr.DataArray:
    """Mask pixels at or above a saturation level as NaN (``attrs["masked"] = 1``).

    Parameters
    ----------
    da
        Canonical map.
    level
        Saturation level in raw counts, as the camera recorded them before any offset
        (default: ``attrs["saturation"]``).  A Jacobian-scaled map is compared in raw
        counts (signal / ``jacobian`` + ``offset_subtracted``).

    Returns
    -------
    xarray.DataArray
        The map with saturated pixels masked; ``attrs["saturated_pixels"]`` says how
        many.
    """
    da = validate_map(da)
    if level is None:
        level = da.attrs.get("saturation")
    if level is None:
        raise ConfigError(
            "expected a saturation level; found none (no level= and no 'saturation' attribute)",
            key="level",
        )
    level = float(level)
    x = da.values.copy()
    raw = raw_counts(da) + float(da.attrs.get("offset_subtracted", 0.0))
    with np.errstate(invalid="ignore"):
        hit = np.isfinite(x) & (raw >= level)
    n = int(hit.sum())
    x[hit] = np.nan
    attrs = {"saturated_pixels": n}
    if n:
        attrs["masked"] = 1
    logger.info("masked %d saturated pixel(s) at level %g", n, level)
    return _with(
        da, x, f"flag_saturated: {n} pixel(s) >= {level:g} raw counts masked", **attrs
    )


@dataclass(frozen=True)
class SymmetryReport:
    """Result of :func:`check_symmetry`.

    Attributes
    ----------
    offset
        Position of the mirror axis (where k = 0 really is), in ``units``.
    units
        ``"degree"`` or ``"1/um"``.
    correlation
        Pearson correlation of the map with its mirror image about ``offset``.
    correlation_at_zero
        The same correlation about 0, for comparison.
    """

    offset: float
    units: str
    correlation: float
    correlation_at_zero: float

    def __str__(self) -> str:
        return (
            f"k = 0 offset {self.offset:+.4g} {self.units} (mirror correlation "
            f"{self.correlation:.4f}; {self.correlation_at_zero:.4f} about 0)"
        )


def check_symmetry(da: xr.DataArray) -> SymmetryReport:
    """Find the mirror axis of a map: the shift that best matches it with its mirror image.

    The map is resampled onto a uniform grid of its angle (or k) axis; for a trial
    centre c the mirror image I(2c - theta) is compared with I(theta) over their
    overlap by the Pearson correlation, which is maximised over c (grid search at
    half-pixel steps, then bounded Brent refinement).  Masked pixels are filled with
    the median of their energy column.

    Returns
    -------
    SymmetryReport
        The offset of the k = 0 axis from the nominal zero.
    """
    da = validate_map(da)
    dim = da.dims[0]
    a = da[dim].values
    x = da.values.copy()
    if np.isnan(x).any():
        med = np.nanmedian(x, axis=0)
        x = np.where(np.isnan(x), med[None, :], x)
    step = float(np.median(np.diff(a)))
    grid = np.arange(a[0], a[-1] + 0.5 * step, step)
    grid = grid[grid <= a[-1]]
    img = interp1d(a, x, axis=0)(grid)
    f = interp1d(grid, img, axis=0, bounds_error=False, fill_value=np.nan)
    span = grid[-1] - grid[0]

    def corr(c: float) -> float:
        lo, hi = max(grid[0], 2 * c - grid[-1]), min(grid[-1], 2 * c - grid[0])
        keep = (grid >= lo) & (grid <= hi)
        if keep.sum() < 3:
            return -1.0
        u = img[keep]
        v = f(2 * c - grid[keep])
        u = u - u.mean()
        v = v - v.mean()
        den = math.sqrt(float((u * u).sum() * (v * v).sum()))
        return float((u * v).sum() / den) if den > 0 else -1.0

    lo_c, hi_c = grid[0] + 0.25 * span, grid[-1] - 0.25 * span
    trials = np.arange(lo_c, hi_c + 1e-12, step / 2)
    scores = np.array([corr(c) for c in trials])
    i = int(np.argmax(scores))
    c0 = trials[i]
    res = minimize_scalar(
        lambda c: -corr(c),
        bounds=(max(lo_c, c0 - step), min(hi_c, c0 + step)),
        method="bounded",
        options={"xatol": step * 1e-3},
    )
    best = float(res.x) if -res.fun >= scores[i] else float(c0)
    report = SymmetryReport(
        offset=best,
        units=da[dim].attrs["units"],
        correlation=corr(best),
        correlation_at_zero=corr(0.0) if lo_c <= 0.0 <= hi_c else float("nan"),
    )
    logger.info("%s", report)
    return report


def shift_axis(da: xr.DataArray, offset: float) -> xr.DataArray:
    """Shift the angle (or k) axis so that ``offset`` becomes 0 (e.g. from check_symmetry)."""
    da = validate_map(da)
    dim = da.dims[0]
    out = da.assign_coords({dim: (dim, da[dim].values - float(offset), dict(da[dim].attrs))})
    attrs = append_history(
        dict(da.attrs),
        f"shift_axis: {dim} shifted by {-float(offset):+.6g} {da[dim].attrs['units']}",
    )
    return validate_map(out.assign_attrs(attrs))

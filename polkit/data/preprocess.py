"""Preprocessing of canonical maps: crop, background, cosmic rays, binning, saturation, symmetry.

Each step takes a canonical map and returns a new one (the input is never modified),
with a line appended to ``attrs["history"]`` saying what was done and with which
numbers; the result is validated again.  Parameters a caller gets wrong (windows,
factors, levels) raise :class:`~polkit.errors.ConfigError`; data that cannot be
processed raise :class:`~polkit.errors.DataError`.

Cosmic-ray test
    A cosmic ray hits one or two pixels; spectral lines and dispersion branches are
    extended along some direction of the map.  Each pixel is therefore compared with
    the median of its neighbours at distances 1 and 2 along four directions (angle,
    energy and the two diagonals).  Its excess over the *best-matching* direction (the
    smallest excess) must exceed ``threshold`` noise sigmas for the pixel to be a
    spike, so a pixel on a line is protected by the direction the line runs along.
    The noise is a robust local scale (1.4826 times the local median, over a 7 x 7
    window, of the median absolute directional residual), raised to the CCD model
    sqrt(signal/gain + read_noise^2) when ``gain`` is known.  A flagged pixel is
    replaced by the best-direction prediction.  Very narrow (<= 2 pixel) bright lines
    running between the four directions can be flagged; raise ``threshold`` for those.
"""

from __future__ import annotations

import logging
import math
from dataclasses import dataclass

import numpy as np
import xarray as xr
from scipy.interpolate import interp1d
from scipy.ndimage import median_filter
from scipy.optimize import minimize_scalar

from ..errors import ConfigError, DataError
from .schema import append_history
from .validate import validate_map

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

_DIRECTIONS = ((1, 0), (0, 1), (1, 1), (1, -1))
_MAD_TO_SIGMA = 1.4826


def _with(da: xr.DataArray, values: np.ndarray, line: str, **attrs) -> xr.DataArray:
    new_attrs = append_history(dict(da.attrs), line)
    new_attrs.update(attrs)
    return validate_map(da.copy(data=values).assign_attrs(new_attrs))


def _window(win, name: str) -> tuple[float, float]:
    try:
        lo, hi = (float(v) for v in win)
    except (TypeError, ValueError):
        raise ConfigError(
            f"expected a window (low, high) of two numbers; found {win!r}", key=name
        ) from None
    if not (math.isfinite(lo) and math.isfinite(hi)) or lo >= hi:
        raise ConfigError(f"expected low < high, both finite; found ({lo:g}, {hi:g})", key=name)
    return lo, hi


def _region(da: xr.DataArray, windows: dict) -> dict[str, slice]:
    sel = {}
    for name, win in windows.items():
        if win is None:
            continue
        if name not in da.dims:
            raise ConfigError(f"expected a window on one of {da.dims}; found {name!r}", key=name)
        lo, hi = _window(win, name)
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


def _neighbour_stack(x: np.ndarray, direction: tuple[int, int]) -> np.ndarray:
    pad = np.pad(x, 2, mode="reflect")
    n0, n1 = x.shape
    out = []
    for step in (-2, -1, 1, 2):
        i, j = 2 + step * direction[0], 2 + step * direction[1]
        out.append(pad[i : i + n0, j : j + n1])
    return np.stack(out)


def _spike_pass(x: np.ndarray, threshold: float, gain, read_noise) -> tuple[np.ndarray, np.ndarray]:
    preds = np.stack([np.nanmedian(_neighbour_stack(x, d), axis=0) for d in _DIRECTIONS])
    resid = x[None] - preds
    best = np.nanargmin(np.where(np.isnan(resid), np.inf, resid), axis=0)
    excess = np.take_along_axis(resid, best[None], axis=0)[0]
    pred = np.take_along_axis(preds, best[None], axis=0)[0]
    spread = np.nanmedian(np.abs(resid), axis=0)
    spread = np.where(np.isfinite(spread), spread, np.nanmedian(spread))
    sigma = _MAD_TO_SIGMA * median_filter(spread, size=7, mode="reflect")
    if gain is not None:
        model = np.sqrt(np.clip(pred, 0, None) / gain + (read_noise or 0.0) ** 2)
        sigma = np.maximum(sigma, model)
    finite = x[np.isfinite(x)]
    floor = 1e-12 * (np.max(np.abs(finite)) if finite.size else 1.0)
    sigma = np.maximum(sigma, floor)
    with np.errstate(invalid="ignore"):
        flagged = np.isfinite(x) & (excess > threshold * sigma)
    return flagged, pred


def remove_cosmic_rays(
    da: xr.DataArray, *, threshold: float = 8.0, passes: int = 2
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
    x = da.values.copy()
    gain = da.attrs.get("gain")
    read_noise = da.attrs.get("read_noise")
    replaced = np.zeros(x.shape, dtype=bool)
    for _ in range(int(passes)):
        flagged, pred = _spike_pass(x, float(threshold), gain, read_noise)
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
    root of the pixels per bin); reflectance and transmission are averaged.  Bin
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
    out = coarse.sum(skipna=False) if kind == "emission" else coarse.mean(skipna=False)
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
        Saturation level in the signal's units (default: ``attrs["saturation"]``).

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
    with np.errstate(invalid="ignore"):
        hit = np.isfinite(x) & (x >= level)
    n = int(hit.sum())
    x[hit] = np.nan
    attrs = {"saturated_pixels": n}
    if n:
        attrs["masked"] = 1
    logger.info("masked %d saturated pixel(s) at level %g", n, level)
    return _with(
        da, x, f"flag_saturated: {n} pixel(s) >= {level:g} {da.attrs['units']} masked", **attrs
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

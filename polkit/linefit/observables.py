"""Observables of a power series: the main line of each spectrum of a spectra cube.

:func:`extract_observables` reduces a cube (series dim ``power`` or ``point``, ``energy``,
optionally an angle-like dim averaged around k = 0) to the integrated intensity, peak energy
and linewidth of its main line per spectrum, each with its standard error.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import xarray as xr
from scipy.ndimage import gaussian_filter1d

from polkit.errors import DataError
from polkit.linefit import inputs
from polkit.linefit.detection import baseline_seed, detect, line_params, seed_line
from polkit.linefit.noise import noise_from_attrs
from polkit.linefit.spectrum import SMOOTH_PX, Fit, Line, LineFitter, row_fitters

__all__ = ["extract_observables", "series_spectra", "SeriesInfo"]

#: default half-width of the k = 0 window of extract_observables, per angle-like dim
_K0_HALF_WIDTH = {"angle": 1.0, "k": 0.15}
#: the per-spectrum variables of the result, all profiles
_SERIES_VARS = ("intensity", "intensity_error", "peak_energy", "peak_energy_error", "linewidth",
                "linewidth_error", "amplitude", "amplitude_error", "area", "area_error",
                "background", "snr", "reduced_chi2")


@dataclass
class SeriesInfo:
    """What :func:`series_spectra` selected: the source, dims, attrs and angle columns."""

    path: str | None  # the cube's source
    sdim: str  # the series dim, ``power`` or ``point``
    attrs: dict  # the cube's attrs updated by the intensity's
    n_avg: int = 1  # number of angle columns averaged per spectrum
    columns: list[float] | None = None  # their coordinates
    adim: str | None = None  # the angle-like dim averaged over, if any
    window: list[float] | None = None  # the angle window used, [low, high]


def _intensity_of(cube):
    """The intensity array of a cube, the attrs that apply to it and the cube's source."""
    if isinstance(cube, xr.Dataset):
        path = inputs.source_of(cube)
        if "intensity" in cube.data_vars:
            da = cube["intensity"]
        else:
            cands = [v for v in cube.data_vars if "energy" in cube[v].dims]
            if len(cands) != 1:
                raise DataError(
                    f"expected a variable 'intensity' with an 'energy' dim, found variables "
                    f"{list(cube.data_vars)}", path=path, field="intensity")
            da = cube[cands[0]]
        attrs = {**cube.attrs, **da.attrs}
    elif isinstance(cube, xr.DataArray):
        da, attrs, path = cube, dict(cube.attrs), inputs.source_of(cube)
    else:
        raise DataError(f"expected an xarray Dataset or DataArray, found {type(cube).__name__}")
    return da, attrs, path


def series_spectra(cube, energy_window, angle_window):
    """The (series, energy) spectra to fit, and a :class:`SeriesInfo` of what was selected.

    With an angle-like dim the spectra are the mean over the columns in ``angle_window``
    (default: around k = 0).
    """
    da, attrs, path = _intensity_of(cube)
    sdims = [d for d in da.dims if d in inputs.SERIES_DIMS]
    adims = [d for d in da.dims if d in inputs.ANGLE_DIMS]
    extra = [d for d in da.dims if d not in (*inputs.SERIES_DIMS, *inputs.ANGLE_DIMS, "energy")]
    if len(sdims) != 1 or "energy" not in da.dims or len(adims) > 1 or extra:
        raise DataError(
            f"expected dims (power or point, energy[, angle or k]), found {tuple(da.dims)}",
            path=path, field="intensity")
    sdim = sdims[0]
    inputs.check_energy(da, path)
    inputs.check_values(da.assign_attrs(attrs), path, "intensity")
    da = inputs.select_window(da, "energy", energy_window, path, "energy_window",
                              inputs.MIN_ENERGIES)
    if da.sizes["energy"] < inputs.MIN_ENERGIES:
        raise DataError(f"expected at least {inputs.MIN_ENERGIES} energies, found "
                        f"{da.sizes['energy']}", path=path, field="energy")
    info = SeriesInfo(path=path, sdim=sdim, attrs=attrs)
    if adims:
        da = _average_columns(da, adims[0], angle_window, path, info)
    da = da.transpose(sdim, "energy")
    return da, info


def _average_columns(da: xr.DataArray, adim: str, angle_window, path, info: SeriesInfo):
    """Mean over the angle columns in ``angle_window`` (default: around k = 0); notes in info."""
    a = np.asarray(da[adim].values, dtype=float)
    win = inputs.parse_window(angle_window, "angle_window")
    if win is None:
        half = _K0_HALF_WIDTH[adim]
        nearest = float(a[np.argmin(np.abs(a))])
        half = max(half, abs(nearest))
        win = (-half, half)
    keep = np.flatnonzero((a >= win[0]) & (a <= win[1]))
    if keep.size == 0:
        raise DataError(
            f"expected at least one '{adim}' column inside angle_window={list(win)}, found "
            f"none (the data span {a.min():.4g} to {a.max():.4g}); widen angle_window",
            path=path, field=adim)
    sel = da.isel({adim: keep})
    info.n_avg, info.columns = int(keep.size), [float(v) for v in a[keep]]
    info.adim, info.window = adim, [float(win[0]), float(win[1])]
    return sel.mean(adim, skipna=True, keep_attrs=True)



def extract_observables(
    cube: xr.Dataset | xr.DataArray,
    *,
    energy_window: tuple[float, float] | None = None,
    angle_window: tuple[float, float] | None = None,
    profile: str = "lorentzian",
    min_snr: float = 5.0,
    rng: int | np.random.Generator | None = None,
) -> xr.Dataset:
    """Integrated intensity, peak energy and linewidth of the main line of each spectrum.

    Parameters
    ----------
    cube
        Spectra cube: a Dataset with ``intensity`` (or a DataArray) on dims
        (``power`` or ``point``, ``energy`` [eV][, ``angle`` or ``k``]).  With an angle-like
        dim the spectra are averaged over a window around k = 0: by default the columns with
        |angle| <= 1 degree (|k| <= 0.15 1/um), always including the column nearest 0.
        ``gain``/``read_noise`` attrs switch to counting-statistics weights for counts.
    energy_window
        ``(low, high)`` in eV: the window of the fit and of the integration.
    angle_window
        ``(low, high)`` in the units of the angle-like dim, replacing the k = 0 window.
    profile
        ``"lorentzian"`` or ``"voigt"``.
    min_snr
        Smallest fitted height over noise for the peak energy and linewidth to be reported.
    rng
        Seed or Generator for jittered restarts of stalled fits (default seed 0).

    Returns
    -------
    xarray.Dataset
        On the series dim, with ``power`` and ``sweep`` kept as coordinates when present:
        ``intensity`` and ``intensity_error`` [signal units summed over the window's pixels,
        after subtracting the fitted constant background; the error is from counting
        statistics (or the residual scatter) including the background's uncertainty and its
        correlation with the sum]; ``peak_energy``, ``peak_energy_error`` [eV]; ``linewidth``,
        ``linewidth_error`` [meV, FWHM]; ``amplitude``, ``area``, ``background``, ``snr``,
        ``found`` (int 0/1), ``reduced_chi2``; for Voigt ``fwhm_lorentzian`` and
        ``sigma_gaussian`` [meV].  Peak energy and linewidth are NaN where ``found`` is 0.

    Raises
    ------
    DataError
        For a malformed cube or an empty window.
    ConfigError
        For an unknown ``profile`` or malformed windows.
    """
    inputs.check_choice(profile, inputs.PROFILES, "profile")
    inputs.check_min_snr(min_snr)
    gen = inputs.as_rng(rng)
    da, info = series_spectra(cube, energy_window, angle_window)
    attrs, path = info.attrs, info.path
    kind = str(attrs.get("kind", "emission"))
    sign = -1.0 if kind == "reflectance" else 1.0
    noise = noise_from_attrs(attrs, kind, path, n_avg=info.n_avg)
    e_ref, fitters = row_fitters(da, profile=profile, sign=sign, noise=noise, rng=gen)
    n = len(fitters)
    names = list(_SERIES_VARS)
    if profile == "voigt":
        names += ["fwhm_lorentzian", "sigma_gaussian"]
    out = {k: np.full(n, np.nan) for k in names}
    found = np.zeros(n, dtype=np.int8)
    previous = None
    for i, f in enumerate(fitters):
        if f is None:
            continue
        good, fit, line = _fit_main_line(f, previous, e_ref, min_snr)
        _store_series_point(out, i, f, fit, line, good, sign, profile)
        found[i] = int(good)
        if good:
            previous = line_params(f, line)
    return _assemble_series(cube, da, info, out, found, profile, noise, kind, min_snr, rng)


def _fit_main_line(f: LineFitter, previous, e_ref: float, min_snr: float):
    """Fit one line to the spectrum of ``f``: whether it passes, the fit and the line.

    Starts from the most prominent maximum, then from the previous spectrum's line
    (``previous``, or None); the first start whose line passes wins, else the smallest misfit.
    """
    sign = f.sign
    b0 = baseline_seed(f)
    cands = detect(f, sign * (f.y - b0), 0.0)
    starts = []
    if cands:
        c = max(cands, key=lambda c: c.height)
        starts.append(seed_line(f, c.centre, c.width, c.height))
    if previous is not None:
        starts.append(previous)
    if not starts:  # a flat spectrum: start at the brightest smoothed pixel
        j = int(np.argmax(sign * gaussian_filter1d(f.y, SMOOTH_PX)))
        starts.append(seed_line(f, f.x[j], 5 * f.step, max(sign * (f.y[j] - b0), 0)))
    best = None
    for q in starts:
        fit = f.fit(b0, [q], [(f.x[0], f.x[-1])])
        (line,) = f.lines(fit, e_ref)
        good = line.ok and line.snr >= min_snr and line.fwhm < 0.999 * f.span
        if best is None or (good, -fit.rss) > best[0]:
            best = ((good, -fit.rss), fit, line)
        if good:
            break
    (good, _), fit, line = best
    return good, fit, line


def _store_series_point(out, i, f: LineFitter, fit: Fit, line: Line, good, sign, profile):
    n_px = f.y.size
    ones = np.ones(n_px)
    var_px = f.pixel_variance(fit, fit.model)
    _, jac = f.model_jac(fit.p)
    cov_sum_p = fit.cov @ (jac.T @ ones)  # Cov(sum y, p) of the linearised estimator
    intensity = float(np.sum(f.y) - n_px * fit.p[0])
    var_i = float(np.sum(var_px) + n_px**2 * fit.cov[0, 0] - 2 * n_px * cov_sum_p[0])
    out["intensity"][i] = sign * intensity
    out["intensity_error"][i] = math.sqrt(var_i) if var_i >= 0 else np.nan
    out["background"][i] = fit.p[0]
    out["reduced_chi2"][i] = fit.chi2_red
    out["snr"][i] = line.snr
    out["amplitude"][i], out["amplitude_error"][i] = line.amplitude, line.amplitude_error
    out["area"][i], out["area_error"][i] = line.area, line.area_error
    if good:
        out["peak_energy"][i], out["peak_energy_error"][i] = line.energy, line.energy_error
        out["linewidth"][i], out["linewidth_error"][i] = line.fwhm, line.fwhm_error
        if profile == "voigt":
            out["fwhm_lorentzian"][i], out["sigma_gaussian"][i] = line.shape


def _assemble_series(cube, da, info: SeriesInfo, out, found, profile, noise, kind, min_snr,
                     rng) -> xr.Dataset:
    sdim = info.sdim
    units = str(info.attrs.get("units", "counts"))
    meta = {
        "intensity": (units, "background-subtracted signal summed over the energy window"),
        "intensity_error": (units, "standard error of intensity"),
        "peak_energy": ("eV", "centre of the main line"),
        "peak_energy_error": ("eV", "standard error of peak_energy"),
        "linewidth": ("meV", "FWHM of the main line"),
        "linewidth_error": ("meV", "standard error of linewidth"),
        "amplitude": (units, "peak height of the main line"),
        "amplitude_error": (units, "standard error of amplitude"),
        "area": (f"{units} meV", "line area"), "area_error": (f"{units} meV", "error of area"),
        "background": (units, "constant background per pixel"),
        "snr": ("1", "amplitude over the noise of the mean of the pixels within one FWHM, at "
                "most amplitude over its standard error"),
        "reduced_chi2": ("1", "chi-square per degree of freedom (NaN when the noise was "
                         "learnt from the residuals)"),
        "fwhm_lorentzian": ("meV", "FWHM of the Lorentzian part"),
        "sigma_gaussian": ("meV", "standard deviation of the Gaussian part"),
    }
    coords = {name: c.variable.copy() for name, c in da.coords.items()
              if c.dims == (sdim,) or name == sdim}
    if isinstance(cube, xr.Dataset):
        for name, var in cube.data_vars.items():  # e.g. sweep stored as a variable
            if var.dims == (sdim,) and name not in coords and name not in out:
                coords[name] = var.variable.copy()
    ds = xr.Dataset(coords=coords)
    for name, arr in out.items():
        ds[name] = (sdim, arr, {"units": meta[name][0], "long_name": meta[name][1]})
    ds["found"] = (sdim, found, {"long_name": f"1 where snr >= {min_snr:g}"})
    ds.attrs.update({
        "profile": profile, "kind": kind, "source": info.path or "",
        "noise_model": noise.describe(), "min_snr": float(min_snr),
        "energy_window": [float(da["energy"].values[0]), float(da["energy"].values[-1])],
    })
    if info.adim is not None:
        ds.attrs["angle_dim"] = info.adim
        ds.attrs["angle_window"] = info.window
        ds.attrs["angle_columns"] = info.columns
    inputs.record_seed(ds.attrs, rng)
    return ds


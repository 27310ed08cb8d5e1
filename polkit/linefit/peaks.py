"""Peak table of a map: 1 to 3 lines fitted per angle, each branch followed across angles.

The fit starts at the angle where the most lines stand out and walks outwards to both ends,
seeding each angle from its neighbour (:class:`_Track` extrapolates the centres) and picking
up a branch from the fit residual when it appears.  The table seeds a dispersion fit.
"""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from polkit.errors import ConfigError, DataError, DataWarning
from polkit.linefit import inputs
from polkit.linefit.detection import (
    baseline_seed,
    detect,
    fit_lines,
    line_params,
    seed_line,
    seed_width,
)
from polkit.linefit.noise import Noise, noise_from_attrs
from polkit.linefit.spectrum import Fit, Line, LineFitter, row_fitters

__all__ = ["peak_table"]

logger = logging.getLogger(__name__)

#: names of the per-line variables of the table, copied from the fitted lines
_LINE_VARS = ("energy", "energy_error", "fwhm", "fwhm_error", "amplitude", "amplitude_error",
              "area", "area_error")
#: the extra variables of a Voigt table: the two widths and their errors
_VOIGT_VARS = ("fwhm_lorentzian", "fwhm_lorentzian_error", "sigma_gaussian",
               "sigma_gaussian_error")


def _prepare_map(map_: xr.DataArray, angle_window, energy_window):
    """The checked map as (angle-like, energy), inside the windows; its angle dim and source."""
    path = inputs.source_of(map_) if isinstance(map_, xr.DataArray) else None
    if not isinstance(map_, xr.DataArray):
        raise DataError(f"expected an xarray.DataArray map, found {type(map_).__name__}; "
                        "load it with polkit.data.load_map")
    adims = [d for d in map_.dims if d in inputs.ANGLE_DIMS]
    if map_.ndim != 2 or "energy" not in map_.dims or len(adims) != 1:
        raise DataError(
            f"expected dims (angle or k, energy), found {tuple(map_.dims)}; a map has one "
            "angle-like dim ('angle' in degree or 'k' in 1/um) and 'energy' in eV",
            path=path, field="dims")
    adim = adims[0]
    inputs.check_energy(map_, path)
    inputs.check_values(map_, path, map_.name or "signal")
    a = np.asarray(map_[adim].values, dtype=float) if adim in map_.coords else None
    if a is None or not np.all(np.isfinite(a)) or np.unique(a).size != a.size:
        raise DataError(f"expected a finite '{adim}' coordinate without repeats", path=path,
                        field=adim)
    da = map_.transpose(adim, "energy").sortby(adim)
    da = inputs.select_window(da, "energy", energy_window, path, "energy_window",
                              inputs.MIN_ENERGIES)
    da = inputs.select_window(da, adim, angle_window, path, "angle_window", 1)
    if da.sizes["energy"] < inputs.MIN_ENERGIES:
        raise DataError(f"expected at least {inputs.MIN_ENERGIES} energies, found "
                        f"{da.sizes['energy']}", path=path, field="energy")
    return da, adim, path


@dataclass
class _Track:
    found: dict[int, Line] = field(default_factory=dict)
    tried: dict[int, float] = field(default_factory=dict)
    history: list = field(default_factory=list)  # (angle, params) found in the current sweep

    def predict(self, fitter: LineFitter, angle: float, step: float):
        if not self.history:
            return None
        a1, q1 = self.history[-1]
        q = q1.copy()
        if len(self.history) >= 2:
            a0, q0 = self.history[-2]
            if abs(a1 - a0) <= 3.5 * step and abs(angle - a1) <= 3.5 * step:
                shift = (q1[0] - q0[0]) / (a1 - a0) * (angle - a1)
                width = seed_width(fitter, q1)
                q[0] = q1[0] + float(np.clip(shift, -2 * width, 2 * width))
        return q


@dataclass(frozen=True)
class _TableOptions:
    """The options of :func:`peak_table`, as given."""

    n_peaks: int
    profile: str
    angle_window: tuple[float, float] | None
    energy_window: tuple[float, float] | None
    min_snr: float
    rng: int | np.random.Generator | None

    def check(self) -> None:
        inputs.check_choice(self.profile, inputs.PROFILES, "profile")
        if isinstance(self.n_peaks, bool) or self.n_peaks not in (1, 2, 3):
            raise ConfigError(f"expected 1, 2 or 3, found {self.n_peaks!r}", key="n_peaks")
        inputs.check_min_snr(self.min_snr)


@dataclass
class _Sweep:
    """The spectra of one map (a fitter and its detected maxima per angle) and the branches."""

    angles: np.ndarray
    fitters: list  # LineFitter per angle, None where too few pixels are finite
    cands: list  # detected Candidate maxima per angle
    e_ref: float  # eV; the fitters' energies are meV from it
    n_peaks: int
    min_snr: float
    step: float  # median step between angles
    tracks: list[_Track] = field(default_factory=list)
    per_angle: dict[int, Fit] = field(default_factory=dict)


def peak_table(
    map: xr.DataArray,
    *,
    n_peaks: int = 2,
    profile: str = "lorentzian",
    angle_window: tuple[float, float] | None = None,
    energy_window: tuple[float, float] | None = None,
    min_snr: float = 5.0,
    rng: int | np.random.Generator | None = None,
) -> xr.Dataset:
    """Fit 1 to 3 lines per angle of a map and follow each branch across angles.

    The fit starts at the angle where the most lines stand out (found with
    :func:`scipy.signal.find_peaks` on a lightly smoothed copy, by prominence) and walks
    outwards to both ends.  Each angle is seeded from the lines of its neighbour (with a
    linear extrapolation of the centres) and snapped to a detected maximum nearby when there is
    one, so a branch is followed where it is weak or merges into a shoulder.  A branch not
    seen at the starting angle is picked up from the fit residual when it appears.

    Parameters
    ----------
    map
        Canonical map, dims (``angle`` [degree] or ``k`` [1/um], ``energy`` [eV, ascending]).
        ``attrs["kind"] == "reflectance"`` fits dips below a baseline; ``attrs["gain"]``
        (and ``read_noise``) switch to counting-statistics weights when the signal is in
        counts.  NaN pixels are skipped when ``attrs["masked"] == 1``.
    n_peaks
        Largest number of lines (branches) per angle, 1 to 3.
    profile
        ``"lorentzian"`` or ``"voigt"`` (Lorentzian convolved with a Gaussian).
    angle_window, energy_window
        Optional ``(low, high)`` ranges in the units of the angle-like dim and in eV.
    min_snr
        Smallest fitted height over noise (see :mod:`polkit.linefit`) for a line to count as found.
    rng
        Seed or :class:`numpy.random.Generator` for the jittered restarts tried when a fit
        stalls (default: seed 0, so results are reproducible).

    Returns
    -------
    xarray.Dataset
        Dims (angle-like, ``peak``), peaks ordered by energy (0 = lowest branch).  Variables
        ``energy`` and ``energy_error`` [eV], ``fwhm`` and ``fwhm_error`` [meV],
        ``amplitude`` (height, or depth of a dip) and ``amplitude_error`` [signal units],
        ``area`` and ``area_error`` [signal units x meV], ``snr`` (of the last attempt; NaN if
        never tried), ``found`` (int 0/1); for Voigt also ``fwhm_lorentzian`` and
        ``sigma_gaussian`` [meV] with errors; per angle ``background`` [signal units] and
        ``reduced_chi2``.  Values are NaN where a line is not found.  Attrs record the
        profile, source, kind, noise model and options.

    Raises
    ------
    DataError
        For a malformed map, or when no line is found at any angle ("no branch visible").
    ConfigError
        For an unknown ``profile``, ``n_peaks`` outside 1-3, or malformed windows.

    Warns
    -----
    DataWarning
        When ``n_peaks >= 2`` but at most one line is found at every angle: the coupling
        strength and the detuning are then degenerate in a dispersion fit.
    """
    opts = _TableOptions(n_peaks, profile, angle_window, energy_window, min_snr, rng)
    opts.check()
    gen = inputs.as_rng(rng)
    da, adim, path = _prepare_map(map, angle_window, energy_window)
    kind = str(da.attrs.get("kind", "emission"))
    sign = -1.0 if kind == "reflectance" else 1.0
    noise = noise_from_attrs(da.attrs, kind, path)
    sw = _sweep_of(da, adim, opts, sign, noise, gen)
    ref = _start_tracks(sw)
    if ref is None:
        energy = np.asarray(da["energy"].values, dtype=float)
        raise DataError(
            f"no branch visible: no line reaches snr >= {min_snr:g} (height over the noise of "
            f"the mean over one linewidth) at any of the {sw.angles.size} angles; check the "
            f"energy_window (now {energy[0]:.4f}-{energy[-1]:.4f} eV) and the kind attribute "
            "(reflectance dips vs emission peaks), or lower the detection threshold "
            "(polkit dispersion --min-snr, or min_snr= in Python)",
            path=path, field=da.name or "signal")
    _follow_tracks(sw, ref)
    return _assemble_table(da, adim, sw, opts, kind, noise, path)


def _sweep_of(da: xr.DataArray, adim: str, opts: _TableOptions, sign: float, noise: Noise,
              gen: np.random.Generator) -> _Sweep:
    """A fitter and the detected maxima for every angle of the map with enough pixels."""
    angles = np.asarray(da[adim].values, dtype=float)
    step = float(np.median(np.diff(angles))) if angles.size > 1 else 1.0
    e_ref, fitters = row_fitters(da, profile=opts.profile, sign=sign, noise=noise, rng=gen)
    cands = [[] if f is None else detect(f, sign * (f.y - baseline_seed(f)), opts.min_snr)
             for f in fitters]
    return _Sweep(angles, fitters, cands, e_ref, opts.n_peaks, opts.min_snr, step)


def _start_tracks(sw: _Sweep) -> int | None:
    """Fit the angle where the most lines stand out and start a track per line found there.

    Tries the five most promising angles; returns the index of the first with a line found,
    or None.
    """
    cands, n_peaks = sw.cands, sw.n_peaks

    def promise(i):  # most lines (up to n_peaks) first, then the largest summed significance
        return (-min(len(cands[i]), n_peaks),
                -sum(sorted(c.significance for c in cands[i])[-n_peaks:]))

    order = sorted(range(sw.angles.size), key=promise)
    for i in order[:5]:
        if not cands[i]:
            break
        f = sw.fitters[i]
        best = sorted(cands[i], key=lambda c: -c.significance)[:n_peaks]
        best.sort(key=lambda c: c.centre)
        seeds = [seed_line(f, c.centre, c.width, c.height) for c in best]
        fit, lines, _ = fit_lines(f, seeds, baseline_seed(f), sw.e_ref, sw.min_snr)
        if lines:
            sw.per_angle[i] = fit
            for line in sorted(lines.values(), key=lambda ln: ln.energy):
                sw.tracks.append(_Track(found={i: line}, tried={i: line.snr}))
            return i
    return None


def _follow_tracks(sw: _Sweep, ref: int) -> None:
    """Walk from the starting angle ``ref`` to both ends, fitting every angle on the way."""
    n_ang = sw.angles.size
    for direction in (range(ref + 1, n_ang), range(ref - 1, -1, -1)):
        for t in sw.tracks:
            t.history = [(sw.angles[ref], line_params(sw.fitters[ref], t.found[ref]))] \
                if ref in t.found else []
        for i in direction:
            if sw.fitters[i] is None:
                continue
            _fit_angle(sw, i)


def _fit_angle(sw: _Sweep, i: int) -> None:
    """Fit angle ``i`` from the tracks' predictions, snapped to the detected maxima nearby."""
    f, angle, cands = sw.fitters[i], sw.angles[i], sw.cands[i]
    tracks, per_angle = sw.tracks, sw.per_angle
    live = [(t, t.predict(f, angle, sw.step)) for t in tracks]
    live = [(t, q) for t, q in live if q is not None]
    live.sort(key=lambda tq: tq[1][0])
    claimed = set()
    snapped = []
    for t, q in live:  # snap each prediction to the nearest unclaimed detected maximum
        width = seed_width(f, q)
        near = [(abs(c.centre - q[0]), j) for j, c in enumerate(cands)
                if j not in claimed and abs(c.centre - q[0]) <= max(width, 3 * f.step)]
        q = q.copy()
        if near:
            j = min(near)[1]
            claimed.add(j)
            q[0] = cands[j].centre
        snapped.append((t, q))
    live = sorted(snapped, key=lambda tq: tq[1][0])
    seeds = [q for _, q in live]
    b0 = float(per_angle[min(per_angle, key=lambda a: abs(a - i))].p[0])
    fit, lines, tried = fit_lines(f, seeds, b0, sw.e_ref, sw.min_snr) if seeds else \
        (f.fit(b0, [], []), {}, {})
    # branches do not cross: the found lines go to their tracks in energy order
    by_energy = sorted(lines.values(), key=lambda ln: ln.center_meV)
    for j, line in zip(sorted(lines), by_energy, strict=True):
        t = live[j][0]
        t.found[i] = line
        t.history.append((angle, line_params(f, line)))
    for j, snr in tried.items():
        live[j][0].tried[i] = snr
    dormant = [t for t in tracks if not t.history]
    if len(tracks) < sw.n_peaks or dormant:
        fit = _pick_up_branch(sw, i, fit, lines, dormant)
    per_angle[i] = fit


def _pick_up_branch(sw: _Sweep, i: int, fit: Fit, lines: dict[int, Line], dormant) -> Fit:
    """Look in the residual for a line not yet followed; start (or wake) a track with it."""
    f, angle, tracks = sw.fitters[i], sw.angles[i], sw.tracks
    resid = f.sign * (f.y - fit.model)
    known = [(ln.center_meV, ln.fwhm) for ln in lines.values()]
    cands = [c for c in detect(f, resid, sw.min_snr)
             if all(abs(c.centre - c0) > w0 for c0, w0 in known)]
    if not cands:
        return fit
    new = max(cands, key=lambda c: c.significance)
    seeds = [line_params(f, ln) for ln in lines.values()]
    seeds.append(seed_line(f, new.centre, new.width, new.height))
    fit2, lines2, _ = fit_lines(f, seeds, float(fit.p[0]), sw.e_ref, sw.min_snr)
    n_old = len(lines)
    if len(lines2) != n_old + 1 or n_old not in lines2:
        return fit
    line = lines2[n_old]
    if dormant:
        track = min(dormant, key=lambda t: abs(np.nanmedian(
            [ln.center_meV for ln in t.found.values()]) - line.center_meV))
    else:
        track = _Track()
        tracks.append(track)
    old_tracks = [t for t in tracks if i in t.found and t is not track]
    for t in old_tracks:  # refresh the lines that were refitted together with the new one
        match = min(range(n_old), key=lambda j: abs(lines2[j].center_meV
                                                    - t.found[i].center_meV))
        t.found[i] = lines2[match]
        t.history[-1] = (angle, line_params(f, lines2[match]))
    track.found[i] = line
    track.tried[i] = line.snr
    track.history.append((angle, line_params(f, line)))
    return fit2


# --------------------------------------------------------------------------------------------
# the table
# --------------------------------------------------------------------------------------------
def _table_meta(signal_units: str) -> dict[str, tuple[str, str]]:
    """Units and long name of every per-line variable of the table."""
    return {
        "energy": ("eV", "line centre"), "energy_error": ("eV", "standard error of the centre"),
        "fwhm": ("meV", "full width at half maximum"),
        "fwhm_error": ("meV", "standard error of the FWHM"),
        "amplitude": (signal_units, "peak height (or dip depth) above the background"),
        "amplitude_error": (signal_units, "standard error of the amplitude"),
        "area": (f"{signal_units} meV", "integrated line area"),
        "area_error": (f"{signal_units} meV", "standard error of the area"),
        "snr": ("1", "amplitude over the noise of the mean of the pixels within one FWHM, at "
                "most amplitude over its standard error"),
        "fwhm_lorentzian": ("meV", "FWHM of the Lorentzian part"),
        "fwhm_lorentzian_error": ("meV", "standard error of fwhm_lorentzian"),
        "sigma_gaussian": ("meV", "standard deviation of the Gaussian part"),
        "sigma_gaussian_error": ("meV", "standard error of sigma_gaussian"),
    }


def _line_arrays(tracks: list[_Track], n_ang: int, n_peaks: int, profile: str):
    """The (angle, peak) arrays of the line variables and the found flags, one slot a track."""
    arrays = {n: np.full((n_ang, n_peaks), np.nan) for n in [*_LINE_VARS, "snr"]}
    if profile == "voigt":
        for n in _VOIGT_VARS:
            arrays[n] = np.full((n_ang, n_peaks), np.nan)
    found = np.zeros((n_ang, n_peaks), dtype=np.int8)
    for s, t in enumerate(tracks):
        for i, snr in t.tried.items():
            arrays["snr"][i, s] = snr
        for i, line in t.found.items():
            found[i, s] = 1
            for n in _LINE_VARS:
                arrays[n][i, s] = getattr(line, n)
            if profile == "voigt":
                arrays["fwhm_lorentzian"][i, s], arrays["sigma_gaussian"][i, s] = line.shape
                (arrays["fwhm_lorentzian_error"][i, s],
                 arrays["sigma_gaussian_error"][i, s]) = line.shape_error
    return arrays, found


def _assemble_table(da: xr.DataArray, adim: str, sw: _Sweep, opts: _TableOptions, kind: str,
                    noise: Noise, path) -> xr.Dataset:
    n_ang, n_peaks = da.sizes[adim], opts.n_peaks
    tracks = sorted(sw.tracks, key=lambda t: float(np.median([ln.energy for ln in
                                                              t.found.values()])))[:n_peaks]
    arrays, found = _line_arrays(tracks, n_ang, n_peaks, opts.profile)
    background = np.full(n_ang, np.nan)
    chi2 = np.full(n_ang, np.nan)
    for i, fit in sw.per_angle.items():
        background[i] = fit.p[0]
        chi2[i] = fit.chi2_red
    n_found = found.sum(axis=1)
    if n_peaks >= 2 and n_found.max() <= 1:
        warnings.warn(
            f"{path or 'map'}: at most one line found at every angle (n_peaks={n_peaks}); "
            "the coupling strength and the detuning are degenerate from this table -- look for "
            "the second branch (longer exposure, other kind, wider energy_window)",
            DataWarning, stacklevel=2)
    signal_units = str(da.attrs.get("units", "arbitrary"))
    meta = _table_meta(signal_units)
    coords = {adim: da[adim].copy(), "peak": ("peak", np.arange(n_peaks),
                                              {"long_name": "line index, 0 = lowest energy"})}
    ds = xr.Dataset(coords=coords)
    for n, arr in arrays.items():
        ds[n] = ((adim, "peak"), arr, {"units": meta[n][0], "long_name": meta[n][1]})
    ds["found"] = ((adim, "peak"), found, {"long_name": f"1 where snr >= {opts.min_snr:g}"})
    ds["background"] = (adim, background, {"units": signal_units,
                                           "long_name": "constant background"})
    ds["reduced_chi2"] = (adim, chi2, {"units": "1", "long_name": "chi-square per degree of "
                                       "freedom of the fit at this angle (NaN when the noise "
                                       "was learnt from the residuals)"})
    ds.attrs.update({
        "profile": opts.profile, "kind": kind, "source": path or "", "n_peaks": int(n_peaks),
        "min_snr": float(opts.min_snr), "noise_model": noise.describe(),
        "signal_units": signal_units,
    })
    if opts.angle_window is not None:
        ds.attrs["angle_window"] = [float(v) for v in opts.angle_window]
    if opts.energy_window is not None:
        ds.attrs["energy_window"] = [float(v) for v in opts.energy_window]
    inputs.record_seed(ds.attrs, opts.rng)
    logger.info("peak table: %d angles, lines found per slot %s", n_ang,
                found.sum(axis=0).tolist())
    return ds

"""Line fitting of single spectra: per-angle peak tables of maps and observables of power series.

Two entry points turn canonical data into numbers with errors:

* :func:`peak_table` fits 1 to 3 lines per angle (or k) column of a map and follows each
  polariton branch from angle to angle.  The result seeds a dispersion fit.
* :func:`extract_observables` reduces a spectra cube of a power series to the integrated
  intensity, peak energy and linewidth of its main line per spectrum, at k = 0 by default.

Every spectrum is fitted by :func:`scipy.optimize.least_squares` with a constant background
plus Lorentzian or Voigt lines (:mod:`polkit.models.lineshapes`).  Internally energies are in
meV from a reference energy, which keeps the problem well scaled.

Noise model.  When the data are in raw counts and carry ``gain`` (electrons per count) and
optionally ``read_noise`` (counts) in their attrs (a Jacobian-scaled map, ``counts nm/eV``, is
treated as without them: its noise is learnt), the variance of a pixel is
``counts / gain + read_noise**2`` (CCD counting statistics), evaluated first on a smoothed copy
of the data and then on the fitted model (one reweighting step); the reported errors come from
the weighted Jacobian without rescaling and ``reduced_chi2`` tells how well the model and the
noise model agree.  Without ``gain`` (and always for reflectance, a ratio) the noise is learnt
from the data: a first fit with equal weights, then a pixel variance ``a + b * level`` fitted
to the squared residuals by non-negative least squares (shot noise makes bright pixels scatter
more), a reweighted fit, and the covariance from the Jacobian scaled by the residual variance.

Detection.  A line counts as found when its signal-to-noise ratio ``snr`` reaches ``min_snr``.
The test pools the pixels a line covers: ``snr`` is the fitted peak height (or dip depth) over
the noise standard deviation of the mean of the pixels within one FWHM of the centre, i.e. the
height over the single-pixel noise at the centre times ``sqrt(n)``, ``n = FWHM / pixel step``
clipped to 1..9 (averaging n pixels divides the noise by sqrt(n); the cap keeps broad background
bumps from passing as lines), and at most the height over its own standard error from the fit
(which counts the freedom of the centre, width and background).  A faint line spread
over many pixels (a few counts per pixel) is thus found, where a single-pixel test would refuse
it.  Candidate maxima are found on a copy smoothed by a Gaussian of 1.5 pixels, judged against
the noise of that smoothed copy.  Fits that fail the test are repeated without the weakest line,
so the reported lines are never distorted by a spurious one.
# common practice, no published source
"""

from __future__ import annotations

import logging
import math
import warnings
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
import xarray as xr
from scipy.ndimage import gaussian_filter1d
from scipy.optimize import least_squares, nnls
from scipy.signal import find_peaks, peak_widths
from scipy.special import voigt_profile, wofz

from polkit.errors import ConfigError, DataError, DataWarning
from polkit.models.lineshapes import FWHM_PER_SIGMA, lorentzian, voigt, voigt_fwhm

__all__ = ["peak_table", "extract_observables", "plot_peak_table", "plot_extraction"]

logger = logging.getLogger(__name__)

_PROFILES = ("lorentzian", "voigt")
_ANGLE_DIMS = ("angle", "k")
_SERIES_DIMS = ("power", "point")
_SMOOTH_PX = 1.5  # Gaussian smoothing (pixels) used only to find starting guesses
#: at most this many pixels are pooled in the detection test (a broad bump of background
#: or a wide spurious line gains no more than a factor 3; common practice, no published source)
_POOL_MAX_PX = 9.0
#: noise sd of the smoothed copy over the single-pixel noise: sqrt(sum of kernel^2)
_SMOOTH_NOISE = 1.0 / math.sqrt(2.0 * math.sqrt(math.pi) * _SMOOTH_PX)
_MIN_ENERGIES = 20
_SQRT_PI = math.sqrt(math.pi)
_SQRT_2PI = math.sqrt(2.0 * math.pi)
#: default half-width of the k = 0 window of extract_observables, per angle-like dim
_K0_HALF_WIDTH = {"angle": 1.0, "k": 0.15}


# --------------------------------------------------------------------------------------------
# input checks
# --------------------------------------------------------------------------------------------
def _source(obj) -> str | None:
    src = obj.attrs.get("source") if hasattr(obj, "attrs") else None
    return str(src) if src not in (None, "") else None


def _check_choice(value, allowed, key):
    if value not in allowed:
        raise ConfigError(
            f"expected one of {', '.join(repr(a) for a in allowed)}, found {value!r}", key=key
        )


def _as_rng(rng) -> np.random.Generator:
    if isinstance(rng, np.random.Generator):
        return rng
    if rng is None:
        return np.random.default_rng(0)
    if isinstance(rng, (int, np.integer, np.random.SeedSequence)):
        return np.random.default_rng(rng)
    raise ConfigError(
        f"expected None, an integer seed or a numpy.random.Generator, found {type(rng).__name__}",
        key="rng",
    )


def _window(value, key) -> tuple[float, float] | None:
    if value is None:
        return None
    try:
        lo, hi = (float(v) for v in value)
    except (TypeError, ValueError):
        raise ConfigError(
            f"expected a pair (low, high) of numbers, found {value!r}", key=key
        ) from None
    if not (math.isfinite(lo) and math.isfinite(hi) and lo < hi):
        raise ConfigError(f"expected finite low < high, found ({lo}, {hi})", key=key)
    return lo, hi


def _check_energy(da: xr.DataArray, path) -> None:
    if "energy" not in da.coords:
        raise DataError("expected an 'energy' coordinate in eV, found none", path=path,
                        field="energy")
    units = da["energy"].attrs.get("units")
    if units is not None and str(units) != "eV":
        raise DataError(
            f"expected energy in 'eV', found units {units!r}; load the data through "
            "polkit.data, which converts the energy axis to eV", path=path, field="energy")
    e = np.asarray(da["energy"].values, dtype=float)
    if e.size < 2 or not np.all(np.isfinite(e)) or np.any(np.diff(e) <= 0):
        raise DataError(
            "expected a finite, strictly ascending energy axis; sort the map by energy and "
            "drop duplicate energies", path=path, field="energy")


def _check_values(da: xr.DataArray, path, name: str) -> None:
    values = np.asarray(da.values)
    if not np.issubdtype(values.dtype, np.number):
        raise DataError(f"expected numbers, found dtype {values.dtype}", path=path, field=name)
    if not np.all(np.isfinite(values)):
        masked = int(da.attrs.get("masked", 0) or 0) == 1
        if not masked or np.any(np.isinf(values)):
            n_bad = int(np.sum(~np.isfinite(values)))
            raise DataError(
                f"expected finite values, found {n_bad} NaN/Inf pixels; clean them, or mark "
                "pixels to ignore as NaN and set attrs['masked'] = 1", path=path, field=name)


def _select(da: xr.DataArray, dim: str, window, path, key: str, minimum: int) -> xr.DataArray:
    if window is None:
        return da
    coord = da[dim].values
    keep = (coord >= window[0]) & (coord <= window[1])
    if int(keep.sum()) < minimum:
        raise DataError(
            f"expected at least {minimum} points of '{dim}' inside {key}={list(window)}, "
            f"found {int(keep.sum())} (the data span {coord.min():.6g} to {coord.max():.6g}); "
            f"widen {key}", path=path, field=dim)
    return da.isel({dim: np.flatnonzero(keep)})


@dataclass(frozen=True)
class _Noise:
    """Pixel variance (level / gain + read_noise**2) / n_avg, or unknown (``gain is None``)."""

    gain: float | None = None
    read_noise: float = 0.0
    n_avg: int = 1

    @property
    def known(self) -> bool:
        return self.gain is not None

    def variance(self, level: np.ndarray) -> np.ndarray:
        floor = max(self.read_noise**2, 1.0 / self.gain**2)  # at least one electron
        var = np.maximum(np.asarray(level, dtype=float), 0.0) / self.gain + self.read_noise**2
        return np.maximum(var, floor) / self.n_avg

    def describe(self) -> str:
        if not self.known:
            return ("learnt from the residuals: variance = a + b * level, covariance scaled "
                    "by the residual variance")
        return (f"counting statistics: variance = counts/gain + read_noise^2 with gain "
                f"{self.gain:g} e-/count, read_noise {self.read_noise:g} counts, "
                f"averaged over {self.n_avg} column(s)")


_COUNT_UNITS = ("counts", "count", "adu")


def _noise_from_attrs(attrs, kind: str, path, n_avg: int = 1) -> _Noise:
    if kind == "reflectance" or attrs.get("gain") is None:
        return _Noise()
    units = str(attrs.get("units", "counts")).strip().lower()
    if units not in _COUNT_UNITS:
        # e.g. counts rescaled to a density per energy: counting statistics no longer apply
        logger.info("%s: gain ignored, the signal is in %r rather than counts; the noise is "
                    "learnt from the residuals", path or "data", attrs.get("units"))
        return _Noise()
    fields = {}
    for name, default in (("gain", None), ("read_noise", 0.0)):
        raw = attrs.get(name, default)
        try:
            value = float(raw)
        except (TypeError, ValueError):
            value = float("nan")
        ok = value > 0 if name == "gain" else value >= 0
        if not (math.isfinite(value) and ok):
            need = "a positive number (electrons per count)" if name == "gain" else \
                "a number >= 0 (counts)"
            raise DataError(f"expected {need}, found {raw!r}; fix or remove the attribute",
                            path=path, field=name)
        fields[name] = value
    return _Noise(fields["gain"], fields["read_noise"], n_avg)


# --------------------------------------------------------------------------------------------
# one spectrum
# --------------------------------------------------------------------------------------------
@dataclass
class _Fit:
    p: np.ndarray  # [background, per line: centre, width(s), area], meV and signal units
    cov: np.ndarray
    chi2_red: float  # against the known noise model; NaN when the noise was learnt
    model: np.ndarray
    rss: float  # plain sum of squared residuals, to compare fits of one spectrum
    var_coef: tuple[float, float] = (0.0, 0.0)  # unknown noise: variance = a + b * level
    floor: float = 0.0  # smallest pixel variance of the fitted variance model


@dataclass
class _Line:
    """Fitted line in output units (energy in eV, widths in meV)."""

    energy: float
    energy_error: float
    fwhm: float
    fwhm_error: float
    amplitude: float
    amplitude_error: float
    area: float
    area_error: float
    snr: float
    shape: tuple  # internal shape parameters (widths) in meV
    shape_error: tuple
    center_meV: float = field(default=float("nan"))

    @property
    def ok(self) -> bool:
        return bool(np.isfinite(self.energy_error) and np.isfinite(self.fwhm_error))


class _LineFitter:
    """Constant background plus K lines (sign +1 peaks, -1 dips) fitted to one spectrum."""

    def __init__(self, x, y, *, profile: str, sign: float, noise: _Noise, rng):
        order = np.argsort(x)
        self.x = np.asarray(x, dtype=float)[order]
        self.y = np.asarray(y, dtype=float)[order]
        self.profile = profile
        self.npp = 3 if profile == "lorentzian" else 4
        self.sign = float(sign)
        self.noise = noise
        self.rng = rng
        self.step = float(np.median(np.diff(self.x)))
        self.span = float(self.x[-1] - self.x[0])

    # -- line shapes and their derivatives ------------------------------------------------
    def _shape(self, q: np.ndarray, x: np.ndarray):
        """Unit-area profiles (K, N) and derivatives (K, npp-1, N) w.r.t. centre and widths."""
        u = x[None, :] - q[:, 0:1]
        if self.profile == "lorentzian":
            h = 0.5 * q[:, 1:2]
            d = u * u + h * h
            phi = h / (np.pi * d)
            dc = 2.0 * u * h / (np.pi * d * d)
            dw = 0.5 * (u * u - h * h) / (np.pi * d * d)
            return phi, np.stack([dc, dw], axis=1)
        gamma = 0.5 * q[:, 1:2]
        sigma = q[:, 2:3]
        z = (u + 1j * gamma) / (sigma * math.sqrt(2.0))
        w = wofz(z)
        dw_dz = -2.0 * z * w + 2j / _SQRT_PI
        phi = w.real / (sigma * _SQRT_2PI)
        dc = -dw_dz.real / (2.0 * _SQRT_PI * sigma**2)
        dwl = -0.5 * dw_dz.imag / (2.0 * _SQRT_PI * sigma**2)
        dsg = -phi / sigma - (z * dw_dz).real / (sigma**2 * _SQRT_2PI)
        return phi, np.stack([dc, dwl, dsg], axis=1)

    def model_jac(self, p: np.ndarray, x: np.ndarray | None = None):
        x = self.x if x is None else x
        q = p[1:].reshape(-1, self.npp)
        jac = np.empty((x.size, p.size))
        jac[:, 0] = 1.0
        model = np.full(x.size, p[0])
        if q.shape[0]:
            phi, dphi = self._shape(q, x)
            area = q[:, -1]
            model = model + self.sign * (area[:, None] * phi).sum(axis=0)
            for k in range(q.shape[0]):
                base = 1 + k * self.npp
                jac[:, base:base + self.npp - 1] = (self.sign * area[k] * dphi[k]).T
                jac[:, base + self.npp - 1] = self.sign * phi[k]
        return model, jac

    # -- fitting ---------------------------------------------------------------------------
    def bounds(self, centre_ranges):
        lo, hi = [-np.inf], [np.inf]
        for c_lo, c_hi in centre_ranges:
            lo.append(max(c_lo, self.x[0]))
            hi.append(min(c_hi, self.x[-1]))
            if self.profile == "lorentzian":
                lo.append(self.step)
                hi.append(self.span)
            else:
                lo += [0.0, 0.25 * self.step]
                hi += [self.span, self.span]
            lo.append(0.0)
            hi.append(np.inf)
        return np.array(lo), np.array(hi)

    def _solve(self, x0, lo, hi, sigma, restarts: int):
        def residual(p):
            return (self.model_jac(p)[0] - self.y) / sigma

        def jacobian(p):
            return self.model_jac(p)[1] / sigma[:, None]

        finite_lo, finite_hi = np.isfinite(lo), np.isfinite(hi)
        inner_lo = np.where(finite_lo, lo + 1e-9 * (1 + np.abs(np.where(finite_lo, lo, 0))), lo)
        inner_hi = np.where(finite_hi, hi - 1e-9 * (1 + np.abs(np.where(finite_hi, hi, 0))), hi)

        def run(start):
            start = np.clip(start, inner_lo, inner_hi)
            return least_squares(residual, start, jac=jacobian, bounds=(lo, hi), x_scale="jac",
                                 method="trf", max_nfev=200 * x0.size)

        best = run(x0)
        k = (x0.size - 1) // self.npp
        width_idx = [1 + j * self.npp + 1 for j in range(k)]
        for _ in range(restarts):
            pinned = any(best.x[i] >= hi[i] * (1 - 1e-6) for i in width_idx)
            if best.success and not pinned:
                break
            trial = best.x.copy() if best.success else x0.copy()
            for j in range(k):
                base = 1 + j * self.npp
                trial[base] += self.rng.normal(0.0, 0.3) * trial[base + 1]
                trial[base + 1:base + self.npp] *= np.exp(self.rng.normal(0.0, 0.3, self.npp - 1))
            other = run(trial)
            if other.cost < best.cost:
                best = other
        return best.x

    def fit(self, b0: float, lines0: Sequence[np.ndarray], centre_ranges, *, restarts=2) -> _Fit:
        x0 = np.concatenate([[b0], *[np.asarray(q, dtype=float) for q in lines0]])
        lo, hi = self.bounds(centre_ranges)
        if self.noise.known:
            smooth = gaussian_filter1d(self.y, _SMOOTH_PX, mode="nearest")
            sigma = np.sqrt(self.noise.variance(smooth))
            p = self._solve(x0, lo, hi, sigma, restarts)
            sigma = np.sqrt(self.noise.variance(self.model_jac(p)[0]))
            p = self._solve(p, lo, hi, sigma, 0)
            coef, floor = (0.0, 0.0), 0.0
        else:
            sigma = np.ones_like(self.y)
            p = self._solve(x0, lo, hi, sigma, restarts)
            coef, floor = self._variance_model(p)
            if coef[1] > 0:  # the scatter grows with the level: reweight and refit
                sigma = np.sqrt(np.maximum(coef[0] + coef[1] * self._level(p), floor))
                p = self._solve(p, lo, hi, sigma, 0)
        model, jac = self.model_jac(p)
        jw = jac / sigma[:, None]
        _, s, vt = np.linalg.svd(jw, full_matrices=False)
        keep = s > np.finfo(float).eps * max(jw.shape) * s[0]
        cov = (vt[keep].T / s[keep] ** 2) @ vt[keep]
        if not keep.all():  # a parameter the data do not constrain
            bad = np.abs(vt[~keep]).max(axis=0) > 1e-6
            cov[bad, :] = np.nan
            cov[:, bad] = np.nan
        dof = max(self.y.size - p.size, 1)
        chi2_red = float(np.sum(((model - self.y) / sigma) ** 2) / dof)
        if not self.noise.known:
            cov = cov * chi2_red
            if coef[1] > 0:
                coef = (coef[0] * chi2_red, coef[1] * chi2_red)
                floor *= chi2_red
            else:
                coef, floor = (chi2_red, 0.0), 0.0
            chi2_red = float("nan")
        rss = float(np.sum((model - self.y) ** 2))
        return _Fit(p=p, cov=cov, chi2_red=chi2_red, model=model, rss=rss, var_coef=coef,
                    floor=floor)

    def _level(self, p, x=None) -> np.ndarray:
        return np.maximum(self.model_jac(p, x)[0], 0.0)

    def _variance_model(self, p) -> tuple[tuple[float, float], float]:
        """Pixel variance a + b * level from the squared residuals (non-negative least squares).

        Counts without a known gain scatter more where the signal is high (shot noise); a
        constant variance would understate the errors of bright lines.  Reflectance gives
        b close to 0 and a constant variance.
        """
        level = self._level(p)
        r2 = (self.y - self.model_jac(p)[0]) ** 2
        design = np.column_stack([np.ones_like(level), level])
        var = np.full(level.size, max(float(np.mean(r2)), np.finfo(float).tiny))
        a = b = 0.0
        for _ in range(3):  # r**2 scatters by sqrt(2) * variance: weight the rows by 1/variance
            (a, b), _ = nnls(design / var[:, None], r2 / var)
            if not (a + b * level.max() > 0):
                return (1.0, 0.0), 0.0
            floor = 0.05 * float(np.median(a + b * level))
            var = np.maximum(a + b * level, max(floor, np.finfo(float).tiny))
        return (float(a), float(b)), floor

    def pixel_variance(self, fit: _Fit, level: np.ndarray) -> np.ndarray:
        """Noise variance of the pixels at the given model level (signal units squared)."""
        if self.noise.known:
            return self.noise.variance(level)
        a, b = fit.var_coef
        return np.maximum(a + b * np.maximum(level, 0.0), fit.floor)

    def lines(self, fit: _Fit, e_ref: float) -> list[_Line]:
        out = []
        q = fit.p[1:].reshape(-1, self.npp)
        for k in range(q.shape[0]):
            base = 1 + k * self.npp
            idx = np.arange(base, base + self.npp)
            cov = fit.cov[np.ix_(idx, idx)]
            c, area = q[k, 0], q[k, -1]
            widths = q[k, 1:-1]
            phi0, dphi0 = self._shape(q[k:k + 1], np.array([c]))
            phi0, dphi0 = float(phi0[0, 0]), dphi0[0, 1:, 0]
            height = area * phi0
            g_h = np.concatenate([[0.0], area * dphi0, [phi0]])
            if self.profile == "lorentzian":
                fwhm, g_f = widths[0], np.array([0.0, 1.0, 0.0])
            else:
                fl, sg = widths
                root = math.sqrt(0.2166 * fl**2 + (FWHM_PER_SIGMA * sg) ** 2)
                fwhm = float(voigt_fwhm(fl, sg))
                g_f = np.array([0.0, 0.5346 + 0.2166 * fl / root,
                                FWHM_PER_SIGMA**2 * sg / root, 0.0])
            level = self.model_jac(fit.p, np.array([c]))[0]
            noise_sd = float(np.sqrt(self.pixel_variance(fit, level))[0])
            pooled = math.sqrt(min(max(1.0, float(fwhm) / self.step), _POOL_MAX_PX))
            snr = pooled * height / noise_sd if noise_sd > 0 else float("inf")
            h_err = _propagate(g_h, cov)  # a fitted height is no surer than its error says
            if np.isfinite(h_err) and h_err > 0:
                snr = min(snr, height / h_err)
            var = np.diag(cov)
            out.append(_Line(
                energy=e_ref + 1e-3 * c,
                energy_error=1e-3 * math.sqrt(var[0]) if var[0] >= 0 else float("nan"),
                fwhm=float(fwhm), fwhm_error=_propagate(g_f, cov),
                amplitude=float(height), amplitude_error=_propagate(g_h, cov),
                area=float(area), area_error=math.sqrt(var[-1]) if var[-1] >= 0 else np.nan,
                snr=float(snr), shape=tuple(float(v) for v in widths),
                shape_error=tuple(float(math.sqrt(v)) if v >= 0 else np.nan for v in var[1:-1]),
                center_meV=float(c),
            ))
        return out


def _propagate(grad: np.ndarray, cov: np.ndarray) -> float:
    var = float(grad @ cov @ grad)
    return math.sqrt(var) if var >= 0 else float("nan")


def _robust_sd(y: np.ndarray) -> float:
    """Noise standard deviation from the median absolute first difference (robust to lines)."""
    d = np.diff(y)
    mad = np.median(np.abs(d - np.median(d)))
    return float(1.4826 * mad / math.sqrt(2.0)) or float(np.std(d)) or 1.0


@dataclass
class _Candidate:
    centre: float  # meV
    width: float  # meV (FWHM)
    height: float  # prominence in signal units
    significance: float  # prominence / noise sd


def _detect(fitter: _LineFitter, y: np.ndarray, min_snr: float) -> list[_Candidate]:
    """Lines standing out of the smoothed spectrum ``y`` (already oriented: lines up)."""
    smooth = gaussian_filter1d(y, _SMOOTH_PX, mode="nearest")
    if fitter.noise.known:  # counts level of the spectrum itself, not of ``y``
        sd = np.sqrt(fitter.noise.variance(gaussian_filter1d(fitter.y, _SMOOTH_PX,
                                                             mode="nearest")))
    else:
        sd = np.full(y.size, _robust_sd(fitter.y))
    idx, props = find_peaks(smooth, prominence=min_snr * _SMOOTH_NOISE * sd)
    if idx.size == 0:
        return []
    widths = peak_widths(smooth, idx, rel_height=0.5)[0] * fitter.step
    prom = props["prominences"]
    return [
        _Candidate(float(fitter.x[i]), float(np.clip(w, 2 * fitter.step, fitter.span / 2)),
                   float(p), float(p / (_SMOOTH_NOISE * sd[i])))
        for i, w, p in zip(idx, widths, prom, strict=True)
    ]


def _seed_line(fitter: _LineFitter, centre: float, fwhm: float, height: float) -> np.ndarray:
    fwhm = float(np.clip(fwhm, 1.5 * fitter.step, 0.5 * fitter.span))
    height = max(height, 0.0)
    if fitter.profile == "lorentzian":
        return np.array([centre, fwhm, 0.5 * np.pi * fwhm * height])
    fl, sg = 0.5 * fwhm, 0.5 * fwhm / FWHM_PER_SIGMA
    area = height / float(voigt_profile(0.0, sg, 0.5 * fl))
    return np.array([centre, fl, sg, area])


def _baseline_seed(fitter: _LineFitter) -> float:
    return float(np.percentile(fitter.y, 10 if fitter.sign > 0 else 90))


def _centre_range(fitter: _LineFitter, centre: float, fwhm: float) -> tuple[float, float]:
    reach = max(3.0 * fwhm, 10.0 * fitter.step)
    return centre - reach, centre + reach


def _fit_lines(fitter: _LineFitter, seeds: list[np.ndarray], b0: float, e_ref: float,
               min_snr: float):
    """Fit the seeded lines; drop the worst weak or duplicate line and refit until all pass.

    Returns the final fit, the lines kept (dict seed index -> _Line) and the SNR of every
    seed's last attempt.
    """
    active = list(range(len(seeds)))
    current = {i: np.asarray(seeds[i], dtype=float) for i in active}
    tried: dict[int, float] = {}
    while True:
        ranges = [_centre_range(fitter, current[i][0], _seed_width(fitter, current[i]))
                  for i in active]
        fit = fitter.fit(b0, [current[i] for i in active], ranges)
        lines = dict(zip(active, fitter.lines(fit, e_ref), strict=True))
        for i, line in lines.items():
            tried[i] = line.snr
        bad = [i for i, line in lines.items()
               if not (line.ok and line.snr >= min_snr and line.fwhm < 0.999 * fitter.span)]
        if not bad:
            bad = _duplicates(lines, seeds)
        if not bad:
            return fit, lines, tried
        worst = min(bad, key=lambda i: lines[i].snr if np.isfinite(lines[i].snr) else -np.inf)
        active.remove(worst)
        b0 = float(fit.p[0])
        for i in active:
            current[i] = _line_params(fitter, lines[i])


def _seed_width(fitter: _LineFitter, q: np.ndarray) -> float:
    return float(q[1]) if fitter.profile == "lorentzian" else float(voigt_fwhm(q[1], q[2]))


def _line_params(fitter: _LineFitter, line: _Line) -> np.ndarray:
    return np.array([line.center_meV, *line.shape, line.area])


def _duplicates(lines: dict[int, _Line], seeds) -> list[int]:
    """Lines sitting on the same peak: keep the one whose seed was nearer, flag the other."""
    keys = sorted(lines, key=lambda i: lines[i].center_meV)
    out = []
    for a, b in zip(keys, keys[1:], strict=False):
        la, lb = lines[a], lines[b]
        if lb.center_meV - la.center_meV < 0.5 * min(la.fwhm, lb.fwhm):
            moved_a = abs(la.center_meV - seeds[a][0]) / la.fwhm
            moved_b = abs(lb.center_meV - seeds[b][0]) / lb.fwhm
            out.append(a if moved_a > moved_b else b)
    return out


# --------------------------------------------------------------------------------------------
# peak table of a map
# --------------------------------------------------------------------------------------------
def _prepare_map(map_: xr.DataArray, angle_window, energy_window):
    path = _source(map_) if isinstance(map_, xr.DataArray) else None
    if not isinstance(map_, xr.DataArray):
        raise DataError(f"expected an xarray.DataArray map, found {type(map_).__name__}; "
                        "load it with polkit.data.load_map")
    adims = [d for d in map_.dims if d in _ANGLE_DIMS]
    if map_.ndim != 2 or "energy" not in map_.dims or len(adims) != 1:
        raise DataError(
            f"expected dims (angle or k, energy), found {tuple(map_.dims)}; a map has one "
            "angle-like dim ('angle' in degree or 'k' in 1/um) and 'energy' in eV",
            path=path, field="dims")
    adim = adims[0]
    _check_energy(map_, path)
    _check_values(map_, path, map_.name or "signal")
    a = np.asarray(map_[adim].values, dtype=float) if adim in map_.coords else None
    if a is None or not np.all(np.isfinite(a)) or np.unique(a).size != a.size:
        raise DataError(f"expected a finite '{adim}' coordinate without repeats", path=path,
                        field=adim)
    da = map_.transpose(adim, "energy").sortby(adim)
    da = _select(da, "energy", _window(energy_window, "energy_window"), path, "energy_window",
                 _MIN_ENERGIES)
    da = _select(da, adim, _window(angle_window, "angle_window"), path, "angle_window", 1)
    if da.sizes["energy"] < _MIN_ENERGIES:
        raise DataError(f"expected at least {_MIN_ENERGIES} energies, found "
                        f"{da.sizes['energy']}", path=path, field="energy")
    return da, adim, path


@dataclass
class _Track:
    found: dict[int, _Line] = field(default_factory=dict)
    tried: dict[int, float] = field(default_factory=dict)
    history: list = field(default_factory=list)  # (angle, params) found in the current sweep

    def predict(self, fitter: _LineFitter, angle: float, step: float):
        if not self.history:
            return None
        a1, q1 = self.history[-1]
        q = q1.copy()
        if len(self.history) >= 2:
            a0, q0 = self.history[-2]
            if abs(a1 - a0) <= 3.5 * step and abs(angle - a1) <= 3.5 * step:
                shift = (q1[0] - q0[0]) / (a1 - a0) * (angle - a1)
                width = _seed_width(fitter, q1)
                q[0] = q1[0] + float(np.clip(shift, -2 * width, 2 * width))
        return q


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
        Smallest fitted height over noise (see the module notes) for a line to count as found.
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
    _check_choice(profile, _PROFILES, "profile")
    if isinstance(n_peaks, bool) or n_peaks not in (1, 2, 3):
        raise ConfigError(f"expected 1, 2 or 3, found {n_peaks!r}", key="n_peaks")
    if not (isinstance(min_snr, (int, float)) and math.isfinite(min_snr) and min_snr > 0):
        raise ConfigError(f"expected a positive number, found {min_snr!r}", key="min_snr")
    gen = _as_rng(rng)
    da, adim, path = _prepare_map(map, angle_window, energy_window)
    kind = str(da.attrs.get("kind", "emission"))
    sign = -1.0 if kind == "reflectance" else 1.0
    noise = _noise_from_attrs(da.attrs, kind, path)
    angles = np.asarray(da[adim].values, dtype=float)
    energy = np.asarray(da["energy"].values, dtype=float)
    e_ref = 0.5 * (energy[0] + energy[-1])
    x_all = 1e3 * (energy - e_ref)
    values = np.asarray(da.values, dtype=float)
    n_ang = angles.size
    step = float(np.median(np.diff(angles))) if n_ang > 1 else 1.0

    fitters, cands = [], []
    for i in range(n_ang):
        ok = np.isfinite(values[i])
        if ok.sum() < _MIN_ENERGIES:
            fitters.append(None)
            cands.append([])
            continue
        f = _LineFitter(x_all[ok], values[i, ok], profile=profile, sign=sign, noise=noise,
                        rng=gen)
        fitters.append(f)
        cands.append(_detect(f, sign * (f.y - _baseline_seed(f)), min_snr))

    tracks: list[_Track] = []
    per_angle: dict[int, _Fit] = {}
    order = sorted(range(n_ang), key=lambda i: (-min(len(cands[i]), n_peaks),
                                                -sum(sorted(c.significance for c in cands[i])
                                                     [-n_peaks:])))
    ref = None
    for i in order[:5]:
        if not cands[i]:
            break
        f = fitters[i]
        best = sorted(cands[i], key=lambda c: -c.significance)[:n_peaks]
        best.sort(key=lambda c: c.centre)
        seeds = [_seed_line(f, c.centre, c.width, c.height) for c in best]
        fit, lines, _ = _fit_lines(f, seeds, _baseline_seed(f), e_ref, min_snr)
        if lines:
            ref = i
            per_angle[i] = fit
            for line in sorted(lines.values(), key=lambda ln: ln.energy):
                tracks.append(_Track(found={i: line}, tried={i: line.snr}))
            break
    if ref is None:
        raise DataError(
            f"no branch visible: no line reaches snr >= {min_snr:g} (height over the noise of "
            f"the mean over one linewidth) at any of the {n_ang} angles; check the "
            f"energy_window (now {energy[0]:.4f}-{energy[-1]:.4f} eV) and the kind attribute "
            "(reflectance dips vs emission peaks), or lower the detection threshold "
            "(polkit dispersion --min-snr, or min_snr= in Python)",
            path=path, field=da.name or "signal")

    for direction in (range(ref + 1, n_ang), range(ref - 1, -1, -1)):
        for t in tracks:
            t.history = [(angles[ref], _line_params(fitters[ref], t.found[ref]))] \
                if ref in t.found else []
        for i in direction:
            if fitters[i] is None:
                continue
            _fit_angle(fitters[i], i, angles[i], cands[i], tracks, per_angle, e_ref, n_peaks,
                       min_snr, step)

    return _assemble_table(da, adim, tracks, per_angle, n_peaks, profile, noise, path, kind,
                           min_snr, angle_window, energy_window, rng)


def _fit_angle(f, i, angle, cands, tracks, per_angle, e_ref, n_peaks, min_snr, step):
    live = [(t, t.predict(f, angle, step)) for t in tracks]
    live = [(t, q) for t, q in live if q is not None]
    live.sort(key=lambda tq: tq[1][0])
    claimed = set()
    snapped = []
    for t, q in live:  # snap each prediction to the nearest unclaimed detected maximum
        width = _seed_width(f, q)
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
    fit, lines, tried = _fit_lines(f, seeds, b0, e_ref, min_snr) if seeds else \
        (f.fit(b0, [], []), {}, {})
    # branches do not cross: the found lines go to their tracks in energy order
    by_energy = sorted(lines.values(), key=lambda ln: ln.center_meV)
    for j, line in zip(sorted(lines), by_energy, strict=True):
        t = live[j][0]
        t.found[i] = line
        t.history.append((angle, _line_params(f, line)))
    for j, snr in tried.items():
        live[j][0].tried[i] = snr
    dormant = [t for t in tracks if not t.history]
    if len(tracks) < n_peaks or dormant:
        fit = _pick_up_branch(f, i, angle, fit, lines, tracks, dormant, e_ref, min_snr)
    per_angle[i] = fit


def _pick_up_branch(f, i, angle, fit, lines, tracks, dormant, e_ref, min_snr):
    """Look in the residual for a line not yet followed; start (or wake) a track with it."""
    resid = f.sign * (f.y - fit.model)
    known = [(ln.center_meV, ln.fwhm) for ln in lines.values()]
    cands = [c for c in _detect(f, resid, min_snr)
             if all(abs(c.centre - c0) > w0 for c0, w0 in known)]
    if not cands:
        return fit
    new = max(cands, key=lambda c: c.significance)
    seeds = [_line_params(f, ln) for ln in lines.values()]
    seeds.append(_seed_line(f, new.centre, new.width, new.height))
    fit2, lines2, _ = _fit_lines(f, seeds, float(fit.p[0]), e_ref, min_snr)
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
        t.history[-1] = (angle, _line_params(f, lines2[match]))
    track.found[i] = line
    track.tried[i] = line.snr
    track.history.append((angle, _line_params(f, line)))
    return fit2


def _assemble_table(da, adim, tracks, per_angle, n_peaks, profile, noise, path, kind, min_snr,
                    angle_window, energy_window, rng) -> xr.Dataset:
    n_ang = da.sizes[adim]
    tracks = sorted(tracks, key=lambda t: float(np.median([ln.energy for ln in
                                                           t.found.values()])))[:n_peaks]
    names = ["energy", "energy_error", "fwhm", "fwhm_error", "amplitude", "amplitude_error",
             "area", "area_error"]
    arrays = {n: np.full((n_ang, n_peaks), np.nan) for n in [*names, "snr"]}
    if profile == "voigt":
        for n in ("fwhm_lorentzian", "fwhm_lorentzian_error", "sigma_gaussian",
                  "sigma_gaussian_error"):
            arrays[n] = np.full((n_ang, n_peaks), np.nan)
    found = np.zeros((n_ang, n_peaks), dtype=np.int8)
    for s, t in enumerate(tracks):
        for i, snr in t.tried.items():
            arrays["snr"][i, s] = snr
        for i, line in t.found.items():
            found[i, s] = 1
            for n in names:
                arrays[n][i, s] = getattr(line, n)
            if profile == "voigt":
                arrays["fwhm_lorentzian"][i, s], arrays["sigma_gaussian"][i, s] = line.shape
                (arrays["fwhm_lorentzian_error"][i, s],
                 arrays["sigma_gaussian_error"][i, s]) = line.shape_error
    background = np.full(n_ang, np.nan)
    chi2 = np.full(n_ang, np.nan)
    for i, fit in per_angle.items():
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
    meta = {
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
    coords = {adim: da[adim].copy(), "peak": ("peak", np.arange(n_peaks),
                                              {"long_name": "line index, 0 = lowest energy"})}
    ds = xr.Dataset(coords=coords)
    for n, arr in arrays.items():
        ds[n] = ((adim, "peak"), arr, {"units": meta[n][0], "long_name": meta[n][1]})
    ds["found"] = ((adim, "peak"), found, {"long_name": f"1 where snr >= {min_snr:g}"})
    ds["background"] = (adim, background, {"units": signal_units,
                                           "long_name": "constant background"})
    ds["reduced_chi2"] = (adim, chi2, {"units": "1", "long_name": "chi-square per degree of "
                                       "freedom of the fit at this angle (NaN when the noise "
                                       "was learnt from the residuals)"})
    ds.attrs.update({
        "profile": profile, "kind": kind, "source": path or "", "n_peaks": int(n_peaks),
        "min_snr": float(min_snr), "noise_model": noise.describe(),
        "signal_units": signal_units,
    })
    if angle_window is not None:
        ds.attrs["angle_window"] = [float(v) for v in angle_window]
    if energy_window is not None:
        ds.attrs["energy_window"] = [float(v) for v in energy_window]
    if isinstance(rng, (int, np.integer)) or rng is None:
        ds.attrs["seed"] = int(0 if rng is None else rng)
    logger.info("peak table: %d angles, lines found per slot %s", n_ang,
                found.sum(axis=0).tolist())
    return ds


# --------------------------------------------------------------------------------------------
# power series
# --------------------------------------------------------------------------------------------
def _series_spectra(cube, energy_window, angle_window):
    """The (series, energy) spectra to fit, with the column selection and metadata."""
    if isinstance(cube, xr.Dataset):
        path = _source(cube)
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
        da, attrs, path = cube, dict(cube.attrs), _source(cube)
    else:
        raise DataError(f"expected an xarray Dataset or DataArray, found {type(cube).__name__}")
    sdims = [d for d in da.dims if d in _SERIES_DIMS]
    adims = [d for d in da.dims if d in _ANGLE_DIMS]
    extra = [d for d in da.dims if d not in (*_SERIES_DIMS, *_ANGLE_DIMS, "energy")]
    if len(sdims) != 1 or "energy" not in da.dims or len(adims) > 1 or extra:
        raise DataError(
            f"expected dims (power or point, energy[, angle or k]), found {tuple(da.dims)}",
            path=path, field="intensity")
    sdim = sdims[0]
    _check_energy(da, path)
    _check_values(da.assign_attrs(attrs), path, "intensity")
    da = _select(da, "energy", _window(energy_window, "energy_window"), path, "energy_window",
                 _MIN_ENERGIES)
    if da.sizes["energy"] < _MIN_ENERGIES:
        raise DataError(f"expected at least {_MIN_ENERGIES} energies, found "
                        f"{da.sizes['energy']}", path=path, field="energy")
    info = {"path": path, "sdim": sdim, "attrs": attrs, "n_avg": 1, "columns": None,
            "adim": None}
    if adims:
        adim = adims[0]
        a = np.asarray(da[adim].values, dtype=float)
        win = _window(angle_window, "angle_window")
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
        info.update(n_avg=int(keep.size), columns=[float(v) for v in a[keep]], adim=adim,
                    window=[float(win[0]), float(win[1])])
        da = sel.mean(adim, skipna=True, keep_attrs=True)
    da = da.transpose(sdim, "energy")
    return da, info


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
    _check_choice(profile, _PROFILES, "profile")
    if not (isinstance(min_snr, (int, float)) and math.isfinite(min_snr) and min_snr > 0):
        raise ConfigError(f"expected a positive number, found {min_snr!r}", key="min_snr")
    gen = _as_rng(rng)
    da, info = _series_spectra(cube, energy_window, angle_window)
    attrs, path, sdim = info["attrs"], info["path"], info["sdim"]
    kind = str(attrs.get("kind", "emission"))
    sign = -1.0 if kind == "reflectance" else 1.0
    noise = _noise_from_attrs(attrs, kind, path, n_avg=info["n_avg"])
    energy = np.asarray(da["energy"].values, dtype=float)
    e_ref = 0.5 * (energy[0] + energy[-1])
    x_all = 1e3 * (energy - e_ref)
    values = np.asarray(da.values, dtype=float)
    n = values.shape[0]
    names = ["intensity", "intensity_error", "peak_energy", "peak_energy_error", "linewidth",
             "linewidth_error", "amplitude", "amplitude_error", "area", "area_error",
             "background", "snr", "reduced_chi2"]
    if profile == "voigt":
        names += ["fwhm_lorentzian", "sigma_gaussian"]
    out = {k: np.full(n, np.nan) for k in names}
    found = np.zeros(n, dtype=np.int8)
    previous = None
    for i in range(n):
        ok = np.isfinite(values[i])
        if ok.sum() < _MIN_ENERGIES:
            continue
        f = _LineFitter(x_all[ok], values[i, ok], profile=profile, sign=sign, noise=noise,
                        rng=gen)
        b0 = _baseline_seed(f)
        cands = _detect(f, sign * (f.y - b0), 0.0)
        starts = []
        if cands:
            c = max(cands, key=lambda c: c.height)
            starts.append(_seed_line(f, c.centre, c.width, c.height))
        if previous is not None:
            starts.append(previous)
        if not starts:  # a flat spectrum: start at the brightest smoothed pixel
            j = int(np.argmax(sign * gaussian_filter1d(f.y, _SMOOTH_PX)))
            starts.append(_seed_line(f, f.x[j], 5 * f.step, max(sign * (f.y[j] - b0), 0)))
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
        _store_series_point(out, i, f, fit, line, good, sign, profile)
        found[i] = int(good)
        if good:
            previous = _line_params(f, line)
    return _assemble_series(cube, da, info, out, found, profile, noise, kind, min_snr, sdim,
                            rng)


def _store_series_point(out, i, f: _LineFitter, fit: _Fit, line: _Line, good, sign, profile):
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


def _assemble_series(cube, da, info, out, found, profile, noise, kind, min_snr, sdim,
                     rng) -> xr.Dataset:
    units = str(info["attrs"].get("units", "counts"))
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
        "profile": profile, "kind": kind, "source": info["path"] or "",
        "noise_model": noise.describe(), "min_snr": float(min_snr),
        "energy_window": [float(da["energy"].values[0]), float(da["energy"].values[-1])],
    })
    if info["adim"] is not None:
        ds.attrs["angle_dim"] = info["adim"]
        ds.attrs["angle_window"] = info["window"]
        ds.attrs["angle_columns"] = info["columns"]
    if isinstance(rng, (int, np.integer)) or rng is None:
        ds.attrs["seed"] = int(0 if rng is None else rng)
    return ds


# --------------------------------------------------------------------------------------------
# plots
# --------------------------------------------------------------------------------------------
def _line_model(energy: np.ndarray, background, lines, profile: str, sign: float):
    """Background plus lines (energy eV, centre eV, widths meV, area signal x meV)."""
    x = 1e3 * np.asarray(energy, dtype=float)
    model = np.full(x.size, float(background))
    for centre, fwhm, fwhm_l, sigma_g, area in lines:
        if profile == "voigt":
            model += sign * voigt(x, 1e3 * centre, fwhm_l, sigma_g, area)
        else:
            model += sign * lorentzian(x, 1e3 * centre, fwhm, area)
    return model


def _table_lines(table: xr.Dataset, i: int, adim: str):
    rows = []
    sel = table.isel({adim: i})
    for s in range(table.sizes["peak"]):
        if int(sel["found"].values[s]):
            fl = float(sel["fwhm_lorentzian"].values[s]) if "fwhm_lorentzian" in sel else 0.0
            sg = float(sel["sigma_gaussian"].values[s]) if "sigma_gaussian" in sel else 0.0
            rows.append((float(sel["energy"].values[s]), float(sel["fwhm"].values[s]), fl, sg,
                         float(sel["area"].values[s])))
    return rows


def _figure(n_panels: int, width: float = 5.0):
    # a bare Figure draws with Agg whatever pyplot's backend is, and never opens a window
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width * n_panels, 4.0), layout="constrained")
    return fig, [fig.add_subplot(1, n_panels, k + 1) for k in range(n_panels)]


def plot_peak_table(map: xr.DataArray, table: xr.Dataset, ax=None, *,
                    n_examples: int = 3):
    """Draw the map with the fitted line centres (error bars) and a few fitted spectra.

    Parameters
    ----------
    map
        The map given to :func:`peak_table`.
    table
        Its result.
    ax
        A matplotlib Axes for the map panel alone; by default a new figure with the map and
        ``n_examples`` example spectra (data and fitted lines, offset for clarity).
    n_examples
        Number of example spectra in the second panel.

    Returns
    -------
    matplotlib.figure.Figure
        The figure drawn on (not shown; save it with :func:`polkit.files.save_figure`).
    """
    adim = next(d for d in table.dims if d in _ANGLE_DIMS)
    da = map.transpose(adim, "energy").sortby(adim)
    if ax is None:
        fig, (ax_map, ax_spec) = _figure(2)
    else:
        fig, ax_map, ax_spec = ax.figure, ax, None
    a = da[adim].values
    ax_map.pcolormesh(a, da["energy"].values, da.values.T, shading="auto", cmap="viridis")
    for s in range(table.sizes["peak"]):
        ok = table["found"].values[:, s] == 1
        ax_map.errorbar(table[adim].values[ok], table["energy"].values[ok, s],
                        yerr=table["energy_error"].values[ok, s], fmt="o", ms=2.5, lw=0.8,
                        capsize=0, color=f"C{s + 1}", label=f"line {s}")
    a_units = da[adim].attrs.get("units", "degree" if adim == "angle" else "1/um")
    ax_map.set_xlabel(f"{adim} [{a_units}]")
    ax_map.set_ylabel("energy [eV]")
    ax_map.set_title(f"peak table ({table.attrs.get('profile', '')})")
    ax_map.legend(loc="upper right", fontsize="small")
    if ax_spec is not None:
        sign = -1.0 if table.attrs.get("kind") == "reflectance" else 1.0
        with_lines = np.flatnonzero(table["found"].values.sum(axis=1) > 0)
        picks = with_lines[np.linspace(0, with_lines.size - 1, min(n_examples,
                                                                   with_lines.size)).astype(int)]
        e = da["energy"].values
        offset = 0.0
        for i in picks:
            angle = float(table[adim].values[i])
            y = da.sel({adim: angle}).values
            model = _line_model(e, float(table["background"].values[i]),
                                _table_lines(table, i, adim), table.attrs.get("profile"), sign)
            ax_spec.plot(e, y + offset, ".", ms=2, color="0.4")
            ax_spec.plot(e, model + offset, "-", lw=1.2, label=f"{adim} = {angle:.3g}")
            offset += 1.1 * float(np.nanmax(y) - np.nanmin(y))
        ax_spec.set_xlabel("energy [eV]")
        ax_spec.set_ylabel(f"signal [{da.attrs.get('units', 'arb.')}] (offset)")
        ax_spec.legend(fontsize="small")
    return fig


def plot_extraction(cube: xr.Dataset | xr.DataArray, obs: xr.Dataset, *,
                    n_examples: int = 4):
    """Draw peak energy and intensity against power, and a few spectra with their fits.

    Parameters
    ----------
    cube
        The cube given to :func:`extract_observables`.
    obs
        Its result.
    n_examples
        Number of example spectra (spread over the series) in the third panel.

    Returns
    -------
    matplotlib.figure.Figure
        Three panels: peak energy [eV] with errors, intensity (log-log) with errors, spectra.
    """
    window = obs.attrs.get("angle_window")
    da, _ = _series_spectra(cube, obs.attrs.get("energy_window"), window)
    sdim = next(d for d in obs.dims if d in _SERIES_DIMS)
    power = obs["power"].values if "power" in obs.coords else np.arange(obs.sizes[sdim])
    p_units = obs["power"].attrs.get("units", "mW") if "power" in obs.coords else "index"
    fig, (ax_e, ax_i, ax_s) = _figure(3, 4.2)
    groups = [("all", np.ones(power.size, bool))]
    groups_label = np.full(power.size, "", dtype=object)
    if "sweep" in obs.coords or "sweep" in obs:
        groups_label = np.asarray(obs["sweep"].values).astype(str)
        groups = [(g, groups_label == g) for g in np.unique(groups_label)]
    for k, (label, m) in enumerate(groups):
        ok = m & (obs["found"].values == 1)
        ax_e.errorbar(power[ok], obs["peak_energy"].values[ok],
                      yerr=obs["peak_energy_error"].values[ok], fmt="o-", ms=3, lw=0.8,
                      color=f"C{k}", label=label)
        pos = m & (obs["intensity"].values > 0)
        ax_i.errorbar(power[pos], obs["intensity"].values[pos],
                      yerr=obs["intensity_error"].values[pos], fmt="o-", ms=3, lw=0.8,
                      color=f"C{k}", label=label)
    ax_e.set_xlabel(f"power [{p_units}]")
    ax_e.set_ylabel("peak energy [eV]")
    ax_i.set_xlabel(f"power [{p_units}]")
    ax_i.set_ylabel(f"intensity [{obs['intensity'].attrs.get('units', '')}]")
    if np.any(obs["intensity"].values > 0) and np.all(power > 0):
        ax_i.set_xscale("log")
        ax_i.set_yscale("log")
    ax_e.legend(fontsize="small")
    profile = obs.attrs.get("profile", "lorentzian")
    sign = -1.0 if obs.attrs.get("kind") == "reflectance" else 1.0
    e = da["energy"].values
    picks = np.unique(np.linspace(0, power.size - 1, min(n_examples, power.size)).astype(int))
    for i in picks:
        y = da.values[i]
        scale = float(np.nanmax(np.abs(y))) or 1.0
        lines = []
        if int(obs["found"].values[i]):
            fl = float(obs["fwhm_lorentzian"].values[i]) if "fwhm_lorentzian" in obs else 0.0
            sg = float(obs["sigma_gaussian"].values[i]) if "sigma_gaussian" in obs else 0.0
            lines = [(float(obs["peak_energy"].values[i]), float(obs["linewidth"].values[i]),
                      fl, sg, float(obs["area"].values[i]))]
        model = _line_model(e, float(obs["background"].values[i]), lines, profile, sign)
        ax_s.plot(e, y / scale, ".", ms=2, color="0.4")
        label = f"{power[i]:.3g} {p_units}"
        if len(groups) > 1:
            label += f" ({groups_label[i]})"
        ax_s.plot(e, model / scale, "-", lw=1.2, label=label)
    ax_s.set_xlabel("energy [eV]")
    ax_s.set_ylabel("signal / max")
    ax_s.legend(fontsize="small")
    return fig

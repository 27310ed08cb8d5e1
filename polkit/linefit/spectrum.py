"""Fitting one spectrum: a constant background plus K Lorentzian or Voigt lines.

:class:`LineFitter` holds one spectrum (energies in meV from a reference energy, which keeps
the problem well scaled) and fits it by :func:`scipy.optimize.least_squares` with analytic
derivatives, weighted by the noise model of :mod:`polkit.linefit.noise`; :class:`Fit` is the
result in internal units and :class:`Line` one fitted line in output units.
"""

from __future__ import annotations

import math
from collections.abc import Sequence
from dataclasses import dataclass, field

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.optimize import least_squares, nnls
from scipy.special import wofz

from polkit.linefit.inputs import MIN_ENERGIES
from polkit.linefit.noise import Noise
from polkit.models.lineshapes import FWHM_PER_SIGMA, voigt_fwhm

__all__ = ["SMOOTH_PX", "Fit", "Line", "LineFitter", "row_fitters"]

SMOOTH_PX = 1.5  # Gaussian smoothing (pixels) used only to find starting guesses
#: at most this many pixels are pooled in the detection test (a broad bump of background
#: or a wide spurious line gains no more than a factor 3; common practice, no published source)
_POOL_MAX_PX = 9.0
_SQRT_PI = math.sqrt(math.pi)
_SQRT_2PI = math.sqrt(2.0 * math.pi)


@dataclass
class Fit:
    p: np.ndarray  # [background, per line: centre, width(s), area], meV and signal units
    cov: np.ndarray
    chi2_red: float  # against the known noise model; NaN when the noise was learnt
    model: np.ndarray
    rss: float  # plain sum of squared residuals, to compare fits of one spectrum
    var_coef: tuple[float, float] = (0.0, 0.0)  # unknown noise: variance = a + b * level
    floor: float = 0.0  # smallest pixel variance of the fitted variance model


@dataclass
class Line:
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


class LineFitter:
    """Constant background plus K lines (sign +1 peaks, -1 dips) fitted to one spectrum."""

    def __init__(self, x, y, *, profile: str, sign: float, noise: Noise, rng):
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

    def fit(self, b0: float, lines0: Sequence[np.ndarray], centre_ranges, *, restarts=2) -> Fit:
        x0 = np.concatenate([[b0], *[np.asarray(q, dtype=float) for q in lines0]])
        lo, hi = self.bounds(centre_ranges)
        if self.noise.known:
            smooth = gaussian_filter1d(self.y, SMOOTH_PX, mode="nearest")
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
        return Fit(p=p, cov=cov, chi2_red=chi2_red, model=model, rss=rss, var_coef=coef,
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

    def pixel_variance(self, fit: Fit, level: np.ndarray) -> np.ndarray:
        """Noise variance of the pixels at the given model level (signal units squared)."""
        if self.noise.known:
            return self.noise.variance(level)
        a, b = fit.var_coef
        return np.maximum(a + b * np.maximum(level, 0.0), fit.floor)

    def lines(self, fit: Fit, e_ref: float) -> list[Line]:
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
            out.append(Line(
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



def row_fitters(da, *, profile: str, sign: float, noise: Noise,
                rng: np.random.Generator) -> tuple[float, list[LineFitter | None]]:
    """A fitter for each row of a (row, energy) array, over the row's finite pixels.

    Returns the reference energy [eV] of the fitters' meV axis and the fitters, None for a
    row with fewer than :data:`~polkit.linefit.inputs.MIN_ENERGIES` finite pixels.
    """
    energy = np.asarray(da["energy"].values, dtype=float)
    e_ref = 0.5 * (energy[0] + energy[-1])
    x_all = 1e3 * (energy - e_ref)
    values = np.asarray(da.values, dtype=float)
    fitters = []
    for i in range(values.shape[0]):
        ok = np.isfinite(values[i])
        if ok.sum() < MIN_ENERGIES:
            fitters.append(None)
            continue
        fitters.append(LineFitter(x_all[ok], values[i, ok], profile=profile, sign=sign,
                                  noise=noise, rng=rng))
    return e_ref, fitters

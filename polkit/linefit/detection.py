"""Finding the lines of one spectrum: candidate maxima, starting values and the refit loop.

Candidate maxima are found on a copy smoothed by a Gaussian of :data:`SMOOTH_PX` pixels and
judged against the noise of that copy; :func:`fit_lines` fits the seeded lines and drops the
weakest (or a duplicate) until every line kept passes the detection test.
"""

from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.ndimage import gaussian_filter1d
from scipy.signal import find_peaks, peak_widths

from polkit.linefit.noise import robust_sd
from polkit.linefit.spectrum import SMOOTH_PX, Line, LineFitter
from polkit.models.lineshapes import FWHM_PER_SIGMA, voigt, voigt_fwhm

__all__ = ["Candidate", "detect", "seed_line", "baseline_seed", "fit_lines", "seed_width",
           "line_params"]

#: noise sd of the smoothed copy over the single-pixel noise: sqrt(sum of kernel^2)
_SMOOTH_NOISE = 1.0 / math.sqrt(2.0 * math.sqrt(math.pi) * SMOOTH_PX)


@dataclass
class Candidate:
    centre: float  # meV
    width: float  # meV (FWHM)
    height: float  # prominence in signal units
    significance: float  # prominence / noise sd


def detect(fitter: LineFitter, y: np.ndarray, min_snr: float) -> list[Candidate]:
    """Lines standing out of the smoothed spectrum ``y`` (already oriented: lines up)."""
    smooth = gaussian_filter1d(y, SMOOTH_PX, mode="nearest")
    if fitter.noise.known:  # counts level of the spectrum itself, not of ``y``
        sd = np.sqrt(fitter.noise.variance(gaussian_filter1d(fitter.y, SMOOTH_PX,
                                                             mode="nearest")))
    else:
        sd = np.full(y.size, robust_sd(fitter.y))
    idx, props = find_peaks(smooth, prominence=min_snr * _SMOOTH_NOISE * sd)
    if idx.size == 0:
        return []
    widths = peak_widths(smooth, idx, rel_height=0.5)[0] * fitter.step
    prom = props["prominences"]
    return [
        Candidate(float(fitter.x[i]), float(np.clip(w, 2 * fitter.step, fitter.span / 2)),
                   float(p), float(p / (_SMOOTH_NOISE * sd[i])))
        for i, w, p in zip(idx, widths, prom, strict=True)
    ]


def seed_line(fitter: LineFitter, centre: float, fwhm: float, height: float) -> np.ndarray:
    fwhm = float(np.clip(fwhm, 1.5 * fitter.step, 0.5 * fitter.span))
    height = max(height, 0.0)
    if fitter.profile == "lorentzian":
        return np.array([centre, fwhm, 0.5 * np.pi * fwhm * height])
    fl, sg = 0.5 * fwhm, 0.5 * fwhm / FWHM_PER_SIGMA
    area = height / float(voigt(0.0, 0.0, fl, sg))  # height of the unit-area line
    return np.array([centre, fl, sg, area])


def baseline_seed(fitter: LineFitter) -> float:
    return float(np.percentile(fitter.y, 10 if fitter.sign > 0 else 90))


def _centre_range(fitter: LineFitter, centre: float, fwhm: float) -> tuple[float, float]:
    reach = max(3.0 * fwhm, 10.0 * fitter.step)
    return centre - reach, centre + reach


def fit_lines(fitter: LineFitter, seeds: list[np.ndarray], b0: float, e_ref: float,
               min_snr: float):
    """Fit the seeded lines; drop the worst weak or duplicate line and refit until all pass.

    Returns the final fit, the lines kept (dict seed index -> Line) and the SNR of every
    seed's last attempt.
    """
    active = list(range(len(seeds)))
    current = {i: np.asarray(seeds[i], dtype=float) for i in active}
    tried: dict[int, float] = {}
    while True:
        ranges = [_centre_range(fitter, current[i][0], seed_width(fitter, current[i]))
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
            current[i] = line_params(fitter, lines[i])


def seed_width(fitter: LineFitter, q: np.ndarray) -> float:
    return float(q[1]) if fitter.profile == "lorentzian" else float(voigt_fwhm(q[1], q[2]))


def line_params(fitter: LineFitter, line: Line) -> np.ndarray:
    return np.array([line.center_meV, *line.shape, line.area])


def _duplicates(lines: dict[int, Line], seeds) -> list[int]:
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


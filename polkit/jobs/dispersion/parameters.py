"""The sampled parameters of the dispersion job: default priors and the automatic start.

Sampled parameters (units in brackets)::

    exciton_energy [eV]      cavity_energy [eV] (E_C0, normal incidence)   n_eff [1]
    rabi_splitting [meV] (2g, the full splitting at resonance)
    cavity_linewidth [meV]   exciton_linewidth [meV]   (FWHM)
    three oscillators: exciton2_energy [eV], rabi_splitting2 [meV], exciton2_linewidth [meV]
    weak coupling: no rabi_splitting (g = 0); the bare cavity mode and the bare exciton
                 line each get their own amplitude (:mod:`polkit.models.bare_modes`)
    reflectance: mirror_fraction [1] (kappa / gamma_C, kappa the top-mirror coupling in
                 r = r_bg (1 - i kappa G_CC); 0 < kappa <= gamma_C, since the top-mirror loss is
                 part of the cavity loss: kappa = gamma_C is a lossless one-sided cavity, kappa =
                 gamma_C / 2 critical coupling, and kappa > gamma_C would make |r| > 1)
    noise_scale [1]  (multiplies the noise standard deviation of the data)

:func:`default_space` gives their default priors from the data's energy range;
:func:`guess_from_peaks` the automatic starting point from a per-angle peak table.  How a
vector of them maps onto the physics is :class:`~polkit.jobs.dispersion.problem.DispersionProblem`.
"""

from __future__ import annotations

from collections.abc import Mapping

import numpy as np
import xarray as xr
from scipy import optimize

from polkit.errors import DataError, FitError
from polkit.inference.priors import Parameter, ParameterSpace, Prior
from polkit.jobs.dispersion.problem import MEV, table_arrays
from polkit.models import dispersion as disp

__all__ = ["guess_from_peaks", "default_space"]

_LONG_NAMES = {
    "exciton_energy": "exciton energy",
    "cavity_energy": "cavity energy at normal incidence",
    "n_eff": "effective refractive index of the cavity mode",
    "rabi_splitting": "Rabi splitting (2g)",
    "cavity_linewidth": "cavity linewidth (FWHM)",
    "exciton_linewidth": "exciton linewidth (FWHM)",
    "exciton2_energy": "second exciton energy",
    "rabi_splitting2": "Rabi splitting of the second exciton (2g2)",
    "exciton2_linewidth": "second exciton linewidth (FWHM)",
    "mirror_fraction": "top-mirror share of the cavity loss kappa / gamma_C",
    "noise_scale": "noise scale factor",
}


def _branch_energies_2(x, axis, ex, ec0, n, g):
    ec = disp.cavity_energy(ec0, n, **({"angle_deg": x} if axis == "angle" else {"k": x}))
    lo, up = disp.two_mode_eigenvalues(ec, ex, g)
    return np.stack([lo.real, up.real], axis=-1)


def guess_from_peaks(table: xr.Dataset, *, n_excitons: int = 1) -> dict[str, float]:
    """Automatic starting point from a peak table, by multi-start least squares.

    Fits the Hermitian branch energies (one exciton) to the peak positions, each found
    peak assigned to the nearer branch, from a grid of starting exciton energies and
    effective indices, and keeps the best.  Linewidths start from the narrowest widths
    seen.  Returns a dict of parameter values in the sampled units.
    """
    axis, x, e, de, w, dw, found = table_arrays(table)
    if not found.any():
        raise DataError(
            "no branch visible: the peak table holds no peak at any angle.",
            path=table.attrs.get("source"),
            field="peak_table",
        )
    xs = np.repeat(x[:, None], e.shape[1], axis=1)[found]
    es, ses = e[found], np.maximum(de[found], 1e-5)
    lo_e, hi_e = float(np.nanmin(es)), float(np.nanmax(es))
    span = max(hi_e - lo_e, 5e-3)
    n_found = found.sum(axis=1)
    two = n_found >= 2
    if two.any():
        both = np.where(found[two], e[two], np.nan)  # rows with two lines: never all-NaN
        gaps = np.nanmax(both, axis=1) - np.nanmin(both, axis=1)
        g0 = max(float(np.nanmin(gaps)) / 2.0, 1e-4)
    else:
        g0 = span / 4.0

    def resid(p):
        ex, ec0, n, g = p
        b = _branch_energies_2(xs, axis, ex, ec0, n, abs(g))
        r = (es[:, None] - b) / ses[:, None]
        return np.min(np.abs(r), axis=1)

    best = None
    for ex0 in np.linspace(lo_e + 0.1 * span, hi_e + 0.2 * span, 7):
        for n0 in (1.8, 2.6, 3.5):
            lp0 = float(np.nanmin(es[np.abs(xs - x[np.argmin(np.abs(x))]) <= np.ptp(x) * 0.1]))
            # E_LP(0) = (ec0 + ex)/2 - sqrt(delta^2 + 4 g^2)/2 -> solve for ec0
            d = lp0 - ex0
            ec00 = ex0 + (d * d - g0 * g0) / d if d < 0 else ex0 - span / 4
            p0 = [ex0, ec00, n0, g0]
            lb = [lo_e - span, lo_e - 2 * span, 1.0, 1e-6]
            ub = [hi_e + span, hi_e + span, 6.0, 2 * span]
            p0 = np.clip(p0, np.add(lb, 1e-9), np.subtract(ub, 1e-9))
            try:
                sol = optimize.least_squares(
                    resid, p0, bounds=(lb, ub), x_scale=[1e-3, 1e-3, 0.1, 1e-3]
                )
            except (ValueError, np.linalg.LinAlgError):
                continue
            if best is None or sol.cost < best.cost:
                best = sol
    if best is None:
        raise FitError("could not find a starting point from the peak table.")
    ex, ec0, n, g = best.x
    wmin = np.nanpercentile(np.where(found, w, np.nan), 10) if np.isfinite(w).any() else 1e-3
    guess = {
        "exciton_energy": float(ex),
        "cavity_energy": float(ec0),
        "n_eff": float(n),
        "rabi_splitting": float(2 * abs(g) / MEV),
        "cavity_linewidth": float(max(wmin, 1e-5) / MEV),
        "exciton_linewidth": float(max(wmin, 1e-5) / MEV),
    }
    if n_excitons == 2:
        guess.update(
            {
                "exciton2_energy": float(ex + max(2 * abs(g), span / 3)),
                "rabi_splitting2": float(abs(g) / MEV),
                "exciton2_linewidth": guess["exciton_linewidth"],
            }
        )
    return guess


# --------------------------------------------------------------------------------------
# parameter space
# --------------------------------------------------------------------------------------
def default_space(
    energy: np.ndarray,
    guess: Mapping[str, float],
    *,
    n_excitons: int = 1,
    kind: str = "emission",
    sample_noise: bool = True,
    coupling: str = "strong",
) -> ParameterSpace:
    """Default priors derived from the data's energy window and the starting point.

    Levels are uniform over a window that holds the data's energy range with a margin;
    the Rabi splitting is uniform up to the window width; linewidths are log-uniform
    from 1 ueV to the window width (scale-free: equal belief per decade); n_eff is
    uniform over 1.0-5.0, which covers organic, perovskite and III-V cavities.
    ``coupling="weak"`` leaves out the Rabi splitting (the uncoupled-modes model).
    # common practice, no published source
    """
    lo, hi = float(np.min(energy)), float(np.max(energy))
    span = hi - lo
    span_mev = span / MEV
    ex_lo = min(lo - 0.5 * span, guess["exciton_energy"] - 0.1 * span)
    ex_hi = max(hi + 1.0 * span, guess["exciton_energy"] + 0.1 * span)
    ec_lo = min(lo - 1.5 * span, guess["cavity_energy"] - 0.1 * span)
    ec_hi = max(hi + 0.5 * span, guess["cavity_energy"] + 0.1 * span)
    rabi_hi = max(2.0 * span_mev, 2.0 * guess["rabi_splitting"])
    width_hi = max(span_mev, 2.0 * guess["cavity_linewidth"], 2.0 * guess["exciton_linewidth"])
    params = [
        _parameter("exciton_energy", "eV", Prior.uniform(ex_lo, ex_hi)),
        _parameter("cavity_energy", "eV", Prior.uniform(ec_lo, ec_hi)),
        _parameter("n_eff", "1", Prior.uniform(1.0, 5.0)),
        _parameter("rabi_splitting", "meV", Prior.uniform(0.0, rabi_hi)),
        _parameter("cavity_linewidth", "meV", Prior.loguniform(1e-3, width_hi)),
        _parameter("exciton_linewidth", "meV", Prior.loguniform(1e-3, width_hi)),
    ]
    if coupling == "weak":
        params = [p for p in params if p.name != "rabi_splitting"]
    if n_excitons == 2:
        params += [
            _parameter("exciton2_energy", "eV", Prior.uniform(ex_lo, ex_hi + span)),
            _parameter("rabi_splitting2", "meV", Prior.uniform(0.0, rabi_hi)),
            _parameter("exciton2_linewidth", "meV", Prior.loguniform(1e-3, width_hi)),
        ]
    if kind == "reflectance":
        params.append(_parameter("mirror_fraction", "1", Prior.uniform(0.0, 1.0)))
    if sample_noise:
        params.append(_parameter("noise_scale", "1", Prior.loguniform(0.1, 30.0)))
    return ParameterSpace(params)


def _parameter(name: str, units: str, prior: Prior) -> Parameter:
    """A sampled parameter with its long name."""
    return Parameter(name, units, prior, _LONG_NAMES[name])

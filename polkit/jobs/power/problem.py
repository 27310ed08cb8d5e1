"""Fitting knowledge for the power-series job: parameters, priors, likelihoods, derived quantities.

The physics lives in :mod:`polkit.models.coherent` (coherent drive, Gross-Pitaevskii steady
state) and :mod:`polkit.models.reservoir` (nonresonant drive, reservoir rate equations); the
density calibration in :mod:`polkit.models.calibration`.  This module says which parameters
are sampled (names, units, default priors from the data ranges), how they map onto the
physics, the vectorised log-likelihoods, a starting point, and the quantities derived per
posterior draw.

Coherent drive (``model="coherent"``)
    Intensities fix the S-shaped response only up to its energy scale: with ``u = y/gamma``,
    ``d = Delta/gamma`` and ``phi = F/gamma^3`` the steady state
    ``y[(Delta - y)^2 + gamma^2/4] = F`` (Baas et al., Phys. Rev. A 69, 023809, 2004) reads
    ``u[(d - u)^2 + 1/4] = phi``, so scaling every energy by ``lambda`` (and ``F`` by
    ``lambda^3``, the intensity per meV by ``1/lambda``) leaves intensity-against-power
    unchanged.  The fit therefore samples only the identifiable combinations::

        detuning_ratio [1]              d = Delta / gamma
        reduced_drive_per_power [1/mW]  alpha kappa / gamma^3
        intensity_scale [I]             intensity per linewidth of blueshift (s gamma)

    The likelihood does not depend on the linewidth ``gamma`` itself, so its posterior is
    exactly its prior, independent of the rest: it is drawn from that prior per posterior
    draw (:func:`linewidth_prior`: a dispersion result, the calibration's polariton
    lifetime, a user prior, or a log-uniform default) and turns the ratios into meV.

    Up and down sweeps are fitted jointly: each contiguous run of one sweep label follows
    its own history through :func:`polkit.models.coherent.steady_state_sweep` (an up run
    starts on the lower branch, a down run on the upper one, as after a full loop).  The
    transmitted intensity is proportional to the mode population, ``I = s y``.

Nonresonant drive (``model="reservoir"``)
    Emission ``I = c n_C`` with ``n_C`` from :func:`polkit.models.reservoir.condensate_occupation`
    at ``x = P / P_th``; intensities are compared in log space (they span decades).  Peak
    energies add ``E = E_LP + b_C n_C + b_R n_R/n_R,th`` (Wouters and Carusotto, PRL 99, 140402,
    2007), linewidths ``w = w_high + (w_low - w_high) / (1 + n_C / n_w)``: for ``w_high = 0``,
    ``n_w = 1`` this is the mean-field net damping ``gamma_C - R n_R = gamma_C / (n_C + 1)`` of
    the same rate equations (gain narrowing); ``w_high`` and ``n_w`` let real condensates
    keep a finite width above threshold (phenomenological, no published source)::

        threshold_power [mW]  saturation_number [1]  intensity_per_occupation [I]
        lp_energy [eV]  condensate_blueshift_rate [meV/mW] (b_C n_s / P_th: slope above
        threshold)  reservoir_blueshift [meV] (b_R: the reservoir part once clamped)
        linewidth_low [meV]  linewidth_high [meV]  narrowing_occupation [1]

Noise
    Each observable has one sampled noise parameter: ``<observable>_noise_scale`` [1]
    multiplying the quoted errors, or, without an error column, an absolute noise
    (``intensity_noise`` [I], ``intensity_log_noise`` [1], ``peak_energy_noise`` [meV],
    ``linewidth_noise`` [meV]).  A mis-stated error therefore widens the intervals instead
    of narrowing them, and a model that misfits one observable down-weights only that one.

The calibrated quantities (densities, interaction constants) are in
:mod:`polkit.jobs.power.calibrated`.
"""

from __future__ import annotations

import dataclasses
import logging
import math
from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from polkit.constants import HBAR_MEV_PS
from polkit.errors import DataError, FitError
from polkit.inference.priors import Parameter, ParameterSpace, Prior
from polkit.jobs.power.channels import MIN_POINTS, Channel, channel, column, sweep_segments
from polkit.models import coherent, pump_spot, reservoir
from polkit.models.calibration import DensityCalibration

__all__ = [
    "MODELS",
    "PowerProblem",
    "linewidth_prior",
]

log = logging.getLogger(__name__)

MEV = 1e-3
#: the fits this module knows
MODELS = ("coherent", "reservoir")

_LONG = {
    "detuning_ratio": "pump detuning over polariton linewidth, Delta / gamma",
    "reduced_drive_per_power": "drive per unit power in units of gamma^3, alpha kappa / gamma^3",
    "intensity_scale": "intensity per linewidth of blueshift (s gamma)",
    "threshold_power": "condensation threshold power P_th",
    "saturation_number": "saturation number n_s = gamma_R / R",
    "intensity_per_occupation": "detected intensity per polariton in the mode",
    "lp_energy": "lower-polariton energy at vanishing pump",
    "condensate_blueshift_rate": "condensate blueshift per unit power above threshold",
    "reservoir_blueshift": "reservoir blueshift once the reservoir is clamped",
    "linewidth_low": "linewidth far below threshold (FWHM)",
    "linewidth_high": "linewidth far above threshold (FWHM)",
    "narrowing_occupation": "mode occupation at which the linewidth is half narrowed",
}


# --------------------------------------------------------------------------------------
# the problem
# --------------------------------------------------------------------------------------
@dataclass
class PowerProblem:
    """One power series and one model: data in fit space, parameters and likelihood.

    Build it with :meth:`from_series`.  ``log_likelihood(theta)`` evaluates a whole ensemble
    ``theta`` of shape ``(W, P)`` in one vectorised call.

    Attributes
    ----------
    model
        ``"coherent"`` or ``"reservoir"``.
    power
        Pump powers in mW in acquisition order, shape ``(N,)``.
    segments
        ``[(start, stop, direction)]`` runs of one sweep label.
    channels
        The observables fitted, by name.
    intensity_units
        Units of the intensity.
    e_ref
        Reference energy (eV) of the peak-energy channel (its smallest value), or None.
    space
        The parameter space (set by :meth:`default_space` or by the caller).
    ignored
        Observables in the table that the model does not use.
    spot
        Pump-spot profile of the coherent model (:data:`polkit.models.pump_spot.SPOTS`):
        ``"point"`` and ``"flat"`` (a flat top over the imaged area) follow the
        single-mode loop; ``"gaussian"`` averages the single-mode steady state over a
        Gaussian spot integrated by the camera
        (:func:`polkit.models.pump_spot.gaussian_spot_sweep`).
    """

    model: str
    power: np.ndarray
    segments: list[tuple[int, int, str]]
    channels: dict[str, Channel]
    intensity_units: str
    e_ref: float | None = None
    space: ParameterSpace | None = None
    ignored: list[str] = field(default_factory=list)
    spot: str = "point"

    @classmethod
    def from_series(cls, series: xr.Dataset, model: str, *, path=None,
                    spot: str = "point") -> PowerProblem:
        """Turn a checked canonical series table into a problem (no parameter space yet).

        Parameters
        ----------
        series
            A canonical series table (dims ``power`` or ``point``); the job-level checks of
            :func:`polkit.jobs.power.stages.check_series` are assumed done.
        model
            ``"coherent"`` or ``"reservoir"``.
        path
            The source, for messages.
        spot
            Pump-spot profile (coherent model only; the reservoir model takes ``"point"``).
        """
        if model not in MODELS:
            raise DataError(f"expected model one of {MODELS}, found {model!r}", field="model")
        if spot not in pump_spot.SPOTS:
            raise DataError(f"expected spot one of {pump_spot.SPOTS}, found {spot!r}",
                            field="spot")
        if model != "coherent" and spot != "point":
            raise DataError(f"the pump-spot profile applies to the coherent model only; found "
                            f"spot {spot!r} with model {model!r}. Fix: drop the spot option",
                            field="spot")
        power = np.asarray(series["power"].values, dtype=float).reshape(-1)
        segments = sweep_segments(series)
        units = str(series["intensity"].attrs.get("units", "1"))
        channels: dict[str, Channel] = {}
        ignored: list[str] = []
        intensity = channel(series, "intensity", log_space=(model == "reservoir"), power=power,
                             path=path)
        channels["intensity"] = intensity
        e_ref = None
        for name in ("peak_energy", "linewidth"):
            if name not in series.data_vars:
                continue
            if model == "coherent":
                ignored.append(name)  # under coherent drive the line sits at the laser energy
                continue
            y = column(series, name)
            if not np.isfinite(y).any():
                continue
            if name == "peak_energy":
                e_ref = float(np.nanmin(y))
                ch = channel(series, name, log_space=False, power=power, path=path,
                              scale=MEV, offset=e_ref)
            else:
                ch = channel(series, name, log_space=False, power=power, path=path)
            if ch.n_used >= MIN_POINTS:
                channels[name] = ch
            else:
                ignored.append(name)
        if intensity.n_used < MIN_POINTS:
            raise DataError(
                f"expected at least {MIN_POINTS} usable intensities, found {intensity.n_used}; "
                "check the intensity column and its errors",
                path=path,
                field="intensity",
            )
        return cls(model, power, segments, channels, units, e_ref, None, ignored, spot)

    # -- parameters ----------------------------------------------------------------------
    def _noise_parameter(self, ch: Channel) -> Parameter:
        desc = f"noise of {ch.name.replace('_', ' ')}"
        if ch.has_errors:
            return Parameter(ch.noise_param, "1", Prior.loguniform(0.1, 100.0),
                             desc + ": factor on the quoted errors")
        if ch.log_space:
            return Parameter(ch.noise_param, "1", Prior.loguniform(1e-3, 10.0),
                             desc + ": standard deviation of its natural log")
        v = ch.values[ch.used]
        spread = float(max(np.ptp(v), np.max(np.abs(v)), 1e-12))
        units = {"intensity": self.intensity_units}.get(ch.name, "meV")
        return Parameter(ch.noise_param, units, Prior.loguniform(1e-5 * spread, 10.0 * spread),
                         desc + ": standard deviation")

    def default_space(self) -> ParameterSpace:
        """Default priors from the data ranges.  # common practice, no published source

        Scale parameters are log-uniform over many decades around what the data allow
        (equal belief per decade); the detuning ratio is uniform over -5 to 20 (the
        bistability threshold sqrt(3)/2 well inside); blueshift rates and amplitudes are
        uniform from 0 (repulsive interactions) to far above what the data show.
        """
        p = self.power[self.power > 0] if np.any(self.power > 0) else np.array([1e-3])
        p_lo, p_hi = float(p.min()), float(p.max())
        ch = self.channels["intensity"]
        params: list[Parameter] = []
        if self.model == "coherent":
            i_max = float(max(np.max(np.abs(ch.values[ch.used])), 1e-30))
            params += [
                Parameter("detuning_ratio", "1", Prior.uniform(-5.0, 20.0),
                          _LONG["detuning_ratio"]),
                Parameter("reduced_drive_per_power", "1/mW",
                          Prior.loguniform(1e-5 / p_hi, 1e5 / p_lo),
                          _LONG["reduced_drive_per_power"]),
                Parameter("intensity_scale", self.intensity_units,
                          Prior.loguniform(1e-4 * i_max, 1e4 * i_max), _LONG["intensity_scale"]),
            ]
        else:
            i_max = float(np.exp(np.max(ch.values[ch.used])))
            params += [
                Parameter("threshold_power", "mW", Prior.loguniform(0.01 * p_lo, 100.0 * p_hi),
                          _LONG["threshold_power"]),
                Parameter("saturation_number", "1", Prior.loguniform(1.0, 1e9),
                          _LONG["saturation_number"]),
                Parameter("intensity_per_occupation", self.intensity_units,
                          Prior.loguniform(1e-12 * i_max, 1e3 * i_max),
                          _LONG["intensity_per_occupation"]),
            ]
            if "peak_energy" in self.channels:
                e = self.channels["peak_energy"]
                span = float(max(np.ptp(e.values[e.used]), 0.1))  # meV
                params += [
                    Parameter("lp_energy", "eV",
                              Prior.uniform(self.e_ref - 10 * span * MEV,
                                            self.e_ref + 2 * span * MEV), _LONG["lp_energy"]),
                    Parameter("condensate_blueshift_rate", "meV/mW",
                              Prior.uniform(0.0, 1e3 * span / max(p_hi - p_lo, 1e-9)),
                              _LONG["condensate_blueshift_rate"]),
                    Parameter("reservoir_blueshift", "meV", Prior.uniform(0.0, 100.0 * span),
                              _LONG["reservoir_blueshift"]),
                ]
            if "linewidth" in self.channels:
                w = self.channels["linewidth"]
                wv = w.values[w.used]
                w_lo, w_hi = float(max(np.min(wv), 1e-6)), float(max(np.max(wv), 1e-6))
                params += [
                    Parameter("linewidth_low", "meV", Prior.loguniform(0.01 * w_lo, 10 * w_hi),
                              _LONG["linewidth_low"]),
                    Parameter("linewidth_high", "meV", Prior.loguniform(1e-3 * w_lo, 10 * w_hi),
                              _LONG["linewidth_high"]),
                    Parameter("narrowing_occupation", "1", Prior.loguniform(1e-2, 1e9),
                              _LONG["narrowing_occupation"]),
                ]
        params += [self._noise_parameter(c) for c in self.channels.values()]
        self.space = ParameterSpace(params)
        return self.space

    def columns(self, theta: np.ndarray) -> dict[str, np.ndarray]:
        """``{parameter name: its column of theta}`` for draws ``theta`` of shape ``(W, P)``."""
        if self.space is None:
            raise FitError("the problem has no parameter space; call default_space first")
        t = np.atleast_2d(np.asarray(theta, dtype=float))
        return {n: t[:, i] for i, n in enumerate(self.space.names)}

    # -- model ---------------------------------------------------------------------------
    def reduced_blueshift(self, d, phi, power=None, segments=None) -> np.ndarray:
        """Coherent model: ``u = y / gamma`` along each sweep run, shape ``(W, N)``.

        With a Gaussian spot, ``u`` is the spot-integrated blueshift in units of the spot
        area ``pi w^2 / 2`` (:func:`polkit.models.pump_spot.gaussian_spot_sweep`); a down
        run is preceded by a ramp up to the largest power measured before it (or its
        first power), an up run starts from an empty mode.
        """
        power = self.power if power is None else np.asarray(power, dtype=float)
        segments = self.segments if segments is None else segments
        d = np.asarray(d, dtype=float).reshape(-1, 1)
        phi = np.asarray(phi, dtype=float).reshape(-1, 1)
        out = np.empty((d.shape[0], power.size))
        for start, stop, direction in segments:
            drive = phi * power[None, start:stop]
            if self.spot == "gaussian":
                before = float(np.max(power[:start + 1]))
                out[:, start:stop] = pump_spot.gaussian_spot_sweep(
                    d, 1.0, drive, direction, drive_before=phi * before)
            else:
                out[:, start:stop] = coherent.steady_state_sweep(d, 1.0, drive, direction)
        return out

    def occupation(self, p_th, n_s, power=None) -> tuple[np.ndarray, np.ndarray]:
        """Reservoir model: ``(n_C, n_R / n_R,th)`` at the powers, shape ``(W, N)``."""
        power = self.power if power is None else np.asarray(power, dtype=float)
        x = power[None, :] / np.asarray(p_th, dtype=float).reshape(-1, 1)
        n_c = reservoir.condensate_occupation(x, np.asarray(n_s, dtype=float).reshape(-1, 1))
        return n_c, n_c / (n_c + 1.0)

    def mean_model(self, theta: np.ndarray, power=None, segments=None) -> dict[str, np.ndarray]:
        """Model observables in data units: intensity [I], peak_energy [eV], linewidth [meV].

        Parameters
        ----------
        theta
            ``(W, P)`` parameter vectors.
        power, segments
            Evaluation powers (mW) and their sweep runs; default the data's.

        Returns
        -------
        dict of str to ndarray ``(W, N)``
        """
        c = self.columns(theta)
        out = {}
        if self.model == "coherent":
            u = self.reduced_blueshift(c["detuning_ratio"], c["reduced_drive_per_power"], power,
                                       segments)
            out["intensity"] = c["intensity_scale"][:, None] * u
            return out
        n_c, frac = self.occupation(c["threshold_power"], c["saturation_number"], power)
        out["intensity"] = c["intensity_per_occupation"][:, None] * n_c
        if "peak_energy" in self.channels:
            b_c = c["condensate_blueshift_rate"] * c["threshold_power"] / c["saturation_number"]
            shift = b_c[:, None] * n_c + c["reservoir_blueshift"][:, None] * frac
            out["peak_energy"] = c["lp_energy"][:, None] + shift * MEV
        if "linewidth" in self.channels:
            lo, hi = c["linewidth_low"][:, None], c["linewidth_high"][:, None]
            out["linewidth"] = hi + (lo - hi) / (1.0 + n_c / c["narrowing_occupation"][:, None])
        return out

    def fit_space_model(self, theta: np.ndarray) -> dict[str, np.ndarray]:
        """:meth:`mean_model` at the data's powers, transformed into each channel's fit space."""
        m = self.mean_model(theta)
        out = {}
        for name, ch in self.channels.items():
            v = m[name]
            if ch.log_space:
                with np.errstate(divide="ignore"):
                    v = np.log(np.where(v > 0, v, 0.0))
            elif name == "peak_energy":
                v = (v - self.e_ref) / MEV
            out[name] = v
        return out

    def log_likelihood(self, theta: np.ndarray) -> np.ndarray:
        """Sum of the channels' Gaussian log-likelihoods, shape ``(W,)``."""
        theta = np.atleast_2d(np.asarray(theta, dtype=float))
        c = self.columns(theta)
        total = np.zeros(theta.shape[0])
        for name, m in self.fit_space_model(theta).items():
            ch = self.channels[name]
            total = total + ch.log_likelihood(m, c[ch.noise_param])
        return total

    # -- starting point --------------------------------------------------------------------
    def guess(self) -> dict[str, float]:
        """An automatic starting point: a vectorised grid search with linear amplitudes.

        Coherent: a grid over the detuning ratio and the reduced drive, the intensity scale
        solved by weighted linear least squares at each node.  Reservoir: a grid over the
        threshold and the saturation number with the log amplitude solved in closed form,
        then the energy terms by linear least squares and the narrowing occupation by a
        one-dimensional grid.  # common practice, no published source
        """
        if self.space is None:
            raise FitError("the problem has no parameter space; call default_space first")
        ch = self.channels["intensity"]
        u_mask = ch.used
        w = 1.0 / ch.sigma[u_mask] ** 2
        y = ch.values[u_mask]
        g: dict[str, float] = {}
        if self.model == "coherent":
            b = self.space["reduced_drive_per_power"].prior.bounds
            # the spot average costs ~36 single-mode solutions per point: a coarser grid
            n_d, n_phi = (81, 97) if self.spot != "gaussian" else (41, 49)
            d_grid = np.linspace(-2.0, 8.0, n_d)
            phi_grid = np.geomspace(max(b[0], 1e-3 / self.power.max()),
                                    min(b[1], 1e3 / max(self.power[self.power > 0].min(), 1e-12)),
                                    n_phi)
            dd, pp = (a.reshape(-1) for a in np.meshgrid(d_grid, phi_grid, indexing="ij"))
            if self.spot != "gaussian":
                u = self.reduced_blueshift(dd, pp)[:, u_mask]
            else:
                u = np.concatenate([self.reduced_blueshift(dd[i:i + 256], pp[i:i + 256])[:, u_mask]
                                    for i in range(0, dd.size, 256)])
            s = np.sum(w * u * y, axis=1) / np.maximum(np.sum(w * u * u, axis=1), 1e-300)
            chi2 = np.sum(w * (y - s[:, None] * u) ** 2, axis=1)
            k = int(np.nanargmin(np.where(s > 0, chi2, np.inf)))
            g.update(detuning_ratio=dd[k], reduced_drive_per_power=pp[k], intensity_scale=s[k])
            g[ch.noise_param] = self._noise_guess(ch, chi2[k])
            return g
        pw = self.power
        p_pos = pw[pw > 0]
        pt_grid = np.geomspace(p_pos.min() / 5.0, p_pos.max() * 5.0, 70)
        ns_grid = np.geomspace(1.0, 1e8, 57)
        pt, ns = (a.reshape(-1) for a in np.meshgrid(pt_grid, ns_grid, indexing="ij"))
        n_c, _ = self.occupation(pt, ns)
        lm = np.log(n_c[:, u_mask])
        log_s = np.sum(w * (y - lm), axis=1) / np.sum(w)
        chi2 = np.sum(w * (y - lm - log_s[:, None]) ** 2, axis=1)
        k = int(np.argmin(chi2))
        g.update(threshold_power=pt[k], saturation_number=ns[k],
                 intensity_per_occupation=float(np.exp(log_s[k])))
        g[ch.noise_param] = self._noise_guess(ch, chi2[k])
        n_c, frac = (a[0] for a in self.occupation(pt[k], ns[k]))
        if "peak_energy" in self.channels:
            e = self.channels["peak_energy"]
            m, sw = e.used, 1.0 / e.sigma[e.used]
            a = np.column_stack([np.ones(m.sum()), n_c[m], frac[m]]) * sw[:, None]
            coef, *_ = np.linalg.lstsq(a, e.values[m] * sw, rcond=None)
            coef[1:] = np.clip(coef[1:], 0.0, None)
            resid = (e.values[m] - coef[0] - coef[1] * n_c[m] - coef[2] * frac[m]) * sw
            g.update(lp_energy=self.e_ref + coef[0] * MEV,
                     condensate_blueshift_rate=coef[1] * ns[k] / pt[k],
                     reservoir_blueshift=coef[2])
            g[e.noise_param] = self._noise_guess(e, float(resid @ resid))
        if "linewidth" in self.channels:
            lw = self.channels["linewidth"]
            m = lw.used
            order = np.argsort(pw[m])
            vals = lw.values[m][order]
            w_lo = float(np.median(vals[:3]))
            w_hi = float(np.median(vals[-3:]))
            grid = np.geomspace(1e-2, 1e8, 101)
            model = w_hi + (w_lo - w_hi) / (1.0 + n_c[m][None, :] / grid[:, None])
            chi = np.sum(((lw.values[m] - model) / lw.sigma[m]) ** 2, axis=1)
            j = int(np.argmin(chi))
            g.update(linewidth_low=w_lo, linewidth_high=max(w_hi, 1e-6),
                     narrowing_occupation=grid[j])
            g[lw.noise_param] = self._noise_guess(lw, float(chi[j]))
        return g

    def with_scales(self, guess: Mapping[str, float]) -> ParameterSpace:
        """The space with optimiser/ball scales from a starting point (priors unchanged).

        Log-uniform priors span decades, so their spread is no step size: positive
        parameters get a tenth of their starting value, the others a hundredth of their
        prior spread (the peak energy: its median error).
        """
        params = []
        for p in self.space:
            value = float(guess.get(p.name, np.nan))
            lo, _ = p.prior.bounds
            if p.name == "lp_energy":
                e = self.channels["peak_energy"]
                scale = max(float(np.median(e.sigma[e.used])) * MEV, 1e-7)
            elif np.isfinite(value) and value > 0 and lo >= 0:
                scale = 0.1 * value
            else:
                scale = 0.01 * p.prior.width
            params.append(Parameter(p.name, p.units, p.prior, p.description, scale))
        self.space = ParameterSpace(params)
        return self.space

    def _noise_guess(self, ch: Channel, chi2: float) -> float:
        """The noise parameter that makes chi^2 per point one (``sigma`` is 1 without errors)."""
        lo, hi = self.space[ch.noise_param].prior.bounds
        rms = math.sqrt(max(chi2, 0.0) / max(ch.n_used, 1))
        return float(np.clip(rms, lo * 1.01, hi * 0.99))

    # -- derived quantities ----------------------------------------------------------------
    def derived(self, draws: np.ndarray, *, linewidth: np.ndarray | None = None
                ) -> dict[str, tuple[np.ndarray, str, str]]:
        """Quantities derived per posterior draw: ``name -> (values, units, long_name)``.

        ``draws`` has shape ``(D, P)``; every value has shape ``(D,)`` (NaN where a
        quantity does not exist for that draw, e.g. a turning point of a monostable draw),
        except 0-d probabilities.  No calibration needed.  The coherent model needs
        ``linewidth``: one polariton linewidth (meV) per draw, drawn from its prior.
        """
        c = self.columns(draws)
        out: dict[str, tuple[np.ndarray, str, str]] = {}
        p_max = float(np.max(self.power))
        if self.model == "coherent":
            if linewidth is None:
                raise FitError("the coherent model derives meV quantities from one polariton "
                               "linewidth per draw; pass linewidth=")
            gam = np.asarray(linewidth, dtype=float).reshape(-1)
            d, phi, s_g = (c[n] for n in ("detuning_ratio", "reduced_drive_per_power",
                                          "intensity_scale"))
            out["polariton_linewidth"] = (gam, "meV", "polariton linewidth gamma (FWHM), "
                                          "drawn from its prior (the data fix only ratios)")
            out["pump_detuning"] = (d * gam, "meV", "pump detuning Delta = E_pump - E_LP")
            out["drive_per_power"] = (phi * gam**3, "meV^3/mW",
                                      "drive per unit power alpha kappa (F = alpha kappa P)")
            out["intensity_per_blueshift"] = (s_g / gam, f"{self.intensity_units}/meV",
                                              "intensity per meV of blueshift")
            out["blueshift_per_power"] = (phi * gam / (d * d + 0.25), "meV/mW",
                                          "blueshift per unit power at low power")
            tp = coherent.turning_points(d, np.ones_like(d))
            up, down = tp.drive_up / phi, tp.drive_down / phi
            where = "" if self.spot != "gaussian" else " at the spot centre"
            out["power_up_threshold"] = (up, "mW", f"power where an up sweep jumps up{where} "
                                         "(bistable draws only)")
            out["power_down_threshold"] = (down, "mW", f"power where a down sweep falls{where} "
                                           "(bistable draws only)")
            out["hysteresis_width"] = (up - down, "mW", "width of the hysteresis loop in power"
                                       + where)
            centre = self if self.spot != "gaussian" else dataclasses.replace(self, spot="point")
            u = centre.reduced_blueshift(d, phi)
            out["max_blueshift"] = (gam * np.max(u, axis=1), "meV",
                                    "largest blueshift reached in the series" + where)
            bist = d > coherent.BISTABILITY_RATIO
            out["bistable_probability"] = (
                np.asarray(float(np.mean(bist))), "1",
                "posterior probability of bistability, Delta > (sqrt 3 / 2) gamma "
                "(Baas et al., PRA 69, 023809, 2004)")
            return out
        p_th, n_s = c["threshold_power"], c["saturation_number"]
        n_c, frac = (a[:, 0] for a in self.occupation(p_th, n_s, np.array([p_max])))
        out["max_occupation"] = (n_c, "1", "polariton occupation of the mode at the largest power")
        if "peak_energy" in self.channels:
            k_c, b_r = c["condensate_blueshift_rate"], c["reservoir_blueshift"]
            b_c = k_c * p_th / n_s
            out["blueshift_per_occupation"] = (b_c, "meV", "condensate blueshift per polariton "
                                               "in the mode, g_C / A")
            out["reservoir_blueshift_rate"] = (b_r / p_th, "meV/mW",
                                               "reservoir blueshift per unit power below threshold")
            out["max_blueshift"] = (b_c * n_c + b_r * frac, "meV",
                                    "blueshift at the largest power")
        return out


# --------------------------------------------------------------------------------------
# priors from other results
# --------------------------------------------------------------------------------------
def linewidth_prior(
    *,
    dispersion_linewidth: np.ndarray | None = None,
    calibration: DensityCalibration | None = None,
) -> tuple[Prior, str]:
    """Prior of ``polariton_linewidth`` (coherent model) and a sentence saying where it came from.

    Order: the lower-polariton linewidth at k = 0 of a dispersion result (a truncated normal
    with the draws' median and standard deviation); else the calibration's polariton
    lifetime (``gamma = hbar / tau``, a truncated normal with the lifetime's relative error,
    at least 1 %); else log-uniform over 1 ueV to 100 meV, which leaves the meV scale of the
    pump detuning, the linewidth and the drive to the prior (intensities fix only their
    ratios).
    """
    if dispersion_linewidth is not None:
        v = np.asarray(dispersion_linewidth, dtype=float)
        v = v[np.isfinite(v) & (v > 0)]
        if v.size >= 2:
            mu, sd = float(np.median(v)), float(np.std(v))
            sd = max(sd, 0.01 * mu)
            return (Prior.truncnormal(mu, sd, max(mu - 10 * sd, 1e-3 * mu), mu + 10 * sd),
                    f"polariton_linewidth prior from the dispersion result's lp_linewidth_k0 "
                    f"(median {mu:.4g} meV, sd {sd:.2g} meV)")
    if calibration is not None and calibration.polariton_lifetime_ps is not None:
        q = calibration.polariton_lifetime_ps
        mu = HBAR_MEV_PS / q.value
        sd = max(q.sigma_log, 0.01) * mu
        return (Prior.truncnormal(mu, sd, max(mu - 10 * sd, 1e-3 * mu), mu + 10 * sd),
                f"polariton_linewidth prior hbar / tau from the calibration's polariton "
                f"lifetime {q.value:g} ps (relative error {q.sigma_log:g})")
    return (Prior.loguniform(1e-3, 100.0),
            "no linewidth information: intensities fix only Delta/gamma, so pump_detuning, "
            "polariton_linewidth and drive_per_power in meV follow the log-uniform prior of "
            "polariton_linewidth (1 ueV to 100 meV); give a dispersion result, a calibration "
            "with polariton_lifetime, or a prior to pin the meV scale")

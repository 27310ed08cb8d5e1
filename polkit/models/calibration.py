"""Pump power to polariton (or reservoir) density: the calibration step and its uncertainties.

Published interaction constants disagree by orders of magnitude mostly through this
step, so every input (spot size, photon energy, coupling efficiency, repetition rate,
lifetime) carries an uncertainty that becomes a log-normal prior, and densities are
computed per draw.

The file form (TOML with explicit units on every quantity) is read by
:func:`polkit.config.calibration.load_calibration`.
"""

from __future__ import annotations

import math
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any, Literal

import numpy as np
from numpy.typing import ArrayLike, NDArray
from scipy import constants as _c
from scipy import stats

from polkit.errors import ConfigError, DataError

__all__ = [
    "UncertainInput",
    "draw_inputs",
    "DensityCalibration",
    "INPUT_FIELDS",
    "gaussian_spot_area",
    "photon_flux",
    "photon_flux_density",
    "cw_density",
    "pulsed_density",
]

#: file key -> (dimension, attribute name, upper bound or None) of every input
INPUT_FIELDS: dict[str, tuple[str, str, float | None]] = {
    "spot_fwhm": ("length", "spot_fwhm_um", None),
    "spot_area": ("area", "spot_area_um2", None),
    "photon_energy": ("energy", "photon_energy_eV", None),
    "coupling_efficiency": ("fraction", "coupling_efficiency", 1.0),
    "detection_efficiency": ("fraction", "detection_efficiency", 1.0),
    "polariton_lifetime": ("time", "polariton_lifetime_ps", None),
    "pulse_duration": ("time", "pulse_duration_ps", None),
    "repetition_rate": ("frequency", "repetition_rate_MHz", None),
}
_J_PER_EV = _c.e  # CODATA (exact since 2019)


@dataclass(frozen=True)
class UncertainInput:
    """A calibration input with a log-normal prior: median ``value``, log-width ``sigma_log``.

    Attributes
    ----------
    value
        Median, in ``units``.
    sigma_log
        Standard deviation of ``ln(x)``; 0 means exact.
    units
        polkit's unit for the quantity (``um``, ``um2``, ``eV``, ``ps``, ``MHz`` or ``1``).
    upper
        Hard upper bound (1 for efficiencies): the log-normal is truncated there.
    """

    value: float
    sigma_log: float = 0.0
    units: str = "1"
    upper: float | None = None

    def draw(self, rng: np.random.Generator, n: int) -> NDArray:
        """``n`` independent draws from the (truncated) log-normal, using ``rng``."""
        if self.sigma_log == 0:
            return np.full(n, self.value)
        mu = math.log(self.value)
        if self.upper is None:
            return np.exp(rng.normal(mu, self.sigma_log, n))
        b = (math.log(self.upper) - mu) / self.sigma_log
        z = stats.truncnorm(-np.inf, b, loc=mu, scale=self.sigma_log).rvs(size=n, random_state=rng)
        return np.exp(z)

    def to_dict(self) -> dict[str, Any]:
        """The file form: ``{"value": ..., "rel_error": ..., "units": ...}``."""
        return {"value": self.value, "rel_error": self.sigma_log, "units": self.units}


def draw_inputs(inputs: Mapping[str, UncertainInput], rng: np.random.Generator,
                n: int) -> dict[str, NDArray]:
    """``n`` independent draws of every input, in the order of ``inputs``, using ``rng`` only.

    Raises
    ------
    ConfigError
        When ``rng`` is not a :class:`numpy.random.Generator`.
    """
    if not isinstance(rng, np.random.Generator):
        raise ConfigError(
            f"expected a numpy.random.Generator, found {type(rng).__name__}; "
            "use numpy.random.default_rng(seed)",
            key="rng",
        )
    return {name: q.draw(rng, int(n)) for name, q in inputs.items()}


@dataclass(frozen=True)
class DensityCalibration:
    """Everything needed to turn a pump power (mW) into a density (1/um^2), with uncertainties.

    Build it with :func:`polkit.config.calibration.load_calibration`; the constructor checks
    consistency (exactly one of spot FWHM or spot area; repetition rate and pulse duration
    for pulsed drive only) and raises :class:`~polkit.errors.ConfigError` naming the key.
    """

    drive: Literal["cw", "pulsed"]
    photon_energy_eV: UncertainInput
    coupling_efficiency: UncertainInput
    spot_fwhm_um: UncertainInput | None = None
    spot_area_um2: UncertainInput | None = None
    detection_efficiency: UncertainInput | None = None
    polariton_lifetime_ps: UncertainInput | None = None
    pulse_duration_ps: UncertainInput | None = None
    repetition_rate_MHz: UncertainInput | None = None
    note: str = ""
    source: str | None = field(default=None, compare=False)

    def __post_init__(self) -> None:
        where = {"path": self.source}
        if self.drive not in ("cw", "pulsed"):
            raise ConfigError(
                f"expected 'cw' or 'pulsed', found {self.drive!r}", key="drive", **where
            )
        if (self.spot_fwhm_um is None) == (self.spot_area_um2 is None):
            raise ConfigError(
                "expected exactly one of spot_fwhm (um) or spot_area (um2), found "
                + ("both" if self.spot_fwhm_um is not None else "neither"),
                key="spot_fwhm",
                **where,
            )
        if self.drive == "pulsed" and self.repetition_rate_MHz is None:
            raise ConfigError(
                "pulsed drive needs the repetition rate: add "
                'repetition_rate = {value = ..., units = "MHz"}',
                key="repetition_rate",
                **where,
            )
        if self.drive == "pulsed" and self.pulse_duration_ps is None:
            raise ConfigError(
                'pulsed drive needs the pulse duration: add pulse_duration = {value = ..., '
                'units = "ps"}',
                key="pulse_duration",
                **where,
            )
        if self.drive == "cw":
            for key in ("repetition_rate", "pulse_duration"):
                if getattr(self, INPUT_FIELDS[key][1]) is not None:
                    raise ConfigError(
                        f"{key} applies to pulsed drive only, found it with drive = 'cw'; "
                        "remove it or set drive = 'pulsed'",
                        key=key,
                        **where,
                    )

    def _inputs(self) -> dict[str, UncertainInput]:
        return {
            attr: getattr(self, attr)
            for _, attr, _ in INPUT_FIELDS.values()
            if getattr(self, attr) is not None
        }

    def medians(self) -> dict[str, float]:
        """Median of every input, plus ``spot_area_um2`` (derived from the FWHM if needed)."""
        out = {name: q.value for name, q in self._inputs().items()}
        if "spot_area_um2" not in out:
            out["spot_area_um2"] = float(gaussian_spot_area(out["spot_fwhm_um"]))
        return out

    def draw(self, rng: np.random.Generator, n: int) -> dict[str, NDArray]:
        """``n`` joint draws of the calibration inputs, for propagation into densities.

        Parameters
        ----------
        rng
            The generator to draw from (numpy's global state is never touched).
        n
            Number of draws.

        Returns
        -------
        dict of str to ndarray, shape ``(n,)``
            One array per input present (keys carry the units, e.g. ``photon_energy_eV``),
            always including ``spot_area_um2`` (computed per draw from ``spot_fwhm_um`` with
            :func:`gaussian_spot_area` when the FWHM was given).
        """
        out = draw_inputs(self._inputs(), rng, n)
        if "spot_area_um2" not in out:
            out["spot_area_um2"] = gaussian_spot_area(out["spot_fwhm_um"])
        return out

    def density(
        self,
        power_mW: ArrayLike,
        values: Mapping[str, ArrayLike] | None = None,
        *,
        lifetime_ps: ArrayLike | None = None,
    ) -> NDArray:
        """Polariton density (1/um^2) at the given average pump powers.

        cw: :func:`cw_density`; pulsed: :func:`pulsed_density` (density per pulse).

        Parameters
        ----------
        power_mW
            Average pump power(s) in mW.
        values
            Calibration values, e.g. from :meth:`draw` (arrays of shape ``(n,)``); default
            the medians.  Batched values give a result of shape ``(n, *power.shape)``.
        lifetime_ps
            Polariton lifetime in ps for cw drive (scalar or shape ``(n,)``, e.g. per
            posterior draw ``hbar / gamma``); default the file's ``polariton_lifetime``.

        Returns
        -------
        ndarray
            Density in 1/um^2.
        """
        vals = dict(self.medians() if values is None else values)
        if lifetime_ps is not None:
            vals["polariton_lifetime_ps"] = lifetime_ps
        power = np.asarray(power_mW, dtype=float)
        batch = max(np.ndim(v) for v in vals.values())
        if batch > 1:
            raise ConfigError(
                f"expected scalar or 1-d calibration values (one per draw), found {batch}-d",
                key="values",
            )

        def get(name: str) -> NDArray:
            v = np.asarray(vals[name], dtype=float)
            return v.reshape(v.shape + (1,) * power.ndim) if v.ndim == 1 else v

        common = (power, get("photon_energy_eV"), get("spot_area_um2"), get("coupling_efficiency"))
        if self.drive == "pulsed":
            return pulsed_density(*common, get("repetition_rate_MHz"))
        if "polariton_lifetime_ps" not in vals:
            raise ConfigError(
                "cw drive needs the polariton lifetime: pass lifetime_ps, or add "
                'polariton_lifetime = {value = ..., units = "ps"} to the calibration',
                key="polariton_lifetime",
                path=self.source,
            )
        return cw_density(*common, get("polariton_lifetime_ps"))

    def to_dict(self) -> dict[str, Any]:
        """The calibration in file form (JSON-ready, units explicit); loads back unchanged."""
        out: dict[str, Any] = {"drive": self.drive}
        if self.note:
            out["note"] = self.note
        for key, (_, attr, _) in INPUT_FIELDS.items():
            q = getattr(self, attr)
            if q is not None:
                out[key] = q.to_dict()
        return out


def _checked(name: str, value: ArrayLike, *, nonneg: bool = False) -> NDArray:
    arr = np.asarray(value, dtype=float)
    if not np.all(np.isfinite(arr)):
        raise DataError("expected finite numbers, found non-finite value(s)", field=name)
    if nonneg and np.any(arr < 0):
        raise DataError(f"expected values >= 0, found minimum {arr.min():g}", field=name)
    if not nonneg and np.any(arr <= 0):
        raise DataError(f"expected values > 0, found minimum {arr.min():g}", field=name)
    return arr


def gaussian_spot_area(fwhm_um: ArrayLike) -> NDArray:
    """Effective area (um^2) of a Gaussian spot: total power over peak intensity.

    For ``I(r) = I0 exp(-4 ln 2 r^2 / w^2)`` (FWHM ``w``),
    ``P = int 2 pi r I(r) dr = I0 pi w^2 / (4 ln 2)``, so the peak intensity is
    ``P / A`` with ``A = pi w^2 / (4 ln 2)`` (about 1.133 w^2).  Equivalently
    ``A = pi w0^2 / 2`` for the 1/e^2 intensity radius ``w0 = w / sqrt(2 ln 2)``
    (Gaussian-beam relation, e.g. Siegman, Lasers, 1986).  The density obtained with it is
    the peak (spot-centre) density.
    """
    w = _checked("fwhm_um", fwhm_um)
    return np.pi * w * w / (4.0 * np.log(2.0))


def photon_flux(power_mW: ArrayLike, photon_energy_eV: ArrayLike) -> NDArray:
    """Photons per ps in a beam of power ``P``: ``P / E_ph`` (1 mW = 1e-3 J/s, 1 eV = e J)."""
    p = _checked("power_mW", power_mW, nonneg=True)
    e = _checked("photon_energy_eV", photon_energy_eV)
    return p * 1e-3 / (e * _J_PER_EV) * 1e-12


def photon_flux_density(
    power_mW: ArrayLike, photon_energy_eV: ArrayLike, area_um2: ArrayLike
) -> NDArray:
    """Photons per ps per um^2 at the spot centre: ``P / (E_ph A)``."""
    return photon_flux(power_mW, photon_energy_eV) / _checked("area_um2", area_um2)


def cw_density(
    power_mW: ArrayLike,
    photon_energy_eV: ArrayLike,
    area_um2: ArrayLike,
    efficiency: ArrayLike,
    lifetime_ps: ArrayLike,
) -> NDArray:
    """Steady-state density under cw pumping, ``n = eta P tau / (E_ph A)`` in 1/um^2.

    Balance of injection and decay: ``dn/dt = eta P / (E_ph A) - n / tau = 0`` (particle
    conservation, common practice), with coupling efficiency ``eta``, polariton lifetime
    ``tau`` and spot area ``A`` (:func:`gaussian_spot_area` gives the peak density).
    """
    eta = _checked("efficiency", efficiency)
    if np.any(eta > 1):
        raise DataError(f"an efficiency lies in (0, 1], found {eta.max():g}", field="efficiency")
    tau = _checked("lifetime_ps", lifetime_ps)
    return eta * photon_flux_density(power_mW, photon_energy_eV, area_um2) * tau


def pulsed_density(
    power_mW: ArrayLike,
    photon_energy_eV: ArrayLike,
    area_um2: ArrayLike,
    efficiency: ArrayLike,
    repetition_rate_MHz: ArrayLike,
) -> NDArray:
    """Density injected by one pulse, ``n = eta P / (f_rep E_ph A)`` in 1/um^2.

    ``P / f_rep`` is the pulse energy for average power ``P`` (common practice); valid when
    the pulse is shorter than the polariton lifetime, so the injected density is not
    depleted during the pulse.
    """
    eta = _checked("efficiency", efficiency)
    if np.any(eta > 1):
        raise DataError(f"an efficiency lies in (0, 1], found {eta.max():g}", field="efficiency")
    f_per_ps = _checked("repetition_rate_MHz", repetition_rate_MHz) * 1e6 * 1e-12
    return eta * photon_flux_density(power_mW, photon_energy_eV, area_um2) / f_per_ps

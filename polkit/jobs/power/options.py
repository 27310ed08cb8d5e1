"""What a caller tells the power-series job besides the data: two small settings objects.

* :class:`PowerCalibration`: what turns the fitted products into absolute numbers (the
  density calibration, the sample's quantum wells and exciton constants, the reservoir
  lifetime) and the pump-spot profile of the coherent model;
* :class:`ExtractionWindow`: where in a spectra cube the observables are extracted.

Both are plain values: :func:`polkit.jobs.power.stages.prepare_power` checks them, with
the same refusals as the options they replace.
"""

from __future__ import annotations

import dataclasses
import os
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from polkit.errors import ConfigError
from polkit.models.calibration import DensityCalibration

__all__ = ["PowerCalibration", "ExtractionWindow"]


@dataclass(frozen=True)
class PowerCalibration:
    """The calibration of a power fit: density calibration, sample constants, pump spot.

    Without any of it the fit reports only the identifiable products, and the result says
    so.  ``fit_power(..., calibration=x)`` also takes the density calibration alone (a
    file, a dict or a :class:`~polkit.models.calibration.DensityCalibration`).

    Attributes
    ----------
    density
        Density calibration: a TOML file, a dict in the same form, or a
        :class:`~polkit.models.calibration.DensityCalibration`
        (:func:`polkit.config.calibration.read_calibration`); ``None``: none.
    spot
        Pump-spot profile of the coherent model: ``"point"`` (one mode), ``"gaussian"``
        (the steady state averaged over a Gaussian spot that the camera integrates,
        :mod:`polkit.models.pump_spot`) or ``"flat"`` (a flat top: the single-mode loop).
        ``None`` takes the calibration file's ``spot`` key, else ``"point"``.
    n_wells
        Number of equivalent quantum wells: the exciton interaction constant per well.
    exciton_binding_meV, bohr_radius_nm
        Exciton binding energy and Bohr radius: the exciton interaction constant is
        compared with ``6 E_b a_B^2`` (Ciuti et al., PRB 58, 7926, 1998).
    reservoir_lifetime_ps
        Reservoir lifetime (ps), or ``(value, relative_error)``: with a cw calibration it
        gives the reservoir density at threshold and ``reservoir_interaction_constant``.
    """

    density: str | os.PathLike | Mapping[str, Any] | DensityCalibration | None = None
    spot: str | None = None
    n_wells: int | None = None
    exciton_binding_meV: float | None = None
    bohr_radius_nm: float | None = None
    reservoir_lifetime_ps: float | tuple[float, float] | None = None

    @classmethod
    def of(cls, calibration: Any = None) -> PowerCalibration:
        """``calibration`` as a :class:`PowerCalibration`: itself, or a density calibration
        (file, dict, :class:`~polkit.models.calibration.DensityCalibration`) wrapped, or
        ``None`` (no calibration)."""
        if isinstance(calibration, cls):
            return calibration
        return cls(density=calibration)


@dataclass(frozen=True)
class ExtractionWindow:
    """Where the observables of a spectra cube are extracted
    (:func:`polkit.linefit.extract_observables`); a table of observables takes none.

    Attributes
    ----------
    energy
        ``(low, high)`` photon energy in eV.
    angle
        ``(low, high)`` angle (or k) replacing the default k = 0 columns.
    """

    energy: tuple[float, float] | None = None
    angle: tuple[float, float] | None = None

    @classmethod
    def of(cls, window: ExtractionWindow | Mapping[str, Any] | None = None) -> ExtractionWindow:
        """``window`` (an object, a dict ``{"energy": ..., "angle": ...}`` or ``None``)."""
        if window is None:
            return cls()
        if isinstance(window, cls):
            return window
        if not isinstance(window, Mapping):
            raise ConfigError(f"expected polkit.jobs.power.options.ExtractionWindow or a dict; "
                              f"found {type(window).__name__}", key="window")
        known = [f.name for f in dataclasses.fields(cls)]
        unknown = sorted(set(window) - set(known))
        if unknown:
            raise ConfigError(f"unknown window(s) {', '.join(map(str, unknown))}; known: "
                              f"{', '.join(known)}", key="window")
        return cls(**dict(window))

    @property
    def given(self) -> bool:
        """Whether any window is set."""
        return self.energy is not None or self.angle is not None

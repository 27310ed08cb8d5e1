"""How a file becomes a canonical map or series: one settings object for every loader and job."""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping
from dataclasses import dataclass, field
from typing import Any

from polkit._settings import settings_base


@dataclass(frozen=True)
class LoadOptions:
    """Everything a loader and a job need to know about reading one data file.

    Attributes
    ----------
    reader
        ``"netcdf"``, ``"npz"``, ``"matrix"`` or ``"csv"``; default: from the content.
    kind
        ``"emission"``, ``"reflectance"`` or ``"transmission"``; default: the file's
        ``kind`` attribute, else the signal's name, else emission.
    wavelength_medium
        ``"vacuum"`` or ``"air"``: what a wavelength axis refers to (default: the file's
        ``wavelength_medium`` attribute, else vacuum).
    energy_units, angle_units, signal_units
        Units of the spectral axis, the angle axis and the signal when the file gives none.
    variable
        Name of the signal variable when the file holds several.
    fourier
        Fourier-plane calibration for an axis in pixels (``na``, ``k0_pixel``,
        ``pupil_radius_px``); default: the file's attributes of the same names.
    mask_nonfinite
        Mask NaN/Inf signal values (``attrs["masked"] = 1``) instead of refusing them.
    wavelength_jacobian
        Scale emission densities on a wavelength axis by |d lambda / d E| (default).
    dark, mask_saturated
        Camera offset subtracted in raw counts, and masking of clipped pixels, when loading
        a file directly (a job takes them from ``camera``).
    angle_window, energy_window
        Crop to ``(low, high)`` in degrees / eV after loading (a job's window).
    camera
        A :class:`polkit.data.camera.CameraOptions`: how a map is prepared before a fit
        (offset, saturation, spikes, excluded lines, detection threshold).
    reader_options
        Options of the chosen reader (matrix: ``rows``, ``columns``; csv: ``delimiter``).
    """

    reader: str | None = None
    kind: str | None = None
    wavelength_medium: str | None = None
    energy_units: str | None = None
    angle_units: str | None = None
    signal_units: str | None = None
    variable: str | None = None
    fourier: Mapping[str, Any] | None = None
    mask_nonfinite: bool = False
    wavelength_jacobian: bool = True
    dark: Any = None
    mask_saturated: bool = False
    angle_window: tuple[float, float] | None = None
    energy_window: tuple[float, float] | None = None
    camera: Any = None
    reader_options: Mapping[str, Any] = field(default_factory=dict)

    @classmethod
    def of(cls, options: LoadOptions | Mapping[str, Any] | None = None, **changes) -> LoadOptions:
        """``options`` (an object, a dict of field values or ``None``) with ``changes`` applied.

        Unknown names are refused with the list of known ones; names a reader understands
        go in ``reader_options``.
        """
        base = settings_base(cls, options, changes, public_name="polkit.data.LoadOptions",
                             key="load options", noun="load option",
                             hint=" (a reader's own options go in reader_options={...})")
        return dataclasses.replace(base, **changes) if changes else base


#: the fields :func:`polkit.data.load_map` reads (windows and camera are a job's business)
MAP_FIELDS = (
    "reader", "kind", "wavelength_medium", "energy_units", "angle_units", "signal_units",
    "variable", "fourier", "mask_nonfinite", "wavelength_jacobian", "dark", "mask_saturated",
    "reader_options",
)
#: the fields :func:`polkit.data.load_series` reads (a series has no kind or camera offset)
SERIES_FIELDS = tuple(f for f in MAP_FIELDS if f not in ("kind", "dark", "mask_saturated"))


def loader_options(options: LoadOptions | Mapping[str, Any] | None, changes: Mapping[str, Any],
                   fields: tuple[str, ...]) -> LoadOptions:
    """``options`` with ``changes``: names in ``fields`` set fields, others are reader options.

    A reader refuses the options it does not take (:func:`polkit.data.registry.read_raw`),
    so a misspelt name is still refused, in the reader's words.
    """
    own = {k: v for k, v in changes.items() if k in fields}
    extra = {k: v for k, v in changes.items() if k not in fields}
    opts = LoadOptions.of(options, **own)
    if extra:
        opts = dataclasses.replace(opts, reader_options={**opts.reader_options, **extra})
    return opts

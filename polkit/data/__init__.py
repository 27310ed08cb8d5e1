"""The data layer: read maps and power series from files into one validated data model.

Readers (one small module each, chosen from the file's content or by ``reader=``)
return a raw dataset; :mod:`polkit.data.assemble` converts units, calibrates
Fourier-plane pixels, applies the wavelength Jacobian and sorts the axes; and
:mod:`polkit.data.validate` checks the result, in one place, for every reader.

Canonical objects (see :mod:`polkit.data.schema`)
    *Map*: ``DataArray`` with dims (``angle`` [degree] or ``k`` [1/um], ``energy``
    [eV], ascending), float64, ``units``/``long_name`` on both coordinates, attrs
    ``units``, ``kind``, ``source``, ``masked``, ``history`` and, where the file had a
    wavelength axis, ``wavelength_medium``.

    *Series*: ``Dataset`` with ``intensity`` (and optional ``peak_energy`` [eV],
    ``linewidth`` [meV] and their ``*_error``) on dim ``power`` [mW] (distinct powers,
    sorted, no sweep labels) or on dim ``point`` with ``power`` and ``sweep``
    ("up"/"down") as coordinates (powers repeat, or a coherent-drive hysteresis sweep
    whose measurement order matters); or a spectra cube ``intensity(power, energy)`` /
    ``intensity(power, angle|k, energy)``.

Scope: this package reads, converts, validates and preprocesses.  It fits nothing
and knows nothing of the inference layer.
"""

from __future__ import annotations

import xarray as xr

from polkit.data.assemble import raw_to_map
from polkit.data.build import make_map, make_series
from polkit.data.camera import CameraOptions, ExcludeWindow, detector_variance_terms, parse_exclude
from polkit.data.fourier import (
    find_pupil_edges,
    pixel_to_angle,
    sin_theta_from_pixel,
    to_k,
    wavevector,
)
from polkit.data.inspect import inspect_file
from polkit.data.options import LoadOptions
from polkit.data.preprocess import (
    SymmetryReport,
    bin_map,
    check_symmetry,
    crop,
    flag_saturated,
    remove_cosmic_rays,
    shift_axis,
    subtract_background,
    subtract_dark,
)
from polkit.data.registry import READERS, choose_reader, read_raw
from polkit.data.series import raw_to_series
from polkit.data.spikes import (
    find_spikes,
    mask_saturated_map,
    mask_spikes,
    mask_windows,
    prepare_camera_map,
)
from polkit.data.validate import validate_map, validate_series
from polkit.units import air_to_vacuum_nm, refractive_index_air, vacuum_to_air_nm

__all__ = [
    "LoadOptions",
    "load_map",
    "load_series",
    "validate_map",
    "validate_series",
    "make_map",
    "make_series",
    "inspect_file",
    "CameraOptions",
    "ExcludeWindow",
    "parse_exclude",
    "detector_variance_terms",
    "prepare_camera_map",
    "mask_spikes",
    "mask_windows",
    "find_spikes",
    "mask_saturated_map",
    "crop",
    "subtract_dark",
    "subtract_background",
    "remove_cosmic_rays",
    "bin_map",
    "flag_saturated",
    "check_symmetry",
    "SymmetryReport",
    "shift_axis",
    "sin_theta_from_pixel",
    "pixel_to_angle",
    "find_pupil_edges",
    "wavevector",
    "to_k",
    "refractive_index_air",
    "air_to_vacuum_nm",
    "vacuum_to_air_nm",
    "READERS",
    "choose_reader",
]


def load_map(
    path,
    *,
    reader: str | None = None,
    kind: str | None = None,
    wavelength_medium: str | None = None,
    energy_units: str | None = None,
    angle_units: str | None = None,
    fourier: dict | None = None,
    mask_nonfinite: bool = False,
    signal_units: str | None = None,
    variable: str | None = None,
    wavelength_jacobian: bool = True,
    dark=None,
    mask_saturated: bool = False,
    **reader_options,
) -> xr.DataArray:
    """Load an angle-resolved map into the canonical form.

    Parameters
    ----------
    path
        netCDF/HDF5, ``.npz`` or a text matrix (see the reader modules).
    reader
        ``"netcdf"``, ``"npz"``, ``"matrix"`` or ``"csv"``; default: from the content.
    kind
        ``"emission"``, ``"reflectance"`` or ``"transmission"``; default: the file's
        ``kind`` attribute, else the signal's name, else emission.
    wavelength_medium
        ``"vacuum"`` or ``"air"``: what a wavelength axis refers to.  Default: the
        file's ``wavelength_medium`` attribute, else vacuum.  Recorded in attrs.
    energy_units, angle_units
        Units of the spectral and angle axes when the file gives none.
    fourier
        Fourier-plane calibration for an axis in pixels: ``{"na": 0.55, "k0_pixel":
        255.0, "pupil_radius_px": 240.0}`` (the last two found from the image when
        missing); default: file attributes of the same names.
    mask_nonfinite
        Mask NaN/Inf signal values as NaN (``attrs["masked"] = 1``) instead of
        refusing them.
    signal_units
        Units of the signal when the file gives none.
    variable
        Name of the signal variable when the file holds several.
    wavelength_jacobian
        Scale emission densities on a wavelength axis by |d lambda / d E| (default);
        ``False`` keeps the file's values.  The factor per pixel is kept as the
        coordinate ``jacobian``; ``gain``, ``read_noise`` and ``saturation`` stay in raw
        counts (see :func:`polkit.data.camera.detector_variance_terms`).
    dark
        Camera offset subtracted from the raw counts before any conversion: a number
        (counts) or a dark-frame file on the same raw axes.  Default: the file's
        ``camera_offset`` (or ``dark``) attribute, if any.
    mask_saturated
        Mask clipped pixels found on the raw counts (declared ``saturation``, converter
        full scale, flat tops; :func:`polkit.data.camera.find_saturated_raw`).
    **reader_options
        Options of the chosen reader (matrix: ``rows``, ``columns``; csv:
        ``delimiter``).

    Returns
    -------
    xarray.DataArray
        A validated canonical map; the camera steps are counted in
        ``attrs["preprocessing"]`` (JSON text).

    Raises
    ------
    DataError
        For anything wrong with the file, naming the file and the field.
    ConfigError
        For unknown reader options or a bad Fourier calibration.
    """
    raw, name = read_raw(path, reader, **reader_options)
    return raw_to_map(
        raw,
        path=path,
        reader=name,
        kind=kind,
        wavelength_medium=wavelength_medium,
        energy_units=energy_units,
        angle_units=angle_units,
        fourier=fourier,
        mask_nonfinite=mask_nonfinite,
        wavelength_jacobian=wavelength_jacobian,
        variable=variable,
        signal_units=signal_units,
        dark=dark,
        mask_saturated=mask_saturated,
    )


def load_series(
    path,
    *,
    reader: str | None = None,
    wavelength_medium: str | None = None,
    energy_units: str | None = None,
    angle_units: str | None = None,
    fourier: dict | None = None,
    mask_nonfinite: bool = False,
    signal_units: str | None = None,
    variable: str | None = None,
    wavelength_jacobian: bool = True,
    **reader_options,
) -> xr.Dataset:
    """Load a pump-power series (a table of per-power results, or a spectra cube).

    Parameters
    ----------
    path
        A CSV table (``power [mW]``, ``intensity [counts]``, optional
        ``peak_energy [eV]`` or ``wavelength [nm]``, ``linewidth [meV]``, ``*_error``,
        ``sweep``), or a netCDF/HDF5/``.npz`` file holding such columns or a cube.
    reader, wavelength_medium, energy_units, angle_units, fourier, mask_nonfinite,
    signal_units, variable, wavelength_jacobian, **reader_options
        As for :func:`load_map` (cubes use the axis options; tables use the medium
        for a peak-wavelength column).

    Returns
    -------
    xarray.Dataset
        A validated canonical series (see :mod:`polkit.data.schema` for the choice
        between dims ``power`` and ``point``).

    Raises
    ------
    DataError
        For anything wrong with the file, naming the file and the field.
    """
    raw, name = read_raw(path, reader, **reader_options)
    return raw_to_series(
        raw,
        path=path,
        reader=name,
        wavelength_medium=wavelength_medium,
        energy_units=energy_units,
        angle_units=angle_units,
        fourier=fourier,
        mask_nonfinite=mask_nonfinite,
        wavelength_jacobian=wavelength_jacobian,
        variable=variable,
        signal_units=signal_units,
    )

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

from polkit.data import preprocess as _preprocess
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
from polkit.data.inspect import describe_file
from polkit.data.options import MAP_FIELDS, SERIES_FIELDS, LoadOptions, loader_options
from polkit.data.preprocess import *  # noqa: F403  (crop, bin_map, ...: its __all__)
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
    "describe_file",
    "CameraOptions",
    "ExcludeWindow",
    "parse_exclude",
    "detector_variance_terms",
    "prepare_camera_map",
    "mask_spikes",
    "mask_windows",
    "find_spikes",
    "mask_saturated_map",
    *_preprocess.__all__,
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


def load_map(path, options: LoadOptions | None = None, **changes) -> xr.DataArray:
    """Load an angle-resolved map into the canonical form.

    Parameters
    ----------
    path
        netCDF/HDF5, ``.npz`` or a text matrix (see the reader modules).
    options
        A :class:`LoadOptions` (or a dict of its fields); default: all defaults.  Its
        fields ``reader``, ``kind``, ``wavelength_medium``, ``energy_units``,
        ``angle_units``, ``signal_units``, ``variable``, ``fourier``, ``mask_nonfinite``,
        ``wavelength_jacobian``, ``dark``, ``mask_saturated`` and ``reader_options`` are
        used (see :class:`LoadOptions` for what each means); a job's windows and camera
        are not the loader's business and are left alone.
    **changes
        Field values that replace those of ``options`` (``kind="reflectance"``,
        ``dark=12.0`` ...); any other name is an option of the chosen reader (matrix:
        ``rows``, ``columns``; csv: ``delimiter``).

    Returns
    -------
    xarray.DataArray
        A validated canonical map; the camera steps are counted in
        ``attrs["preprocessing"]`` (JSON text).  Emission on a wavelength axis is scaled by
        |d lambda / d E| unless ``wavelength_jacobian=False``; the factor per pixel is kept
        as the coordinate ``jacobian``, while ``gain``, ``read_noise`` and ``saturation``
        stay in raw counts (see :func:`polkit.data.camera.detector_variance_terms`).

    Raises
    ------
    DataError
        For anything wrong with the file, naming the file and the field.
    ConfigError
        For unknown reader options or a bad Fourier calibration.
    """
    opts = loader_options(options, changes, MAP_FIELDS)
    raw, name = read_raw(path, opts.reader, **opts.reader_options)
    return raw_to_map(raw, opts, path=path, reader=name)


def load_series(path, options: LoadOptions | None = None, **changes) -> xr.Dataset:
    """Load a pump-power series (a table of per-power results, or a spectra cube).

    Parameters
    ----------
    path
        A CSV table (``power [mW]``, ``intensity [counts]``, optional
        ``peak_energy [eV]`` or ``wavelength [nm]``, ``linewidth [meV]``, ``*_error``,
        ``sweep``), or a netCDF/HDF5/``.npz`` file holding such columns or a cube.
    options, **changes
        As for :func:`load_map`, without ``kind``, ``dark`` and ``mask_saturated`` (as
        keywords these are reader options, which the readers refuse); cubes use the
        axis options, tables use the medium for a peak-wavelength column.

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
    opts = loader_options(options, changes, SERIES_FIELDS)
    raw, name = read_raw(path, opts.reader, **opts.reader_options)
    return raw_to_series(raw, opts, path=path, reader=name)

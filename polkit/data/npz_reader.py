"""NumPy ``.npz`` archives of named arrays, always read with ``allow_pickle=False``.

Expected members: the signal (``signal``, ``intensity``, ``counts`` or ``reflectance``),
its axes (``angle``/``k``/``pixel`` and ``energy``/``wavelength``/``wavenumber``, or
``power``), optional ``units_<name>`` strings and ``dims_<name>`` axis lists, and 0-d
attributes; a table of 1-D columns for a power series.  See
:mod:`polkit.data.named_arrays` for the rules.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import xarray as xr

from polkit.data.named_arrays import arrays_to_raw
from polkit.errors import DataError

__all__ = ["read"]

logger = logging.getLogger(__name__)


def read(path) -> xr.Dataset:
    """Read an ``.npz`` archive into a raw dataset.

    Raises
    ------
    DataError
        For empty or corrupt archives, pickled (object) members and shape problems.
    """
    path_obj = Path(path)
    if path_obj.stat().st_size == 0:
        raise DataError(
            "expected an .npz archive; found an empty file. Fix: check the export",
            path=path,
            field="file",
        )
    arrays = {}
    try:
        with np.load(path_obj, allow_pickle=False) as archive:
            for name in archive.files:
                arrays[name] = np.asarray(archive[name])
    except ValueError as exc:
        if "pickle" in str(exc).lower():
            raise DataError(
                "expected plain numeric or string arrays; found a member that needs pickle "
                "(object dtype), which polkit never loads. Fix: save plain arrays "
                "(np.savez(..., signal=np.asarray(x, float)))",
                path=path,
                field="file",
            ) from None
        raise _corrupt(path, exc) from None
    except Exception as exc:  # noqa: BLE001 - zipfile/numpy raise many types on corrupt archives
        raise _corrupt(path, exc) from None
    logger.debug("read %d arrays from %s", len(arrays), path)
    return arrays_to_raw(arrays, path=path)


def _corrupt(path, exc) -> DataError:
    return DataError(
        f"expected a readable .npz archive; found a file numpy cannot read "
        f"({type(exc).__name__}: {exc}). Fix: re-save it with numpy.savez",
        path=path,
        field="file",
    )

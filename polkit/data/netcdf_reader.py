"""netCDF-4 / HDF5 files (and classic netCDF-3) through xarray; plain HDF5 through h5py.

A netCDF file (one with dimension scales) is opened with xarray's ``h5netcdf`` engine
(``scipy`` for classic netCDF-3), fully loaded, and closed.  Units come from the CF
``units`` attributes; the signal is found later by name (``signal``, ``intensity``,
``counts``, ``reflectance``, ``transmission``) or as the single 2-D variable.

A plain HDF5 file written with h5py (named datasets with ``units`` attributes, no
dimension scales) is read dataset by dataset and treated like an ``.npz`` archive
(see :mod:`polkit.data.named_arrays`); root attributes become attributes.
"""

from __future__ import annotations

import logging
from pathlib import Path

import numpy as np
import xarray as xr

from polkit.data.named_arrays import arrays_to_raw
from polkit.errors import DataError

__all__ = ["read", "HDF5_MAGIC", "CDF_MAGICS"]

logger = logging.getLogger(__name__)

HDF5_MAGIC = b"\x89HDF\r\n\x1a\n"
CDF_MAGICS = (b"CDF\x01", b"CDF\x02", b"CDF\x05")


def _unreadable(path, exc) -> DataError:
    return DataError(
        f"expected a readable netCDF/HDF5 file; found one that cannot be read "
        f"({type(exc).__name__}: {exc}). "
        "Fix: check the file is complete and not a different format",
        path=path,
        field="file",
    )


def _decode(value):
    if isinstance(value, bytes):
        return value.decode("utf-8", "replace")
    if isinstance(value, np.ndarray) and value.dtype.kind in "SO" and value.size == 1:
        return _decode(value.reshape(()).item())
    if isinstance(value, np.generic):
        return value.item()
    return value


def _is_netcdf4(h5file) -> bool:
    if "_NCProperties" in h5file.attrs:
        return True
    found = []

    def visit(_name, obj):
        if hasattr(obj, "attrs") and _decode(obj.attrs.get("CLASS", b"")) == "DIMENSION_SCALE":
            found.append(True)
            return True
        return None

    h5file.visititems(visit)
    return bool(found)


def _read_plain_hdf5(h5file, path) -> xr.Dataset:
    import h5py

    arrays, units = {}, {}

    def visit(name, obj):
        if not isinstance(obj, h5py.Dataset):
            return
        key = name.rsplit("/", 1)[-1]
        if key in arrays:
            raise DataError(
                f"expected distinct dataset names; found {key!r} twice (in groups). "
                "Fix: rename one of them",
                path=path,
                field=key,
            )
        if h5py.check_string_dtype(obj.dtype) is not None:
            arrays[key] = np.asarray(obj.asstr()[()], dtype=str)
        else:
            arrays[key] = np.asarray(obj[()])
        if "units" in obj.attrs:
            units[key] = str(_decode(obj.attrs["units"]))

    h5file.visititems(visit)
    attrs = {k: _decode(v) for k, v in h5file.attrs.items()}
    attrs = {k: v for k, v in attrs.items() if isinstance(v, (str, int, float))}
    return arrays_to_raw(arrays, units=units, attrs=attrs, path=path)


def read(path) -> xr.Dataset:
    """Read a netCDF or HDF5 file into a raw dataset.

    Raises
    ------
    DataError
        For empty, truncated or foreign files.
    """
    path_obj = Path(path)
    with open(path_obj, "rb") as fh:
        head = fh.read(8)
    if not head:
        raise DataError(
            "expected a netCDF/HDF5 file; found an empty file. Fix: check the export",
            path=path,
            field="file",
        )
    if head.startswith(CDF_MAGICS):
        engine = "scipy"
    elif head == HDF5_MAGIC:
        import h5py

        try:
            with h5py.File(path_obj, "r") as h5file:
                if not _is_netcdf4(h5file):
                    return _read_plain_hdf5(h5file, path)
        except DataError:
            raise
        except Exception as exc:  # noqa: BLE001 - h5py raises many types on corrupt files
            raise _unreadable(path, exc) from None
        engine = "h5netcdf"
    else:
        raise DataError(
            f"expected a netCDF/HDF5 file (it starts with {HDF5_MAGIC!r} or b'CDF'); found "
            f"{head[:8]!r}. Fix: pass the right reader= or check the file",
            path=path,
            field="file",
        )
    try:
        with xr.open_dataset(
            path_obj, engine=engine, decode_times=False, decode_timedelta=False
        ) as ds:
            loaded = ds.load()
    except Exception as exc:  # noqa: BLE001 - the engines raise many types on corrupt files
        raise _unreadable(path, exc) from None
    loaded.attrs = {k: _decode(v) for k, v in loaded.attrs.items()}
    logger.debug("read %s with engine %s", path, engine)
    return loaded

"""Turn a reader's raw dataset into a canonical power series.

A *table* (1-D columns: CSV, ``.npz``/HDF5/netCDF columns) is matched column by column:
``power`` (or ``pump_power``), ``intensity`` (``counts``, ``signal``), ``peak_energy``
(``energy``, ``peak``, or a ``wavelength``/``peak_wavelength`` column converted with
E = hc/lambda), ``linewidth`` (``fwhm``, ``width``; given in nm it is converted at the
peak wavelength with dE = |dE/d lambda| d lambda), their ``*_error`` (``*_err``,
``*_std``) columns, and ``sweep`` (``direction``).  Other columns with units are kept
as they are; other columns without units are dropped with a warning.  A *cube* (a
signal with power and spectral axes) is handled by :mod:`polkit.data.assemble`.
See :mod:`polkit.data.schema` for the choice between dims ``power`` and ``point``.
"""

from __future__ import annotations

import logging
from dataclasses import dataclass

import numpy as np
import xarray as xr

from polkit import units as U
from polkit.data.assemble import (
    _SPECTRAL_FIX,
    _carried,
    _choose_medium,
    _float_signal,
    _mask,
    _warn,
    cube_to_series,
    raw_content,
)
from polkit.data.build import make_series
from polkit.data.options import LoadOptions
from polkit.data.roles import COLUMN_ALIASES as _COLUMN_ALIASES
from polkit.data.roles import ERROR_SUFFIXES as _ERROR_SUFFIXES
from polkit.data.schema import append_history
from polkit.errors import DataError

__all__ = ["raw_to_series"]

logger = logging.getLogger(__name__)


def _canonical_column(name: str) -> tuple[str, bool] | None:
    key = name.lower()
    for suffix in _ERROR_SUFFIXES:
        if key.endswith(suffix) and key[: -len(suffix)] in _COLUMN_ALIASES:
            return _COLUMN_ALIASES[key[: -len(suffix)]], True
    if key in _COLUMN_ALIASES:
        return _COLUMN_ALIASES[key], False
    return None


def _table_columns(raw: xr.Dataset, *, path) -> dict[str, xr.DataArray]:
    columns = {}
    dims = set()
    for name in list(raw.data_vars) + [c for c in raw.coords]:
        var = raw[name]
        if var.ndim != 1:
            raise DataError(
                f"expected 1-D table columns; found {name!r} with dims {var.dims}. Fix: store a "
                "table of columns, or a spectra cube with power and energy axes",
                path=path,
                field=str(name),
            )
        dims.add(var.dims[0])
        columns[str(name)] = var
    if len(dims) > 1:
        raise DataError(
            f"expected columns on one dimension; found dims {sorted(map(str, dims))}",
            path=path,
            field="file",
        )
    return columns


def _require_units(var, name, *, path, example) -> str:
    u = var.attrs.get("units")
    if not isinstance(u, str) or not u.strip():
        raise DataError(
            f"expected units for column {name!r}; found none. Fix: write the header as "
            f"'{name} [{example}]' (or set a 'units' attribute)",
            path=path,
            field=name,
        )
    return u.strip()


def _numeric(var, name, *, path) -> np.ndarray:
    return _float_signal(var.values, path=path, field=name)


@dataclass
class _Table:
    """A raw table's columns, matched to the series quantities they hold."""

    columns: dict[str, xr.DataArray]
    #: (quantity, is an error column) -> column name
    found: dict[tuple[str, bool], str]
    #: columns that are no series quantity
    extras: dict[str, xr.DataArray]

    def col(self, canon: str, err: bool = False):
        """(name, column) of quantity ``canon`` (its error column with ``err``), or (None, None)."""
        name = self.found.get((canon, err))
        return (name, self.columns[name]) if name else (None, None)


def _match_table(raw, *, path) -> _Table:
    columns = _table_columns(raw, path=path)
    found: dict[tuple[str, bool], str] = {}
    extras = {}
    for name in columns:
        canon = _canonical_column(name)
        if canon is None:
            extras[name] = columns[name]
            continue
        if canon in found:
            raise DataError(
                f"expected one column for {canon[0]}{' error' if canon[1] else ''}; found both "
                f"{found[canon]!r} and {name!r}. Fix: remove one",
                path=path,
                field=name,
            )
        found[canon] = name
    for required, example in (("power", "mW"), ("intensity", "counts")):
        if (required, False) not in found:
            raise DataError(
                f"expected a column {required!r}; found columns {list(columns)}. Fix: add a column "
                f"'{required} [{example}]'",
                path=path,
                field=required,
            )
    return _Table(columns, found, extras)


def _intensity_columns(table: _Table, arrays: dict, *, path) -> str:
    """Put the intensity (and its error) in ``arrays``; return the intensity's units."""
    iname, ivar = table.col("intensity")
    iunits = _require_units(ivar, iname, path=path, example="counts")
    arrays["intensity"] = _numeric(ivar, iname, path=path)
    ename, evar = table.col("intensity", True)
    if evar is not None:
        eunits = _require_units(evar, ename, path=path, example=iunits)
        if eunits != iunits:
            raise DataError(
                f"expected the intensity error in the intensity's units {iunits!r}; "
                f"found {eunits!r}",
                path=path,
                field=ename,
            )
        arrays["intensity_error"] = _numeric(evar, ename, path=path)
    return iunits


def _peak_columns(table: _Table, arrays: dict, history: list, *, medium, path):
    """Put the peak energy (and its error) in ``arrays``, converted to eV.

    Returns the wavelength factor of the peak column when it came as a wavelength, else None.
    """
    peak_wavelength = None  # (quantity factor) when the peak came as a wavelength
    name, var = table.col("peak_energy")
    if var is None:
        return peak_wavelength
    u = _require_units(var, name, path=path, example="eV")
    q = U.energy_axis_quantity(u)
    if q is None:
        raise DataError(
            f"expected units of a photon energy or wavelength; found {u!r}. "
            f"Fix: {_SPECTRAL_FIX}",
            path=path,
            field=name,
        )
    values = _numeric(var, name, path=path)
    energy = U.axis_to_ev(values, *q, medium=medium, path=path, field=name)
    arrays["peak_energy"] = energy
    if q[0] == "wavelength":
        peak_wavelength = q[1]
        history.append(f"{name} [{u}, {medium}] -> peak_energy [eV]")
    name_e, var_e = table.col("peak_energy", True)
    if var_e is not None:
        ue = _require_units(var_e, name_e, path=path, example=u)
        qe = U.energy_axis_quantity(ue)
        err = _numeric(var_e, name_e, path=path)
        if qe is not None and qe[0] == "energy":
            arrays["peak_energy_error"] = err * qe[1]
        elif qe is not None and qe[0] == "wavelength" and peak_wavelength is not None:
            jac = U.wavelength_jacobian(energy, qe[1], medium=medium)
            arrays["peak_energy_error"] = err / jac
        else:
            raise DataError(
                f"expected the peak error in energy units (or in the wavelength units of the "
                f"peak column); found {ue!r}",
                path=path,
                field=name_e,
            )
    return peak_wavelength


def _width_columns(table: _Table, arrays: dict, history: list, *, peak_wavelength, medium,
                   path) -> None:
    """Put the linewidth (and its error) in ``arrays``, converted to meV."""
    for canon in ("linewidth",):
        for err in (False, True):
            name, var = table.col(canon, err)
            if var is None:
                continue
            u = _require_units(var, name, path=path, example="meV")
            values = _numeric(var, name, path=path)
            q = U.energy_axis_quantity(u)
            out_name = canon + ("_error" if err else "")
            if q is not None and q[0] == "energy":
                arrays[out_name] = values * q[1] * 1e3
            elif q is not None and q[0] == "wavelength":
                if peak_wavelength is None:
                    raise DataError(
                        f"expected a peak wavelength column to convert a width in {u!r} to meV; "
                        "found none. Fix: add the peak column or give widths in meV",
                        path=path,
                        field=name,
                    )
                jac = U.wavelength_jacobian(arrays["peak_energy"], q[1], medium=medium)
                arrays[out_name] = values / jac * 1e3
                history.append(f"{name} [{u}] -> {out_name} [meV] at the peak wavelength")
            else:
                raise DataError(
                    f"expected linewidth units {U.accepted(U.LINEWIDTH_UNITS)} (or a wavelength "
                    f"unit with a peak wavelength column); found {u!r}",
                    path=path,
                    field=name,
                )


def _sweep_labels(table: _Table, *, path):
    name, var = table.col("sweep")
    if var is None:
        return None
    raw_labels = np.asarray(var.values)
    if raw_labels.dtype.kind not in "SUO":
        raise DataError(
            f"expected 'up'/'down' labels; found values of dtype {raw_labels.dtype}",
            path=path,
            field=name,
        )
    return np.array([str(s).strip().lower() for s in raw_labels.ravel()], dtype=str)


def _extra_columns(extras: dict, *, path) -> dict:
    """Other numeric columns with units, kept as they are; the rest dropped with a warning."""
    extra_vars = {}
    for name, var in extras.items():
        arr = np.asarray(var.values)
        u = var.attrs.get("units")
        if arr.dtype.kind not in "biuf" or not (isinstance(u, str) and u.strip()):
            _warn(
                "column not used by polkit and without units (or not numeric): dropped",
                path,
                name,
                stacklevel=5,
            )
            continue
        extra_vars[name] = (arr.astype(float), u.strip())
    return extra_vars


def _table_to_series(raw, *, path, reader, medium, mask_nonfinite) -> xr.Dataset:
    table = _match_table(raw, path=path)
    history = []
    pname, pvar = table.col("power")
    punits = _require_units(pvar, pname, path=path, example="mW")
    power = U.power_to_mw(_numeric(pvar, pname, path=path), punits, path=path, field=pname)
    if punits != "mW":
        history.append(f"{pname} [{punits}] -> power [mW]")
    arrays = {}
    iunits = _intensity_columns(table, arrays, path=path)
    peak_wavelength = _peak_columns(table, arrays, history, medium=medium, path=path)
    _width_columns(table, arrays, history, peak_wavelength=peak_wavelength, medium=medium,
                   path=path)
    sweep = _sweep_labels(table, path=path)
    extra_vars = _extra_columns(table.extras, path=path)
    attrs = _carried(raw.attrs, {}, path=path)
    n_masked = 0
    for key in list(arrays):
        arrays[key], n_bad = _mask(arrays[key], mask_nonfinite, path=path, field=key)
        n_masked += n_bad if mask_nonfinite else 0
    if not np.all(np.isfinite(power)):
        raise DataError(
            "expected a finite power in every row; found NaN/Inf (or an empty cell). Fix: fill in "
            "every power",
            path=path,
            field=pname,
        )
    attrs["masked"] = 1 if n_masked else int(attrs.get("masked", 0))
    if "peak_energy" in arrays and peak_wavelength is not None:
        attrs["wavelength_medium"] = medium
    attrs["source"] = str(path)
    attrs = append_history(
        attrs, f"loaded {path} ({reader} reader): " + "; ".join(history or ["no conversion"])
    )
    ds = make_series(
        power,
        arrays.pop("intensity"),
        units=iunits,
        sweep=sweep,
        extra_variables=extra_vars,
        **arrays,
        **attrs,
    )
    return ds


def raw_to_series(
    raw: xr.Dataset, options: LoadOptions | None = None, *, path, reader: str, **changes
) -> xr.Dataset:
    """Build and validate a canonical series from a raw dataset (see ``load_series``).

    ``options`` is a :class:`polkit.data.LoadOptions` (or a dict of its fields), ``changes``
    replace its fields; ``kind``, ``dark``, ``mask_saturated``, the reader's options and a
    job's windows and camera are not used.
    """
    opts = LoadOptions.of(options, **changes)
    medium = _choose_medium(opts.wavelength_medium, raw.attrs, path=path)
    content = raw_content(raw)
    if content == "map":
        raise DataError(
            "expected a power series (a table with a power column, or a cube with a power axis); "
            "found a 2-D map without a power axis. Fix: use polkit.data.load_map",
            path=path,
            field="power",
        )
    if content == "cube":
        return cube_to_series(raw, opts, path=path, reader=reader, medium=medium)
    return _table_to_series(
        raw, path=path, reader=reader, medium=medium, mask_nonfinite=opts.mask_nonfinite
    )

"""The loader's camera steps on raw counts (used by :mod:`polkit.data.assemble`).

Saturation is judged on the file's raw counts before the camera offset, and the offset is
subtracted before any unit conversion (see :mod:`polkit.data.camera`); the Jacobian factor
per pixel becomes the ``jacobian`` coordinate.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import xarray as xr

from polkit.data import camera as C
from polkit.errors import DataError

__all__ = ["camera_step", "jacobian_coord", "record_lines"]


def _assemble():
    from polkit.data import assemble

    return assemble


def jacobian_coord(attrs: dict) -> dict:
    """The ``jacobian`` coordinate (popped from the private attrs), or nothing."""
    jac = attrs.pop("_jacobian_values", None)
    units = attrs.pop("_jacobian_units", None)
    if jac is None:
        return {}
    return {
        "jacobian": (
            "energy",
            np.asarray(jac, dtype=float),
            {"units": units, "long_name": "|d lambda/d E| applied per pixel (signal = "
             "jacobian * raw counts)"},
        )
    }


def _offset_source(dark, attrs: dict, *, path):
    """(what, value) of the offset to subtract: the option, else a file attribute."""
    if dark is not None:
        declared = [k for k in C.OFFSET_ATTRS if k in attrs]
        if declared:
            _assemble()._warn(
                f"the file declares {declared[0]} = {attrs[declared[0]]!r}; using the "
                "requested dark instead",
                path,
                declared[0],
            )
        return "option", dark
    if "offset_subtracted" in attrs:
        return None, None
    for key in C.OFFSET_ATTRS:
        if key in attrs:
            value = attrs[key]
            try:
                return f"file attribute {key}", float(str(value).split()[0])
            except (ValueError, IndexError):
                raise DataError(
                    f"expected a camera offset in counts; found {value!r}. Fix: write e.g. "
                    f"'{key}: 100' (counts)",
                    path=path,
                    field=key,
                ) from None
    return None, None


def _dark_frame(dark, var: xr.DataArray, *, path) -> np.ndarray:
    """A dark-frame file's raw values, checked against the map's raw axes."""
    from polkit.data.registry import read_raw

    if not Path(dark).is_file():
        raise DataError(
            "expected a dark-frame file (--dark FILE, or a number of counts: --dark 100); "
            "found nothing at this path. Fix: check the path",
            path=dark,
            field="dark",
        )
    raw_d, _ = read_raw(dark, None)
    name = _assemble().find_signal(raw_d, path=dark)
    d = raw_d[name]
    d = d.isel({k: 0 for k in d.dims if d.sizes[k] == 1 and k not in var.dims})
    fix = "record the dark frame with the same camera settings and axes as the map"
    if d.dims != var.dims or d.shape != var.shape:
        raise DataError(
            f"expected a dark frame with axes {dict(var.sizes)} like {path}; found "
            f"{dict(d.sizes)}. Fix: {fix}",
            path=dark,
            field="dark",
        )
    for dim in var.dims:
        if dim in var.coords and dim in d.coords:
            a, b = np.asarray(var[dim].values, float), np.asarray(d[dim].values, float)
            if not np.allclose(a, b, rtol=1e-9, atol=0):
                raise DataError(
                    f"expected the dark frame on the same {dim!r} axis as {path}; found other "
                    f"values. Fix: {fix}",
                    path=dark,
                    field=dim,
                )
    values = _assemble()._float_signal(d.values, path=dark, field=name)
    if not np.all(np.isfinite(values)):
        raise DataError("expected a finite dark frame; found NaN/Inf", path=dark, field=name)
    return values


def camera_step(raw_attrs: dict, *, dark, mask_saturated: bool, path, record: dict):
    """The raw-count step of the loader: saturation (before the offset), then the offset."""

    def step(signal: np.ndarray, var: xr.DataArray, spectral_axis: int) -> np.ndarray:
        attrs = {**raw_attrs, **var.attrs}
        if mask_saturated and np.all(np.isfinite(signal)):  # file NaN: refused as before
            level = attrs.get("saturation")
            level = None if level is None else _assemble()._number(level, "saturation", path=path)
            hit, reasons = C.find_saturated_raw(
                signal, energy_axis=spectral_axis, saturation=level, integer_dtype=var.dtype
            )
            record["saturated"] = {"pixels": int(hit.sum()), "reasons": reasons}
            if hit.any():
                signal = np.where(hit, np.nan, signal)
        what, value = _offset_source(dark, attrs, path=path)
        if what is None:
            return signal
        if isinstance(value, (int, float, np.floating, np.integer)):
            value = float(value)
            if not np.isfinite(value):
                raise DataError(f"expected a finite camera offset; found {value!r}",
                                path=path, field="dark")
            frame, label = value, f"level {value:g} counts ({what})"
        else:
            frame = _dark_frame(value, var, path=path)
            label = f"dark frame {value}"
        record["offset"] = {"what": label, "median_counts": float(np.median(frame))}
        return signal - frame

    return step


def record_lines(attrs: dict, record: dict) -> list[str]:
    """Store the loader's camera steps in ``attrs`` (in place); history lines for them."""
    lines = []
    if "offset" in record:
        attrs["offset_subtracted"] = record["offset"]["median_counts"]
        attrs.update(C.record_step(attrs, "offset", record["offset"]))
        lines.append(f"camera offset subtracted in raw counts before conversion: "
                     f"{record['offset']['what']}")
    if "saturated" in record:
        attrs.update(C.record_step(attrs, "saturated", record["saturated"]))
        lines.append(f"{record['saturated']['pixels']} saturated pixel(s) masked on the raw "
                     "counts")
    return lines

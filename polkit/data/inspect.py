"""Describe a data file in a few readable lines (the quick-look figure: polkit.plotting.inspect)."""

from __future__ import annotations

import logging
import warnings
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr

from polkit.data.camera import describe_record, preprocessing_record
from polkit.data.schema import MAP_NUMBER_ATTRS

__all__ = ["Inspection", "examine", "describe_file", "describe"]

logger = logging.getLogger(__name__)


def _range(values, units: str) -> str:
    v = np.asarray(values, dtype=float)
    v = v[np.isfinite(v)]
    if v.size == 0:
        return "no finite values"
    text = f"{v.min():.6g} .. {v.max():.6g} {units}".rstrip()
    return text


def _axis_line(da_or_ds, dim: str) -> str:
    c = da_or_ds[dim]
    units = c.attrs.get("units", "")
    line = f"  {dim}: {c.size} values, {_range(c.values, units)}"
    if c.size > 1:
        d = np.diff(np.asarray(c.values, dtype=float))
        line += f", step {np.median(d):.4g} {units}"
        if not np.allclose(d, d[0], rtol=1e-6, atol=0):
            line += " (non-uniform)"
    return line


def _attr_lines(attrs: dict, skip=("history", "units", "source", "preprocessing")) -> list[str]:
    lines = []
    for key in sorted(attrs):
        if key in skip:
            continue
        value = attrs[key]
        if isinstance(value, np.ndarray):
            value = np.array2string(value, precision=6)
        units = MAP_NUMBER_ATTRS.get(key, ("1",))[0]
        suffix = "" if units == "1" else f" {units}"
        lines.append(f"  {key}: {value}{suffix}")
    return lines


def describe(obj: xr.DataArray | xr.Dataset) -> list[str]:
    """Readable lines describing a canonical map or series."""
    lines = []
    if isinstance(obj, xr.DataArray):
        lines.append(f"content: {obj.attrs.get('kind', '?')} map")
        lines.append("dims: " + " x ".join(f"{d} ({obj.sizes[d]})" for d in obj.dims))
        lines += [_axis_line(obj, d) for d in obj.dims]
        v = obj.values
        n_nan = int(np.isnan(v).sum())
        lines.append(
            f"signal [{obj.attrs.get('units', '')}]: min {np.nanmin(v):.6g}, median "
            f"{np.nanmedian(v):.6g}, max {np.nanmax(v):.6g}; masked pixels {n_nan}"
        )
    else:
        inten = obj["intensity"]
        cube = "energy" in inten.dims
        lines.append("content: power series " + ("(spectra cube)" if cube else "(table)"))
        lines.append("dims: " + " x ".join(f"{d} ({obj.sizes[d]})" for d in inten.dims))
        if cube:
            lines += [_axis_line(obj, d) for d in inten.dims]
        else:
            lines.append(
                f"  power: {obj['power'].size} values, {_range(obj['power'].values, 'mW')}"
            )
            if "sweep" in obj.variables:
                labels, counts = np.unique(
                    np.asarray(obj["sweep"].values, dtype=str), return_counts=True
                )
                lines.append(
                    "  sweep: "
                    + ", ".join(f"{n} {lab}" for lab, n in zip(labels, counts, strict=True))
                )
        for name in obj.data_vars:
            var = obj[name]
            lines.append(
                f"variable {name} [{var.attrs.get('units', '')}]: {_range(var.values, '')}"
            )
    if "jacobian" in obj.coords:
        j = obj["jacobian"]
        lines.append(f"  jacobian (per energy): {_range(j.values, j.attrs.get('units', ''))}; "
                     f"raw units {obj.attrs.get('raw_units', '?')}")
    rec = preprocessing_record(obj)
    if rec:
        lines.append("camera steps:")
        lines += [f"  {line}" for line in describe_record(rec)]
    attr_lines = _attr_lines(dict(obj.attrs))
    if attr_lines:
        lines.append("attributes:")
        lines += attr_lines
    history = obj.attrs.get("history")
    if history:
        lines.append("history:")
        lines += [f"  {h}" for h in str(history).splitlines()]
    return lines


@dataclass(frozen=True)
class Inspection:
    """A data file loaded for a look: the canonical object and what loading it said."""

    path: Any
    #: name of the reader that read the file
    reader: str
    #: the canonical map or series
    obj: xr.DataArray | xr.Dataset
    #: the warnings loading it raised (``warnings.WarningMessage``)
    caught: list = field(default_factory=list)

    def lines(self) -> list[str]:
        """The description: file, reader, :func:`describe` and the warnings."""
        lines = [f"file: {self.path}", f"reader: {self.reader}"]
        lines += describe(self.obj)
        if self.caught:
            lines.append("warnings:")
            lines += [f"  {w.category.__name__}: {w.message}" for w in self.caught]
        else:
            lines.append("warnings: none")
        return lines


def examine(path, *, camera=None, **load_options) -> Inspection:
    """Load any data file (map or series, found from its content) and keep its warnings.

    Parameters
    ----------
    path
        Any file :func:`polkit.data.load_map` or :func:`polkit.data.load_series` reads.
    camera
        A :class:`polkit.data.CameraOptions`: for a map, apply the camera steps (offset,
        saturation, spikes, excluded windows), so that the description says what they masked.
    **load_options
        Passed to the loader (``energy_units=``, ``fourier=`` ...).

    Raises
    ------
    DataError
        When the file cannot be loaded (the message says why).
    """
    from polkit.data import load_map, load_series
    from polkit.data.assemble import raw_content
    from polkit.data.registry import read_raw

    reader_options = {
        k: load_options.pop(k) for k in ("rows", "columns", "delimiter") if k in load_options
    }
    raw, reader = read_raw(path, load_options.pop("reader", None), **reader_options)
    content = raw_content(raw)
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        if content == "map":
            if camera is not None:
                load_options.setdefault("dark", camera.dark)
                load_options.setdefault("mask_saturated", camera.mask_saturated)
            obj = load_map(path, reader=reader, **load_options, **reader_options)
            if camera is not None:
                from polkit.data.spikes import prepare_camera_map

                obj = prepare_camera_map(obj, camera)
        else:
            obj = load_series(path, reader=reader, **load_options, **reader_options)
    return Inspection(path, reader, obj, list(caught))


def describe_file(path, *, camera=None, **load_options) -> str:
    """Describe a data file: kind, dims, ranges, units, attributes and warnings.

    Arguments as for :func:`examine`; a quick-look figure is drawn by
    :func:`polkit.plotting.inspect.inspect_file`.

    Returns
    -------
    str
        A multi-line description.
    """
    return "\n".join(examine(path, camera=camera, **load_options).lines())

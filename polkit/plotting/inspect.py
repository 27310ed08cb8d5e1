"""The quick-look figure of a data file (``polkit inspect --png``)."""

from __future__ import annotations

import numpy as np
import xarray as xr

from polkit.data.inspect import examine
from polkit.files import save_figure

__all__ = ["inspect_file", "quick_look_figure"]


def quick_look_figure(obj):
    """A map as angle vs energy (pcolormesh), or a series as intensity vs power (log-log)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(6.0, 4.5))
    FigureCanvasAgg(fig)
    ax = fig.add_subplot()
    if isinstance(obj, xr.DataArray):
        dim = obj.dims[0]
        mesh = ax.pcolormesh(
            obj[dim].values, obj["energy"].values, obj.values.T, shading="auto", cmap="magma"
        )
        fig.colorbar(mesh, ax=ax, label=f"signal [{obj.attrs.get('units', '')}]")
        ax.set_xlabel(f"{obj[dim].attrs.get('long_name', dim)} [{obj[dim].attrs['units']}]")
        ax.set_ylabel("photon energy [eV]")
        ax.set_title(f"{obj.attrs.get('kind', '')} map")
    else:
        inten = obj["intensity"]
        units = inten.attrs.get("units", "")
        if "energy" in inten.dims:
            y = inten.sum(dim=[d for d in inten.dims if d != "power"], skipna=True).values
            groups = [("integrated spectra", obj["power"].values, y)]
        elif "sweep" in obj.variables:
            sweep = np.asarray(obj["sweep"].values, dtype=str)
            groups = [
                (f"{lab} sweep", obj["power"].values[sweep == lab], inten.values[sweep == lab])
                for lab in ("up", "down")
                if np.any(sweep == lab)
            ]
        else:
            groups = [("intensity", obj["power"].values, inten.values)]
        for label, p, y in groups:
            keep = (p > 0) & (y > 0) & np.isfinite(y)
            ax.loglog(p[keep], y[keep], "o-", ms=3, label=label)
        ax.set_xlabel("pump power [mW]")
        ax.set_ylabel(f"intensity [{units}]")
        ax.legend()
        ax.set_title("power series")
    return fig


def inspect_file(path, *, png=None, camera=None, **load_options) -> str:
    """Describe a data file: kind, dims, ranges, units, attributes and warnings.

    Parameters
    ----------
    path
        Any file :func:`polkit.data.load_map` or :func:`polkit.data.load_series` reads.
    png
        When given, a quick-look figure is written there atomically: the map as
        angle vs energy (pcolormesh), or the series as intensity vs power (log-log).
    camera
        A :class:`polkit.data.CameraOptions`: for a map, apply the camera steps (offset,
        saturation, spikes, excluded windows) and print what they masked.
    **load_options
        Passed to the loader (``energy_units=``, ``fourier=`` ...).

    Returns
    -------
    str
        A multi-line description (:func:`polkit.data.inspect.describe_file`), and the
        figure's path when one was written.

    Raises
    ------
    DataError
        When the file cannot be loaded (the message says why).
    """
    inspection = examine(path, camera=camera, **load_options)
    lines = inspection.lines()
    if png is not None:
        fig = quick_look_figure(inspection.obj)
        save_figure(png, fig)
        lines.append(f"quick-look figure: {png}")
    return "\n".join(lines)

"""Figures of the line fits: a peak table over its map, and the observables of a power series.

The figures are bare :class:`matplotlib.figure.Figure` objects (drawn with Agg whatever
pyplot's backend is, never opening a window); save them with :func:`polkit.files.save_figure`.
"""

from __future__ import annotations

import numpy as np
import xarray as xr

from polkit.linefit.inputs import ANGLE_DIMS, SERIES_DIMS
from polkit.linefit.observables import series_spectra
from polkit.models.lineshapes import lorentzian, voigt

__all__ = ["plot_peak_table", "plot_extraction"]


def _line_model(energy: np.ndarray, background, lines, profile: str, sign: float):
    """Background plus lines (energy eV, centre eV, widths meV, area signal x meV)."""
    x = 1e3 * np.asarray(energy, dtype=float)
    model = np.full(x.size, float(background))
    for centre, fwhm, fwhm_l, sigma_g, area in lines:
        if profile == "voigt":
            model += sign * voigt(x, 1e3 * centre, fwhm_l, sigma_g, area)
        else:
            model += sign * lorentzian(x, 1e3 * centre, fwhm, area)
    return model


def _table_lines(table: xr.Dataset, i: int, adim: str):
    rows = []
    sel = table.isel({adim: i})
    for s in range(table.sizes["peak"]):
        if int(sel["found"].values[s]):
            fl = float(sel["fwhm_lorentzian"].values[s]) if "fwhm_lorentzian" in sel else 0.0
            sg = float(sel["sigma_gaussian"].values[s]) if "sigma_gaussian" in sel else 0.0
            rows.append((float(sel["energy"].values[s]), float(sel["fwhm"].values[s]), fl, sg,
                         float(sel["area"].values[s])))
    return rows


def _figure(n_panels: int, width: float = 5.0):
    # a bare Figure draws with Agg whatever pyplot's backend is, and never opens a window
    from matplotlib.figure import Figure

    fig = Figure(figsize=(width * n_panels, 4.0), layout="constrained")
    return fig, [fig.add_subplot(1, n_panels, k + 1) for k in range(n_panels)]


def plot_peak_table(map: xr.DataArray, table: xr.Dataset, ax=None, *,
                    n_examples: int = 3):
    """Draw the map with the fitted line centres (error bars) and a few fitted spectra.

    Parameters
    ----------
    map
        The map given to :func:`polkit.linefit.peak_table`.
    table
        Its result.
    ax
        A matplotlib Axes for the map panel alone; by default a new figure with the map and
        ``n_examples`` example spectra (data and fitted lines, offset for clarity).
    n_examples
        Number of example spectra in the second panel.

    Returns
    -------
    matplotlib.figure.Figure
        The figure drawn on (not shown; save it with :func:`polkit.files.save_figure`).
    """
    adim = next(d for d in table.dims if d in ANGLE_DIMS)
    da = map.transpose(adim, "energy").sortby(adim)
    if ax is None:
        fig, (ax_map, ax_spec) = _figure(2)
    else:
        fig, ax_map, ax_spec = ax.figure, ax, None
    a = da[adim].values
    ax_map.pcolormesh(a, da["energy"].values, da.values.T, shading="auto", cmap="viridis")
    for s in range(table.sizes["peak"]):
        ok = table["found"].values[:, s] == 1
        ax_map.errorbar(table[adim].values[ok], table["energy"].values[ok, s],
                        yerr=table["energy_error"].values[ok, s], fmt="o", ms=2.5, lw=0.8,
                        capsize=0, color=f"C{s + 1}", label=f"line {s}")
    a_units = da[adim].attrs.get("units", "degree" if adim == "angle" else "1/um")
    ax_map.set_xlabel(f"{adim} [{a_units}]")
    ax_map.set_ylabel("energy [eV]")
    ax_map.set_title(f"peak table ({table.attrs.get('profile', '')})")
    ax_map.legend(loc="upper right", fontsize="small")
    if ax_spec is not None:
        sign = -1.0 if table.attrs.get("kind") == "reflectance" else 1.0
        with_lines = np.flatnonzero(table["found"].values.sum(axis=1) > 0)
        picks = with_lines[np.linspace(0, with_lines.size - 1, min(n_examples,
                                                                   with_lines.size)).astype(int)]
        e = da["energy"].values
        offset = 0.0
        for i in picks:
            angle = float(table[adim].values[i])
            y = da.sel({adim: angle}).values
            model = _line_model(e, float(table["background"].values[i]),
                                _table_lines(table, i, adim), table.attrs.get("profile"), sign)
            ax_spec.plot(e, y + offset, ".", ms=2, color="0.4")
            ax_spec.plot(e, model + offset, "-", lw=1.2, label=f"{adim} = {angle:.3g}")
            offset += 1.1 * float(np.nanmax(y) - np.nanmin(y))
        ax_spec.set_xlabel("energy [eV]")
        ax_spec.set_ylabel(f"signal [{da.attrs.get('units', 'arb.')}] (offset)")
        ax_spec.legend(fontsize="small")
    return fig


def plot_extraction(cube: xr.Dataset | xr.DataArray, obs: xr.Dataset, *,
                    n_examples: int = 4):
    """Draw peak energy and intensity against power, and a few spectra with their fits.

    Parameters
    ----------
    cube
        The cube given to :func:`polkit.linefit.extract_observables`.
    obs
        Its result.
    n_examples
        Number of example spectra (spread over the series) in the third panel.

    Returns
    -------
    matplotlib.figure.Figure
        Three panels: peak energy [eV] with errors, intensity (log-log) with errors, spectra.
    """
    window = obs.attrs.get("angle_window")
    da, _ = series_spectra(cube, obs.attrs.get("energy_window"), window)
    sdim = next(d for d in obs.dims if d in SERIES_DIMS)
    power = obs["power"].values if "power" in obs.coords else np.arange(obs.sizes[sdim])
    p_units = obs["power"].attrs.get("units", "mW") if "power" in obs.coords else "index"
    fig, (ax_e, ax_i, ax_s) = _figure(3, 4.2)
    groups = [("all", np.ones(power.size, bool))]
    groups_label = np.full(power.size, "", dtype=object)
    if "sweep" in obs.coords or "sweep" in obs:
        groups_label = np.asarray(obs["sweep"].values).astype(str)
        groups = [(g, groups_label == g) for g in np.unique(groups_label)]
    for k, (label, m) in enumerate(groups):
        ok = m & (obs["found"].values == 1)
        ax_e.errorbar(power[ok], obs["peak_energy"].values[ok],
                      yerr=obs["peak_energy_error"].values[ok], fmt="o-", ms=3, lw=0.8,
                      color=f"C{k}", label=label)
        pos = m & (obs["intensity"].values > 0)
        ax_i.errorbar(power[pos], obs["intensity"].values[pos],
                      yerr=obs["intensity_error"].values[pos], fmt="o-", ms=3, lw=0.8,
                      color=f"C{k}", label=label)
    ax_e.set_xlabel(f"power [{p_units}]")
    ax_e.set_ylabel("peak energy [eV]")
    ax_i.set_xlabel(f"power [{p_units}]")
    ax_i.set_ylabel(f"intensity [{obs['intensity'].attrs.get('units', '')}]")
    if np.any(obs["intensity"].values > 0) and np.all(power > 0):
        ax_i.set_xscale("log")
        ax_i.set_yscale("log")
    ax_e.legend(fontsize="small")
    profile = obs.attrs.get("profile", "lorentzian")
    sign = -1.0 if obs.attrs.get("kind") == "reflectance" else 1.0
    e = da["energy"].values
    picks = np.unique(np.linspace(0, power.size - 1, min(n_examples, power.size)).astype(int))
    for i in picks:
        y = da.values[i]
        scale = float(np.nanmax(np.abs(y))) or 1.0
        lines = []
        if int(obs["found"].values[i]):
            fl = float(obs["fwhm_lorentzian"].values[i]) if "fwhm_lorentzian" in obs else 0.0
            sg = float(obs["sigma_gaussian"].values[i]) if "sigma_gaussian" in obs else 0.0
            lines = [(float(obs["peak_energy"].values[i]), float(obs["linewidth"].values[i]),
                      fl, sg, float(obs["area"].values[i]))]
        model = _line_model(e, float(obs["background"].values[i]), lines, profile, sign)
        ax_s.plot(e, y / scale, ".", ms=2, color="0.4")
        label = f"{power[i]:.3g} {p_units}"
        if len(groups) > 1:
            label += f" ({groups_label[i]})"
        ax_s.plot(e, model / scale, "-", lw=1.2, label=label)
    ax_s.set_xlabel("energy [eV]")
    ax_s.set_ylabel("signal / max")
    ax_s.legend(fontsize="small")
    return fig

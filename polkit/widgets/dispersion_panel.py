"""Interactive first fit of an angle-resolved map: sliders, live branches, MAP, MCMC, save.

:func:`dispersion_panel` returns a :class:`DispersionPanel` that holds every widget, so a
test (or a notebook cell) can drive it from Python exactly as a person does in JupyterLab:
set ``panel.sliders["rabi_splitting"].value``, call ``panel.refine_button.click()``, and
read ``panel.overlay_data()``, ``panel.readout.value`` or ``panel.result``.

What each control does (and the decision it supports):

* the map, on a log or linear colour scale, with an angle (or k) and an energy window:
  the window is the part of the map that the refinement and the sampler fit;
* sliders for the sampled physics parameters (noise excluded), starting from the
  automatic guess of :func:`~polkit.jobs.dispersion.parameters.guess_from_peaks`; each
  move redraws the polariton branches, the bare cavity and the bare exciton(s) over the
  map and updates a readout of detuning, Hopfield fractions, lower-polariton energy and
  linewidth at k = 0 and the strong-coupling criterion;
* *Most probable point*: the maximum a posteriori point from the slider values (as in
  :func:`~polkit.jobs.dispersion.run.fit_dispersion`: MAP, noise model calibrated on its
  residuals, MAP again), sliders moved there, normalised residuals shown;
* *Sample*: emcee from that point in a background thread, with a progress bar and
  *Stop* (a stopped run is kept and marked not converged); then the summary table with
  units, the corner plot and the residuals of the posterior median;
* *Save*: ``posterior.nc``, ``summary.json`` and the figures, the files the command line
  writes.

The overlay is redrawn on a cached image of the map (see :mod:`polkit.widgets._canvas`),
so a slider move costs the branch computation and one PNG encoding, independent of the
map size.
"""

from __future__ import annotations

import html
import logging
import os
import time
from collections.abc import Mapping
from typing import Any

import numpy as np
import xarray as xr

from polkit.data import LoadOptions
from polkit.errors import DataError
from polkit.inference import SamplerSettings
from polkit.jobs.dispersion import run as wf
from polkit.jobs.dispersion import stages as st
from polkit.jobs.dispersion.problem import DispersionProblem
from polkit.plotting.dispersion import normalised_residuals
from polkit.widgets._canvas import LiveFigure
from polkit.widgets._common import clip_into, parameter_slider, status_html
from polkit.widgets._panel import FitPanel, offscreen_figure

__all__ = ["dispersion_panel", "DispersionPanel"]

log = logging.getLogger(__name__)

MEV = 1e-3
_GRID = 160  # points of the overlay curves along the in-plane axis


def _map_display(z: np.ndarray, log_scale: bool):
    """(values, norm, label) for the colour scale of the map."""
    from matplotlib.colors import LogNorm, Normalize

    finite = z[np.isfinite(z)]
    if log_scale:
        floor = float(np.percentile(finite, 1.0))
        shifted = z - floor
        pos = shifted[np.isfinite(shifted) & (shifted > 0)]
        vmin = float(np.percentile(pos, 5.0)) if pos.size else 1e-12
        vmax = float(pos.max()) if pos.size else 1.0
        vals = np.where(shifted > vmin, shifted, vmin)
        return vals, LogNorm(vmin=vmin, vmax=max(vmax, vmin * 10)), "signal above 1st percentile"
    lo, hi = np.percentile(finite, [0.5, 99.9])
    return z, Normalize(vmin=float(lo), vmax=float(hi)), "signal"


class DispersionPanel(FitPanel):
    """The widgets and state of one interactive dispersion fit (built by :func:`dispersion_panel`).

    Attributes
    ----------
    widget
        The whole panel (an ``ipywidgets.VBox``); displaying the panel displays it.
    sliders
        ``{parameter name: slider}`` for the sampled physics parameters.
    scale
        Colour scale of the map, ``"log"`` or ``"linear"`` (ToggleButtons).
    axis_window, energy_window
        Range sliders of the fitted window (degree or 1/um; eV).
    refine_button, sample_button, stop_button, save_button
        The buttons.
    progress
        Sampler progress (steps).
    status, readout, summary
        HTML widgets: last action, derived quantities at the sliders, result table.
    readout_values
        The numbers of the readout: ``detuning`` [meV], ``exciton_fraction_k0``,
        ``photon_fraction_k0`` [1], ``lp_energy_k0`` [eV], ``lp_linewidth_k0`` [meV].
    map_image, residual_image, corner_image
        Image widgets (PNG).
    max_steps, out_folder
        Sampler step limit and save folder (editable).
    show_corner
        Draw the corner plot after sampling (a few seconds for many parameters; set
        ``False`` while iterating quickly).
    map_result
        The last :class:`~polkit.inference.MapResult` of *Most probable point* (``None`` before).
    result
        The last :class:`~polkit.jobs.dispersion.run.DispersionFit` (``None`` before).
    job
        The last :class:`~polkit.widgets._common.SamplingJob`.
    """

    default_steps = wf.DEFAULT_STEPS
    _log_post_digits = 1
    _status_warnings = True

    def __init__(self, source: st.MapInput, *, priors, seed, max_steps: int,
                 min_steps: int | None, n_walkers: int | None, out, profile: str,
                 log_scale: bool, window: tuple = (None, None)):
        self.source = source
        self.data = da = source.data
        self.axis = source.axis
        self.sha = source.sha256
        self.source_name = source.source_name
        self.model = source.model
        self.n_excitons = source.n_excitons
        self.kind = source.kind
        self.profile = profile
        self.priors = priors
        self._init_state(seed=seed, min_steps=min_steps, n_walkers=n_walkers)

        x_all = da[self.axis].values.astype(float)
        e_all = da["energy"].values.astype(float)
        angle_window, energy_window = window
        win_x = tuple(angle_window) if angle_window is not None else (x_all.min(), x_all.max())
        win_e = tuple(energy_window) if energy_window is not None else (e_all.min(), e_all.max())
        first = self.source.cropped(win_x, win_e)
        # the peak table warns (DataWarning) when only one branch is visible
        self.table, self.guess, space = st.peak_start(
            first.data, n_excitons=self.n_excitons, kind=self.kind, priors=priors,
            profile=profile, coupling=self.source.coupling)
        self._tables = {(tuple(map(float, win_x)), tuple(map(float, win_e))): self.table}
        self.space = space
        self._theta = st.start_vector(space, self.guess, keep_inside=True, log_margin=True)
        self._problem: DispersionProblem | None = None
        self._problem_window: tuple | None = None
        self._problem_source: st.MapInput | None = None

        self._build_controls(x_all, e_all, win_x, win_e, log_scale)
        self._init_actions(
            max_steps=max_steps,
            out_folder=str(out) if out is not None else "polkit-out/dispersion",
            ready="ready: move the sliders until the branches follow the map, then press Most "
                  "probable point",
            tooltips=True)
        self._build_figure()
        self.widget = self._layout()

    def _build_controls(self, x_all: np.ndarray, e_all: np.ndarray, win_x: tuple,
                        win_e: tuple, log_scale: bool) -> None:
        """The parameter sliders, the colour scale and the window sliders."""
        import ipywidgets as w

        self.sliders: dict[str, Any] = {}
        for p, v in zip(self.space, self._theta, strict=True):
            if p.name == "noise_scale":
                continue
            s = parameter_slider(p, v)
            s.observe(self._on_slider, names="value")
            self.sliders[p.name] = s
        self.scale = w.ToggleButtons(options=["log", "linear"],
                                     value="log" if log_scale else "linear",
                                     description="colour scale", style={"button_width": "70px"})
        self.scale.observe(lambda _change: self._draw_map(), names="value")
        unit = "degree" if self.axis == "angle" else "1/um"
        dx = float(np.min(np.diff(x_all))) if x_all.size > 1 else 1.0
        self.axis_window = w.FloatRangeSlider(
            value=[float(win_x[0]), float(win_x[1])], min=float(x_all.min()),
            max=float(x_all.max()), step=dx, description=f"{self.axis} window [{unit}]",
            readout_format=".2f", continuous_update=False, layout={"width": "500px"},
            style={"description_width": "190px"})
        self.energy_window = w.FloatRangeSlider(
            value=[float(win_e[0]), float(win_e[1])], min=float(e_all.min()),
            max=float(e_all.max()), step=float(np.min(np.diff(e_all))),
            description="energy window [eV]", readout_format=".4f", continuous_update=False,
            layout={"width": "500px"}, style={"description_width": "190px"})
        self.axis_window.observe(self._on_window, names="value")
        self.energy_window.observe(self._on_window, names="value")

    def _build_figure(self) -> None:
        """The map with the branch, bare-cavity and bare-exciton overlay."""
        self.live = LiveFigure(figsize=(6.2, 4.6))
        self.map_image = self.live.image
        ax = self.live.axes[0, 0]
        self._mesh = None
        self._cbar = None
        n_br = self.n_excitons + 1
        self._branch_lines = [ax.plot([], [], "-", color="tab:cyan", lw=1.6,
                                      label="polariton branches" if b == 0 else None)[0]
                              for b in range(n_br)]
        self._cavity_line = ax.plot([], [], "--", color="white", lw=1.1, label="bare cavity")[0]
        self._exciton_lines = [ax.plot([], [], ":", color="white", lw=1.1,
                                       label="bare exciton" if i == 0 else None)[0]
                               for i in range(self.n_excitons)]
        self.live.overlay([*self._branch_lines, self._cavity_line, *self._exciton_lines])
        unit = "degree" if self.axis == "angle" else "1/um"
        ax.set_xlabel(f"{self.axis} [{unit}]")
        ax.set_ylabel("energy [eV]")
        ax.legend(loc="upper center", fontsize=7, framealpha=0.6, ncol=3)
        self._draw_map(update=False)
        self._update_overlay()

    def _layout(self):
        """The whole panel: title, map and controls, buttons, status, saving, results."""
        import ipywidgets as w

        controls = w.VBox([self.scale, self.axis_window, self.energy_window,
                           *self.sliders.values(), self.readout])
        buttons = w.HBox([self.refine_button, self.sample_button, self.stop_button,
                          self.max_steps, self.progress])
        saving = w.HBox([self.save_button, self.out_folder])
        results = w.HBox([self.summary, w.VBox([self.residual_image, self.corner_image])])
        title = w.HTML(f"<b>dispersion panel</b> &mdash; {html.escape(self.source_name)} "
                       f"({html.escape(self.kind)}, {self.model}-oscillator model)")
        return w.VBox([title, w.HBox([self.map_image, controls]), buttons, self.status,
                       saving, results])

    # -- values -----------------------------------------------------------------------------
    @property
    def names(self) -> list[str]:
        """Names of the sampled parameters, in order."""
        return self.space.names

    # -- problem for the current window -----------------------------------------------------
    def window(self) -> tuple[tuple[float, float], tuple[float, float]]:
        """The fitted window: ``((axis low, high), (energy low, high))``."""
        return tuple(self.axis_window.value), tuple(self.energy_window.value)

    def cropped(self) -> xr.DataArray:
        """The map inside the current window."""
        return self.source.cropped(*self.window()).data

    def peak_table(self) -> xr.Dataset:
        """The per-angle peak table of the current window (computed once per window)."""
        from polkit.linefit import peak_table

        win = self.window()
        if win not in self._tables:
            self._tables[win] = peak_table(self.cropped(), n_peaks=self.n_excitons + 1,
                                           profile=self.profile)
        return self._tables[win]

    def problem(self) -> DispersionProblem:
        """The :class:`DispersionProblem` of the current window (rebuilt when it changes)."""
        win = self.window()
        if self._problem is None or self._problem_window != win:
            self._problem_source = self.source.cropped(*win)
            self._problem = st.map_problem(self._problem_source, self.space)
            self._problem_window = win
        return self._problem

    # -- drawing ----------------------------------------------------------------------------
    def _draw_map(self, update: bool = True) -> None:
        ax = self.live.axes[0, 0]
        z = np.asarray(self.data.transpose(self.axis, "energy").values, dtype=float)
        vals, norm, label = _map_display(z, self.scale.value == "log")
        if self._mesh is not None:
            self._mesh.remove()
        x = self.data[self.axis].values
        e = self.data["energy"].values
        self._mesh = ax.pcolormesh(x, e, vals.T, shading="nearest", cmap="magma", norm=norm,
                                   rasterized=True, zorder=0)
        if self._cbar is None:
            self._cbar = self.live.figure.colorbar(self._mesh, ax=ax, label=label)
        else:
            self._cbar.update_normal(self._mesh)
            self._cbar.set_label(label)
        (x0, x1), (e0, e1) = self.window()
        ax.set_xlim(x0, x1)
        ax.set_ylim(e0, e1)
        ax.set_title(f"{self.kind} map, {self.scale.value} colour scale", fontsize=9)
        self.live.redraw()

    def overlay_data(self) -> dict[str, np.ndarray]:
        """The overlay curves as drawn: ``grid`` (A,), ``branches`` (A, K), ``cavity`` (A,),
        ``excitons`` (n_excitons,), all energies in eV."""
        grid = np.asarray(self._branch_lines[0].get_xdata(), dtype=float)
        return {
            "grid": grid,
            "branches": np.stack([np.asarray(ln.get_ydata(), dtype=float)
                                  for ln in self._branch_lines], axis=-1),
            "cavity": np.asarray(self._cavity_line.get_ydata(), dtype=float),
            "excitons": np.array([float(ln.get_ydata()[0]) for ln in self._exciton_lines]),
        }

    def _on_window(self, _change) -> None:
        (x0, x1), (e0, e1) = self.window()
        ax = self.live.axes[0, 0]
        ax.set_xlim(x0, x1)
        ax.set_ylim(e0, e1)
        self.map_result = None  # a new window is a new problem: refine again
        self.live.redraw()
        self._update_overlay()

    def _redraw(self) -> None:
        self._update_overlay()

    def _update_overlay(self) -> None:
        t0 = time.perf_counter()
        theta = self.theta()
        problem = self.problem()
        (x0, x1), _ = self.window()
        grid = np.linspace(x0, x1, _GRID)
        try:
            _, branches, cav, exs = problem.branch_curves(theta[None, :], grid)
        except (ValueError, DataError) as exc:  # e.g. n_eff below sin(theta): no cavity mode
            self.status.value = status_html(f"cannot draw the branches here: {exc}", level="warn")
            return
        for b, line in enumerate(self._branch_lines):
            line.set_data(grid, branches[0, :, b])
        self._cavity_line.set_data(grid, cav[0])
        for i, line in enumerate(self._exciton_lines):
            line.set_data([x0, x1], [exs[0, i], exs[0, i]])
        self.live.update()
        self.readout.value = self._readout_html(problem, theta)
        self.timings.append(time.perf_counter() - t0)

    def _readout_html(self, problem: DispersionProblem, theta: np.ndarray) -> str:
        d = {k: float(np.asarray(v).reshape(-1)[0]) for k, (v, _u, _l) in
             problem.derived(theta[None, :]).items()}
        self.readout_values = {k: d[k] for k in ("detuning", "exciton_fraction_k0",
                                                 "photon_fraction_k0", "lp_energy_k0",
                                                 "lp_linewidth_k0")}
        idx = {n: i for i, n in enumerate(self.space.names)}
        mean_width = 0.5 * (theta[idx["cavity_linewidth"]] + theta[idx["exciton_linewidth"]])
        rabi = theta[idx["rabi_splitting"]] if "rabi_splitting" in idx else 0.0  # weak: g = 0
        strong = rabi > mean_width
        rows = [
            ("detuning E_C0 - E_X", f"{d['detuning']:+.3f}", "meV"),
            ("|X|^2 at k = 0 (lower polariton)", f"{d['exciton_fraction_k0']:.3f}", "1"),
            ("|C|^2 at k = 0 (lower polariton)", f"{d['photon_fraction_k0']:.3f}", "1"),
            ("lower polariton at k = 0", f"{d['lp_energy_k0']:.5f}", "eV"),
            ("lower-polariton linewidth at k = 0", f"{d['lp_linewidth_k0']:.3f}", "meV"),
            ("2g vs (gamma_C + gamma_X)/2",
             f"{rabi:.2f} {'>' if strong else '<='} {mean_width:.2f}",
             "meV"),
        ]
        body = "".join(f"<tr><td>{html.escape(a)}</td><td style='text-align:right'>{b}</td>"
                       f"<td>{c}</td></tr>" for a, b, c in rows)
        verdict = ("strong coupling (splitting exceeds the mean linewidth)" if strong
                   else "weak coupling at these values")
        return (f"<table class='polkit-readout'>{body}</table><i>{verdict}</i>")

    # -- actions ----------------------------------------------------------------------------
    def _find_mode(self):
        """The mode from the slider values, in the steps of
        :func:`~polkit.jobs.dispersion.run.fit_dispersion`: the peak-table mode (started at
        the sliders), the whole-window mode started there (and, kept if better, started at
        the sliders themselves), the noise model (variance = a model + b) calibrated on its
        residuals, and the mode again under that noise model."""
        problem = self.problem()
        x0 = np.array([clip_into(p, v) for p, v in zip(self.space, self.theta(), strict=True)])
        # 1. the peak-table posterior is smooth: its mode from the sliders is a safe start
        table_map = st.table_mode(problem, x0, table=self.peak_table())
        # 2. whole-map mode from the table mode and from the sliders; keep the better
        start = st.whole_map_start(problem, x0, table_map.x)
        # 3. noise model at that mode (as the workflow does), then the mode again
        st.calibrate_problem_noise(problem, start.x, self._problem_source.data.attrs)
        return st.refine_mode(problem, start.x)

    def _residual_png(self, theta: np.ndarray, label: str) -> bytes:
        from polkit.widgets._canvas import figure_png

        problem = self.problem()
        resid = normalised_residuals(problem, theta)
        fig = offscreen_figure((5.0, 3.4))
        ax = fig.subplots()
        mesh = ax.pcolormesh(problem.in_plane, problem.energy, resid.T, shading="nearest",
                             cmap="RdBu_r", vmin=-4, vmax=4, rasterized=True)
        fig.colorbar(mesh, ax=ax, label="normalised residual [sigma]")
        ok = problem.inv_var > 0
        rms = float(np.sqrt(np.mean(resid[ok] ** 2))) if ok.any() else float("nan")
        ax.set_title(f"residuals at the {label}: rms {rms:.2f} sigma", fontsize=9)
        ax.set_xlabel(self.axis)
        ax.set_ylabel("energy [eV]")
        return figure_png(fig)

    def _current_problem(self) -> DispersionProblem:
        return self.problem()

    def _sampling_run(self, problem, start, walkers, steps):
        source, noise_note = self._problem_source, problem.noise_note
        provenance = {
            "started_from": "interactive panel: MAP refined from the slider values",
            "window": {self.axis: [float(problem.in_plane.min()), float(problem.in_plane.max())],
                       "energy": [float(problem.energy.min()), float(problem.energy.max())]}}

        def run(log_likelihood, stop_event):
            sampler = SamplerSettings(n_walkers=walkers, progress=False, stop_event=stop_event,
                                      **steps)
            output = wf.sample_problem(problem, start, sampler=sampler,
                                       log_likelihood=log_likelihood, seed=self.seed)
            return wf.build_dispersion_result(problem, output, source, noise_note=noise_note,
                                              profile=self.profile, provenance=provenance)

        return run

    def _corner_names(self, result) -> list[str]:
        return [n for n in self.space.names if n != "noise_scale"] + ["detuning"]

    def _posterior_residual_png(self, result) -> bytes:
        med = np.array([np.median(result.draws(n)) for n in self.space.names])
        return self._residual_png(med, "posterior median")


def dispersion_panel(
    source: str | os.PathLike | xr.DataArray,
    *,
    model: str = "two",
    priors: str | os.PathLike | dict | None = None,
    seed: int | None = None,
    max_steps: int | None = None,
    min_steps: int | None = None,
    n_walkers: int | None = None,
    out: str | os.PathLike | None = None,
    load: LoadOptions | Mapping[str, Any] | None = None,
    profile: str = "lorentzian",
    log_scale: bool | None = None,
) -> DispersionPanel:
    """Build the interactive dispersion panel for a map.

    Parameters
    ----------
    source, model
        The map and the model, as for :func:`~polkit.jobs.dispersion.run.fit_dispersion`.
    priors
        TOML file or dict of priors over the defaults (the sliders span the priors).
    seed
        Root seed of the sampler (recorded in the result).
    max_steps, min_steps, n_walkers
        Sampler settings (defaults as :func:`~polkit.jobs.dispersion.run.fit_dispersion`).
    out
        Default folder of the *Save* button.
    load
        A :class:`polkit.data.LoadOptions` (or a dict of its fields): ``kind``
        (``"emission"``, ``"reflectance"`` or ``"transmission"``; default from the map),
        ``wavelength_medium`` and the loader's options (see :func:`polkit.load_map`),
        ``camera`` (none of the camera steps by default), and ``angle_window`` and
        ``energy_window``: the initial fitted window (degree or 1/um; eV), the whole map
        by default.
    profile
        Peak shape of the peak table behind the starting guess.
    log_scale
        Start with a logarithmic colour scale (default: for emission).

    Returns
    -------
    DispersionPanel
        Display it in a notebook; drive it from Python through its widgets.

    Raises
    ------
    DataError
        Bad map file or contents, unknown model or kind (naming the file and the field).
    """
    load = LoadOptions.of(load)
    src = st.open_map(source, model=model, load=load)
    steps = int(max_steps) if max_steps is not None else wf.DEFAULT_STEPS["max_steps"]
    return DispersionPanel(
        src, priors=priors, seed=seed, max_steps=steps, min_steps=min_steps,
        n_walkers=n_walkers, out=out, profile=profile,
        log_scale=(src.kind == "emission") if log_scale is None else log_scale,
        window=(load.angle_window, load.energy_window))

"""Interactive first fit of an angle-resolved map: sliders, live branches, MAP, MCMC, save.

:func:`dispersion_panel` returns a :class:`DispersionPanel` that holds every widget, so a
test (or a notebook cell) can drive it from Python exactly as a person does in JupyterLab:
set ``panel.sliders["rabi_splitting"].value``, call ``panel.refine_button.click()``, and
read ``panel.overlay_data()``, ``panel.readout.value`` or ``panel.result``.

What each control does (and the decision it supports):

* the map, on a log or linear colour scale, with an angle (or k) and an energy window:
  the window is the part of the map that the refinement and the sampler fit;
* sliders for the sampled physics parameters (noise excluded), starting from the
  automatic guess of :func:`~polkit.workflows.dispersion_model.guess_from_peaks`; each
  move redraws the polariton branches, the bare cavity and the bare exciton(s) over the
  map and updates a readout of detuning, Hopfield fractions, lower-polariton energy and
  linewidth at k = 0 and the strong-coupling criterion;
* *Refine*: the maximum a posteriori point from the slider values (as in
  :func:`~polkit.workflows.dispersion.fit_dispersion`: MAP, noise model calibrated on its
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
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..errors import DataError
from ..inference import LogPosterior, apply_priors, find_map, run_ensemble
from ..workflows import dispersion as wf
from ..workflows.dispersion_model import (
    MODELS,
    DispersionProblem,
    default_space,
    guess_from_peaks,
    in_plane_axis,
    noise_inverse_variance,
)
from ._canvas import LiveFigure
from ._common import SamplingJob, clip_into, corner_png, parameter_slider, status_html

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


class DispersionPanel:
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
        The last :class:`~polkit.inference.MapResult` of *Refine* (``None`` before).
    result
        The last :class:`~polkit.workflows.dispersion.DispersionFit` (``None`` before).
    job
        The last :class:`~polkit.widgets._common.SamplingJob`.
    """

    def __init__(self, da: xr.DataArray, *, sha: str, source_name: str, model: str,
                 kind_model: str, priors, seed, max_steps: int, min_steps: int | None,
                 n_walkers: int | None, out, profile: str, log_scale: bool,
                 angle_window, energy_window):
        import ipywidgets as w

        from .. import data
        from ..extract import peak_table

        self.data = da
        self.axis = in_plane_axis(da)
        self.sha = sha
        self.source_name = source_name
        self.model = model
        self.n_excitons = MODELS[model]
        self.kind = kind_model
        self.seed = seed
        self.min_steps = min_steps
        self.n_walkers = n_walkers
        self.profile = profile
        self.priors = priors

        x_all = da[self.axis].values.astype(float)
        e_all = da["energy"].values.astype(float)
        win_x = tuple(angle_window) if angle_window is not None else (x_all.min(), x_all.max())
        win_e = tuple(energy_window) if energy_window is not None else (e_all.min(), e_all.max())
        first = data.crop(da, **{self.axis: win_x, "energy": win_e}).transpose(self.axis, "energy")
        # the peak table warns (DataWarning) when only one branch is visible
        self.table = peak_table(first, n_peaks=self.n_excitons + 1, profile=profile)
        self._tables = {(tuple(map(float, win_x)), tuple(map(float, win_e))): self.table}
        self.guess = guess_from_peaks(self.table, n_excitons=self.n_excitons)
        space = default_space(first["energy"].values, self.guess, n_excitons=self.n_excitons,
                              kind=kind_model)
        if priors is not None:
            space = apply_priors(space, priors,
                                 path=priors if not isinstance(priors, dict) else None)
        self.space = space
        self._theta = np.array([
            clip_into(p, self.guess.get(p.name, wf._default_start(p.name, self.guess)))
            for p in space
        ])
        self._problem: DispersionProblem | None = None
        self._problem_window: tuple | None = None
        self._noise_note = ""
        self.map_result = None
        self._refined_theta: np.ndarray | None = None
        self.result = None
        self.job: SamplingJob | None = None
        self._hold = False
        self.timings: list[float] = []
        self.readout_values: dict[str, float] = {}
        self.show_corner = True

        # -- controls -----------------------------------------------------------------------
        self.sliders: dict[str, Any] = {}
        for p, v in zip(space, self._theta, strict=True):
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

        self.refine_button = w.Button(description="Refine (MAP)", icon="crosshairs",
                                      tooltip="maximum a posteriori from the slider values")
        self.sample_button = w.Button(description="Sample (MCMC)", icon="play",
                                      button_style="primary",
                                      tooltip="emcee from the refined point, in the background")
        self.stop_button = w.Button(description="Stop", icon="stop", button_style="warning",
                                    disabled=True, tooltip="end sampling after the current step")
        self.save_button = w.Button(description="Save", icon="save", disabled=True,
                                    tooltip="posterior.nc, summary.json and figures")
        self.refine_button.on_click(lambda _b: self._guarded(self.refine))
        self.sample_button.on_click(lambda _b: self._guarded(self.sample))
        self.stop_button.on_click(lambda _b: self.stop())
        self.save_button.on_click(lambda _b: self._guarded(self.save))
        self.max_steps = w.BoundedIntText(value=int(max_steps), min=10, max=10_000_000,
                                          description="max steps", layout={"width": "180px"})
        self.out_folder = w.Text(value=str(out) if out is not None else "polkit-out/dispersion",
                                 description="save to", layout={"width": "340px"})
        self.progress = w.IntProgress(value=0, min=0, max=int(max_steps), description="MCMC",
                                      bar_style="info", layout={"width": "320px"})
        self.status = w.HTML(status_html("ready: move the sliders until the branches follow "
                                         "the map, then Refine"))
        self.readout = w.HTML()
        self.summary = w.HTML()
        self.residual_image = w.Image(format="png")
        self.corner_image = w.Image(format="png")

        # -- figure -------------------------------------------------------------------------
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
        ax.set_xlabel(f"{self.axis} [{unit}]")
        ax.set_ylabel("energy [eV]")
        ax.legend(loc="upper center", fontsize=7, framealpha=0.6, ncol=3)
        self._draw_map(update=False)
        self._update_overlay()

        controls = w.VBox([self.scale, self.axis_window, self.energy_window,
                           *self.sliders.values(), self.readout])
        buttons = w.HBox([self.refine_button, self.sample_button, self.stop_button,
                          self.max_steps, self.progress])
        saving = w.HBox([self.save_button, self.out_folder])
        results = w.HBox([self.summary, w.VBox([self.residual_image, self.corner_image])])
        title = w.HTML(f"<b>dispersion panel</b> &mdash; {html.escape(source_name)} "
                       f"({html.escape(self.kind)}, {model}-oscillator model)")
        self.widget = w.VBox([title, w.HBox([self.map_image, controls]), buttons, self.status,
                              saving, results])

    # -- display ----------------------------------------------------------------------------
    def _repr_mimebundle_(self, **kwargs):
        return self.widget._repr_mimebundle_(**kwargs)

    def snapshot(self):
        """A static copy of the map with the current overlay (``IPython.display.Image``).

        Exported HTML cannot run widgets offline: show this beside the panel.
        """
        from IPython.display import Image

        return Image(data=self.live.png(), format="png")

    # -- values -----------------------------------------------------------------------------
    @property
    def names(self) -> list[str]:
        """Names of the sampled parameters, in order."""
        return self.space.names

    def theta(self) -> np.ndarray:
        """The parameter vector at the sliders (noise scale from the last refinement)."""
        t = self._theta.copy()
        for i, name in enumerate(self.space.names):
            if name in self.sliders:
                t[i] = float(self.sliders[name].value)
        return t

    def values(self) -> dict[str, float]:
        """``{name: value}`` at the sliders, in the parameters' units."""
        return dict(zip(self.space.names, self.theta().tolist(), strict=True))

    def set_values(self, values: dict[str, float]) -> None:
        """Move several sliders at once, with a single redraw."""
        unknown = sorted(set(values) - set(self.space.names))
        if unknown:
            raise DataError(f"unknown parameters {unknown}; expected some of {self.space.names}",
                            field="values")
        self._hold = True
        try:
            for name, v in values.items():
                i = self.space.names.index(name)
                self._theta[i] = float(v)
                if name in self.sliders:
                    s = self.sliders[name]
                    s.value = float(np.clip(v, 10**s.min if _is_log(s) else s.min,
                                            10**s.max if _is_log(s) else s.max))
        finally:
            self._hold = False
        self._update_overlay()

    # -- problem for the current window -----------------------------------------------------
    def window(self) -> tuple[tuple[float, float], tuple[float, float]]:
        """The fitted window: ``((axis low, high), (energy low, high))``."""
        return tuple(self.axis_window.value), tuple(self.energy_window.value)

    def cropped(self) -> xr.DataArray:
        """The map inside the current window."""
        from .. import data

        wx, we = self.window()
        return data.crop(self.data, **{self.axis: wx, "energy": we}).transpose(self.axis,
                                                                                "energy")

    def peak_table(self) -> xr.Dataset:
        """The per-angle peak table of the current window (computed once per window)."""
        from ..extract import peak_table

        win = self.window()
        if win not in self._tables:
            self._tables[win] = peak_table(self.cropped(), n_peaks=self.n_excitons + 1,
                                           profile=self.profile)
        return self._tables[win]

    def problem(self) -> DispersionProblem:
        """The :class:`DispersionProblem` of the current window (rebuilt when it changes)."""
        win = self.window()
        if self._problem is None or self._problem_window != win:
            da = self.cropped()
            inv_var, note = noise_inverse_variance(da)
            self._problem = DispersionProblem(
                axis=self.axis, in_plane=da[self.axis].values.astype(float),
                energy=da["energy"].values.astype(float), y=np.asarray(da.values, dtype=float),
                inv_var=inv_var, space=self.space, n_excitons=self.n_excitons, kind=self.kind,
                table=None, noise_note=note)
            self._problem_window = win
            self._problem_da = da
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

    def _on_slider(self, _change) -> None:
        if not self._hold:
            self._update_overlay()

    def _on_window(self, _change) -> None:
        (x0, x1), (e0, e1) = self.window()
        ax = self.live.axes[0, 0]
        ax.set_xlim(x0, x1)
        ax.set_ylim(e0, e1)
        self.map_result = None  # a new window is a new problem: refine again
        self.live.redraw()
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
        strong = theta[idx["rabi_splitting"]] > mean_width
        rows = [
            ("detuning E_C0 - E_X", f"{d['detuning']:+.3f}", "meV"),
            ("|X|^2 at k = 0 (lower polariton)", f"{d['exciton_fraction_k0']:.3f}", "1"),
            ("|C|^2 at k = 0 (lower polariton)", f"{d['photon_fraction_k0']:.3f}", "1"),
            ("lower polariton at k = 0", f"{d['lp_energy_k0']:.5f}", "eV"),
            ("lower-polariton linewidth at k = 0", f"{d['lp_linewidth_k0']:.3f}", "meV"),
            ("2g vs (gamma_C + gamma_X)/2",
             f"{theta[idx['rabi_splitting']]:.2f} {'>' if strong else '<='} {mean_width:.2f}",
             "meV"),
        ]
        body = "".join(f"<tr><td>{html.escape(a)}</td><td style='text-align:right'>{b}</td>"
                       f"<td>{c}</td></tr>" for a, b, c in rows)
        verdict = ("strong coupling (splitting exceeds the mean linewidth)" if strong
                   else "weak coupling at these values")
        return (f"<table class='polkit-readout'>{body}</table><i>{verdict}</i>")

    # -- actions ----------------------------------------------------------------------------
    def _guarded(self, action) -> None:
        """Run a button's action; show a polkit error in the status line instead of raising."""
        from ..errors import PolkitError

        try:
            action()
        except PolkitError as exc:
            self.status.value = status_html(f"error: {exc}", level="error")
            log.warning("%s", exc)

    def refine(self):
        """Maximum a posteriori point from the slider values; sliders moved there.

        Steps as in :func:`~polkit.workflows.dispersion.fit_dispersion`: the peak-table
        mode (started at the sliders), the whole-window mode started there (and, kept if
        better, started at the sliders themselves), the noise model (variance = a model + b)
        calibrated on its residuals, and the mode again under that noise model.

        Returns
        -------
        MapResult
        """
        self.status.value = status_html("refining: maximum a posteriori...", level="busy")
        self.refine_button.disabled = True
        try:
            problem = self.problem()
            space = self.space
            x0 = np.array([clip_into(p, v) for p, v in zip(space, self.theta(), strict=True)])
            # 1. the peak-table posterior is smooth: its mode from the sliders is a safe start
            table_problem = DispersionProblem(
                axis=self.axis, in_plane=problem.in_plane, energy=problem.energy, y=problem.y,
                inv_var=problem.inv_var, space=space, n_excitons=self.n_excitons,
                kind=self.kind, table=self.peak_table())
            table_map = find_map(LogPosterior(table_problem.table_log_likelihood, space), space,
                                 x0)
            # 2. whole-map mode from the table mode and from the sliders; keep the better
            post = LogPosterior(problem.log_likelihood, space)
            candidates = [find_map(post, space, table_map.x), find_map(post, space, x0)]
            start = max(candidates, key=lambda c: c.log_post)
            # 3. noise model at that mode (as the workflow does), then the mode again
            inv_var, self._noise_note = _noise_at(problem, self._problem_da, start.x)
            problem.set_noise(inv_var, self._noise_note)
            start = find_map(LogPosterior(problem.log_likelihood, space), space, start.x)
        finally:
            self.refine_button.disabled = False
        self.map_result = start
        self.set_values(dict(zip(self.space.names, start.x.tolist(), strict=True)))
        self._refined_theta = self.theta()
        self.residual_image.value = self._residual_png(start.x, "MAP")
        self.status.value = status_html(
            f"refined: log posterior {start.log_post:.1f}; "
            f"{'optimiser converged' if start.success else 'optimiser: ' + start.message}",
            level="ok" if start.success else "warn")
        return start

    def _residual_png(self, theta: np.ndarray, label: str) -> bytes:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        from ._canvas import figure_png

        problem = self.problem()
        sol = problem.model_map(theta)
        model = np.asarray(sol.model).reshape(problem.y.shape)
        names = self.space.names
        s = theta[names.index("noise_scale")] if "noise_scale" in names else 1.0
        resid = (problem.y - model) * np.sqrt(problem.inv_var) / s
        fig = Figure(figsize=(5.0, 3.4), dpi=80, layout="constrained")
        FigureCanvasAgg(fig)
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

    def _needs_refine(self) -> bool:
        return (self.map_result is None or self._refined_theta is None
                or not np.allclose(self._refined_theta, self.theta(), rtol=0, atol=0))

    def sample(self, *, background: bool = True) -> SamplingJob:
        """Run the MCMC from the refined point (refining first if the sliders moved).

        Parameters
        ----------
        background
            Run in a background thread (the panel stays responsive; *Stop* ends it).
            ``False`` runs in the calling thread and returns when done (notebooks executed
            top to bottom, tests).

        Returns
        -------
        SamplingJob
            ``job.wait()`` returns the result (also kept in :attr:`result`).
        """
        if self.job is not None and self.job.running:
            self.status.value = status_html("already sampling; Stop first", level="warn")
            return self.job
        if self._needs_refine():
            self.refine()
        problem = self.problem()
        start = self.map_result
        steps = dict(wf.DEFAULT_STEPS)
        steps["max_steps"] = int(self.max_steps.value)
        steps["min_steps"] = min(steps["min_steps"], steps["max_steps"])
        if self.min_steps is not None:
            steps["min_steps"] = int(self.min_steps)
        steps["check_every"] = min(steps["check_every"], steps["max_steps"])
        walkers = self.n_walkers or max(32, 4 * len(self.space))
        da = self._problem_da
        noise_note = self._noise_note
        space = self.space

        def run(log_likelihood, stop_event):
            output = run_ensemble(log_likelihood, space, start, n_walkers=walkers,
                                  seed=self.seed, progress=False, stop_event=stop_event,
                                  **steps)
            return _build_result(problem, output, da, model=self.model, sha=self.sha,
                                 source_name=self.source_name, noise_note=noise_note,
                                 profile=self.profile)

        self.progress.max = steps["max_steps"]
        self.progress.value = 0
        self.progress.bar_style = "info"
        self.sample_button.disabled = True
        self.refine_button.disabled = True
        self.stop_button.disabled = not background
        self.status.value = status_html(
            f"sampling: {walkers} walkers, up to {steps['max_steps']} steps...", level="busy")
        self.job = SamplingJob(run, problem.log_likelihood, max_steps=steps["max_steps"],
                               on_progress=self._on_progress, on_done=self._on_done)
        return self.job.start(background=background)

    def _on_progress(self, steps: int) -> None:
        self.progress.value = steps

    def _on_done(self, job: SamplingJob) -> None:
        self.sample_button.disabled = False
        self.refine_button.disabled = False
        self.stop_button.disabled = True
        if job.error is not None:
            self.progress.bar_style = "danger"
            self.status.value = status_html(f"sampling failed: {job.error}", level="error")
            return
        result = job.result
        self.result = result
        self.progress.value = self.progress.max if result.converged else self.progress.value
        self.progress.bar_style = "success" if result.converged else "warning"
        self.summary.value = result._repr_html_()
        names = [n for n in self.space.names if n != "noise_scale"] + ["detuning"]
        if self.show_corner:
            self.corner_image.value = corner_png(result, names)
        med = np.array([np.median(result.draws(n)) for n in self.space.names])
        self.residual_image.value = self._residual_png(med, "posterior median")
        self.save_button.disabled = False
        warned = "; ".join(str(wm.message) for wm in job.warnings)
        if result.converged:
            self.status.value = status_html("sampling done: converged", level="ok")
        else:
            self.status.value = status_html(
                "sampling done: NOT converged (" + "; ".join(result.diagnostics.get("reasons", []))
                + ")" + (f" [{warned}]" if warned else ""), level="warn")

    def stop(self) -> None:
        """End a running sampler after its current step (the result is kept, not converged)."""
        if self.job is not None and self.job.running:
            self.job.stop()
            self.status.value = status_html("stopping after the current step...", level="busy")

    def wait(self, timeout: float | None = None):
        """Wait for the sampler and return the result (raises its error, if any)."""
        if self.job is None:
            raise DataError("nothing is sampling: press Sample first", field="job")
        return self.job.wait(timeout)

    def save(self, folder: str | os.PathLike | None = None) -> list[Path]:
        """Write the result as the command line does: ``posterior.nc``, ``summary.json``,
        ``fit.png``, ``residuals.png``, ``corner.png``, ``traces.png``.

        Returns
        -------
        list of Path
            The files written.
        """
        if self.result is None:
            raise DataError("no result to save yet: press Sample first", field="result")
        folder = Path(folder if folder is not None else self.out_folder.value)
        self.result.save(folder)
        files = [folder / "posterior.nc", folder / "summary.json", *self.result.figures(folder)]
        self.status.value = status_html(f"saved {len(files)} files to {folder}", level="ok")
        return files


def _noise_at(problem: DispersionProblem, da: xr.DataArray, x: np.ndarray):
    """Inverse variance per pixel at the mode ``x`` and a sentence on how it was set.

    The same steps as :func:`~polkit.workflows.dispersion.fit_dispersion`: the detector
    model (gain and read noise) for emission counts that carry them, otherwise the
    variance function fitted to the residuals with the leverage of the per-angle linear
    columns (:func:`~polkit.workflows.dispersion.calibrate_noise`).
    """
    sol = problem.model_map(x)
    model_map = np.asarray(sol.model).reshape(problem.y.shape)
    counts = str(da.attrs.get("units", "")).strip() == "counts" and problem.kind == "emission"
    design = np.moveaxis(np.asarray(problem.basis(x[None, :]))[0], 1, 2)  # (A, E, K)
    design = np.concatenate([design, np.ones(design.shape[:2] + (1,))], axis=2)
    gain = da.attrs.get("gain") if counts else None
    read_noise = da.attrs.get("read_noise") if counts else None
    inv_var, a, b = wf.calibrate_noise(problem.y, model_map, design=design, gain=gain,
                                       read_noise=read_noise)
    how = ("CCD gain and read noise from the file" if gain is not None and read_noise is not None
           else "fitted to the MAP residuals")
    note = (f"variance = a * model + b with a = {a:.4g}, b = {b:.4g} (squared signal units; "
            f"{how}), times noise_scale^2")
    return inv_var, note


def _is_log(slider) -> bool:
    return type(slider).__name__ == "FloatLogSlider"


def _build_result(problem: DispersionProblem, output, da: xr.DataArray, *, model: str, sha: str,
                  source_name: str, noise_note: str, profile: str):
    """A :class:`DispersionFit` from a sampler run, laid out as the workflow lays it out."""
    space = problem.space
    post_ds = output.posterior_draws()
    theta = np.stack([post_ds[n].values for n in space.names], axis=-1)
    derived = problem.derived(theta)
    strong = derived.pop("strong_coupling")
    derived["strong_coupling_probability"] = (
        np.asarray(strong[0].mean()), "1",
        "posterior probability that 2g > (gamma_C + gamma_X)/2")
    axis = problem.axis
    observed = xr.Dataset({"map": da.assign_attrs(dict(da.attrs))})
    observed["inverse_variance"] = ((axis, "energy"), problem.inv_var,
                                    {"units": f"1/({da.attrs.get('units', '1')})^2"})
    for key in ("source", "sample", "position"):
        if key in da.attrs:
            observed.attrs[key] = str(da.attrs[key])
    prov = {"input_sha256": sha, "input": source_name, "path": "whole_map",
            "noise_model": noise_note, "peak_profile": profile,
            "started_from": "interactive panel: MAP refined from the slider values",
            "window": {axis: [float(problem.in_plane.min()), float(problem.in_plane.max())],
                       "energy": [float(problem.energy.min()), float(problem.energy.max())]}}
    return wf.DispersionFit.from_samples(
        output, space, derived=derived, model=f"{model}_oscillator", kind=problem.kind,
        observed=observed, provenance=prov,
        extra_attrs={"fit_path": "whole_map", "in_plane_axis": axis,
                     "n_excitons": problem.n_excitons})


def dispersion_panel(
    source: str | os.PathLike | xr.DataArray,
    *,
    model: str = "two",
    kind: str | None = None,
    priors: str | os.PathLike | dict | None = None,
    seed: int | None = None,
    max_steps: int | None = None,
    min_steps: int | None = None,
    n_walkers: int | None = None,
    out: str | os.PathLike | None = None,
    angle_window: tuple[float, float] | None = None,
    energy_window: tuple[float, float] | None = None,
    wavelength_medium: str | None = None,
    load_options: dict | None = None,
    profile: str = "lorentzian",
    log_scale: bool | None = None,
) -> DispersionPanel:
    """Build the interactive dispersion panel for a map.

    Parameters
    ----------
    source
        A map file (any format :func:`polkit.load_map` reads) or a canonical map.
    model
        ``"two"`` (photon + one exciton) or ``"three"`` (photon + two excitons).
    kind
        ``"emission"``, ``"reflectance"`` or ``"transmission"``; default from the map.
    priors
        TOML file or dict of priors over the defaults (the sliders span the priors).
    seed
        Root seed of the sampler (recorded in the result).
    max_steps, min_steps, n_walkers
        Sampler settings (defaults as :func:`~polkit.workflows.dispersion.fit_dispersion`).
    out
        Default folder of the *Save* button.
    angle_window, energy_window
        Initial fitted window (degree or 1/um; eV); the whole map by default.
    wavelength_medium, load_options
        Passed to the loader (see :func:`polkit.load_map`).
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
    if model not in MODELS:
        raise DataError(f"expected model 'two' or 'three', found {model!r}.", field="model")
    da, sha, source_name = wf._load(source, kind, wavelength_medium, load_options)
    kind = kind or da.attrs.get("kind", "emission")
    if kind == "transmission":
        kind_model = "emission"
    elif kind in ("emission", "reflectance"):
        kind_model = kind
    else:
        raise DataError(
            f"expected kind 'emission', 'reflectance' or 'transmission', found {kind!r}.",
            path=source_name, field="kind")
    axis = in_plane_axis(da)
    da = da.transpose(axis, "energy")
    steps = int(max_steps) if max_steps is not None else wf.DEFAULT_STEPS["max_steps"]
    return DispersionPanel(
        da, sha=sha, source_name=source_name, model=model, kind_model=kind_model, priors=priors,
        seed=seed, max_steps=steps, min_steps=min_steps, n_walkers=n_walkers, out=out,
        profile=profile, log_scale=(kind_model == "emission") if log_scale is None else log_scale,
        angle_window=angle_window, energy_window=energy_window)

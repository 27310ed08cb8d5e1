"""Interactive first fit of a pump-power series: sliders, live model curves, MAP, MCMC, save.

:func:`power_panel` returns a :class:`PowerPanel` holding every widget (drive it from
Python as in JupyterLab: set ``panel.sliders[name].value``, ``panel.refine_button.click()``,
read ``panel.curve_data()`` and ``panel.result``).

* coherent drive: intensity against power for both sweep directions, the model following
  each sweep's history (an up sweep stays on the lower branch until it ends, a down sweep
  on the upper one), so the hysteresis loop is drawn as the data show it;
* nonresonant drive (reservoir model): emission on log-log axes, with the blueshift and
  the linewidth against power where the series has them;
* sliders for the physics parameters (the noise parameters are left to *Most probable point*); the
  readout shows the bistability criterion and turning-point powers (coherent) or the
  threshold and the occupation at the largest power (reservoir);
* *Most probable point*, *Sample* (background thread, progress bar, *Stop*) and *Save* as in the
  dispersion panel; the result is the one :func:`~polkit.jobs.power.run.fit_power` makes
  (calibration and dispersion inputs propagated per draw), started from the refined point.
"""

from __future__ import annotations

import html
import logging
import os
import time
from typing import Any

import numpy as np

from polkit.inference import SamplerSettings
from polkit.jobs.power import run as pw
from polkit.jobs.power import stages
from polkit.jobs.power.problem import PowerProblem
from polkit.jobs.steps import sample_problem
from polkit.models import coherent
from polkit.plotting.power import SWEEP_COLOURS, power_grid, residual_points
from polkit.widgets._canvas import LiveFigure
from polkit.widgets._common import clip_into, parameter_slider
from polkit.widgets._panel import FitPanel, offscreen_figure

__all__ = ["power_panel", "PowerPanel"]

log = logging.getLogger(__name__)

MEV = 1e-3
_GRID = 120


class PowerPanel(FitPanel):
    """The widgets and state of one interactive power-series fit (see :func:`power_panel`).

    Attributes
    ----------
    widget
        The whole panel (``ipywidgets.VBox``).
    problem
        The :class:`~polkit.jobs.power.problem.PowerProblem` (data and parameter space).
    sliders
        ``{parameter name: slider}`` for the physics parameters.
    refine_button, sample_button, stop_button, save_button, progress, status, readout,
    summary, plot_image, residual_image, corner_image, max_steps, out_folder
        As in :class:`~polkit.widgets.dispersion_panel.DispersionPanel`.
    readout_values
        The numbers of the readout (see :meth:`curve_data` for the curves).
    map_result, result, job
        Last refinement, last result, last sampling job.
    """

    default_steps = pw.DEFAULT_STEPS

    def __init__(self, problem: PowerProblem, setup: stages.PowerSetup, *, seed, max_steps: int,
                 min_steps: int | None, n_walkers: int | None, out):
        import ipywidgets as w

        self.problem = problem
        self.setup = setup
        self.table, self.sha = setup.table, setup.sha256
        self.source_name, self.model = setup.source_name, setup.model
        self.cal, self.cal_info = setup.calibration, setup.calibration_info
        self.disp_draws, self.disp_info = setup.dispersion_draws, setup.dispersion_info
        self.lw_prior, self.lw_note = setup.linewidth_prior, setup.linewidth_note
        self.notes = setup.notes
        self.options = setup.options
        self._init_state(seed=seed, min_steps=min_steps, n_walkers=n_walkers)

        x0, self.guess = stages.power_start(problem, log_margin=True)
        self.space = problem.space
        self._theta = x0
        self._auto_start = x0.copy()
        self.noise_names = {ch.noise_param for ch in problem.channels.values()}

        self.sliders: dict[str, Any] = {}
        for p, v in zip(self.space, x0, strict=True):
            if p.name in self.noise_names:
                continue
            s = parameter_slider(p, v)
            s.observe(self._on_slider, names="value")
            self.sliders[p.name] = s

        self._init_actions(
            max_steps=max_steps,
            out_folder=str(out) if out is not None else f"polkit-out/{self.model}",
            ready="ready: move the sliders until the curves follow the data, then press Most "
                  "probable point")

        names = list(problem.channels)
        self.live = LiveFigure(figsize=(4.4 * len(names), 3.6), ncols=len(names))
        self.plot_image = self.live.image
        self._draw_data(names)
        self._update_curves()

        buttons = w.HBox([self.refine_button, self.sample_button, self.stop_button,
                          self.max_steps, self.progress])
        title = w.HTML(f"<b>power-series panel</b> &mdash; {html.escape(self.source_name)} "
                       f"({html.escape(self.model)} model)")
        self.widget = w.VBox([
            title, self.plot_image, w.HBox([w.VBox(list(self.sliders.values())), self.readout]),
            buttons, self.status, w.HBox([self.save_button, self.out_folder]),
            w.HBox([self.summary, w.VBox([self.residual_image, self.corner_image])]),
        ])

    # -- drawing ----------------------------------------------------------------------------
    def _draw_data(self, names: list[str]) -> None:
        pb = self.problem
        self._curve_grid, self._curve_segs = power_grid(self.problem, _GRID)
        self._lines: dict[str, list] = {}
        labels = {"intensity": f"intensity [{pb.intensity_units}]",
                  "peak_energy": f"peak energy - {pb.e_ref or 0:.5f} eV [meV]",
                  "linewidth": "linewidth (FWHM) [meV]"}
        for ax, name in zip(self.live.axes[0], names, strict=True):
            ch = pb.channels[name]
            y = np.exp(ch.values) if ch.log_space else ch.values
            err = ch.sigma * y if ch.log_space else ch.sigma
            for start, stop, label in pb.segments:
                sl = slice(start, stop)
                ok = ch.used[sl]
                ax.errorbar(pb.power[sl][ok], y[sl][ok], yerr=err[sl][ok], fmt="o", ms=3,
                            lw=0.8, color=SWEEP_COLOURS.get(label, "tab:blue"),
                            label=f"data ({label})" if label != "none" else "data")
            lines = []
            for _start, _stop, label in self._curve_segs:
                colour = SWEEP_COLOURS.get(label, "tab:blue")
                lines.append(ax.plot([], [], "-", lw=1.6, color=colour, alpha=0.9,
                                     label=f"model ({label})" if label != "none"
                                     else "model")[0])
            self._lines[name] = lines
            self.live.overlay(lines)
            ax.set_xlabel("pump power [mW]")
            ax.set_ylabel(labels[name])
            if pb.model == "reservoir":
                ax.set_xscale("log")
                if name == "intensity":
                    ax.set_yscale("log")
            ax.legend(fontsize=7)
        title = ("coherent drive: up and down sweeps" if pb.model == "coherent"
                 else "nonresonant drive: reservoir model")
        self.live.figure.suptitle(title, fontsize=10)
        self.live.redraw()

    def curve_data(self) -> dict[str, list[tuple[np.ndarray, np.ndarray]]]:
        """The model curves as drawn: ``{channel: [(power mW, value), ...]}`` per sweep run
        (intensity in its units, peak energy in meV above the lowest measured, linewidth meV)."""
        return {name: [(np.asarray(ln.get_xdata(), dtype=float),
                        np.asarray(ln.get_ydata(), dtype=float)) for ln in lines]
                for name, lines in self._lines.items()}

    def _redraw(self) -> None:
        self._update_curves()

    def _update_curves(self) -> None:
        t0 = time.perf_counter()
        theta = self.theta()
        pb = self.problem
        grid, segs = self._curve_grid, self._curve_segs
        model = pb.mean_model(theta[None, :], power=grid, segments=segs)
        for name, lines in self._lines.items():
            v = model[name][0]
            if name == "peak_energy":
                v = (v - pb.e_ref) / MEV
            for line, (start, stop, _label) in zip(lines, segs, strict=True):
                line.set_data(grid[start:stop], v[start:stop])
        self.live.update()
        self.readout.value = self._readout_html(theta)
        self.timings.append(time.perf_counter() - t0)

    def _readout_html(self, theta: np.ndarray) -> str:
        c = dict(zip(self.space.names, theta.tolist(), strict=True))
        pb = self.problem
        rows: list[tuple[str, str, str]] = []
        if pb.model == "coherent":
            d, phi = c["detuning_ratio"], c["reduced_drive_per_power"]
            tp = coherent.turning_points(np.array([d]), np.array([1.0]))
            up, down = float(tp.drive_up[0] / phi), float(tp.drive_down[0] / phi)
            bistable = d > coherent.BISTABILITY_RATIO
            self.readout_values = {"detuning_ratio": d, "power_up_threshold": up,
                                   "power_down_threshold": down}
            rows += [("pump detuning / linewidth, Delta/gamma", f"{d:.3f}", "1"),
                     ("bistability needs Delta/gamma >", f"{coherent.BISTABILITY_RATIO:.3f}",
                      "1"),
                     ("up-sweep jump at", f"{up:.3g}" if np.isfinite(up) else "none", "mW"),
                     ("down-sweep fall at", f"{down:.3g}" if np.isfinite(down) else "none",
                      "mW")]
            verdict = "bistable: a hysteresis loop" if bistable else "monostable: no loop"
        else:
            derived = pb.derived(theta[None, :])
            n_max = float(derived["max_occupation"][0][0])
            self.readout_values = {"threshold_power": c["threshold_power"],
                                   "max_occupation": n_max}
            rows += [("threshold power P_th", f"{c['threshold_power']:.3g}", "mW"),
                     ("saturation number n_s", f"{c['saturation_number']:.3g}", "1"),
                     ("occupation at the largest power", f"{n_max:.3g}", "1")]
            if "max_blueshift" in derived:
                b = float(derived["max_blueshift"][0][0])
                self.readout_values["max_blueshift"] = b
                rows.append(("blueshift at the largest power", f"{b:.3f}", "meV"))
            p_max = float(np.max(pb.power))
            verdict = ("the series crosses threshold" if p_max > c["threshold_power"]
                       else "the series stays below threshold")
        body = "".join(f"<tr><td>{html.escape(a)}</td><td style='text-align:right'>{b}</td>"
                       f"<td>{u}</td></tr>" for a, b, u in rows)
        return f"<table class='polkit-readout'>{body}</table><i>{verdict}</i>"

    # -- actions ----------------------------------------------------------------------------
    def _find_mode(self):
        """The mode started from the sliders and from the automatic guess (the better kept)."""
        x_sl = np.array([clip_into(p, v) for p, v in zip(self.space, self.theta(), strict=True)])
        candidates = [stages.refine_mode(self.problem, x_sl),
                      stages.refine_mode(self.problem, self._auto_start)]
        return max(candidates, key=lambda c: c.log_post)

    def _residual_png(self, theta: np.ndarray, label: str) -> bytes:
        from polkit.widgets._canvas import figure_png

        theta = np.atleast_2d(theta)
        pb = self.problem
        model = pb.fit_space_model(theta)
        names = list(pb.channels)
        fig = offscreen_figure((5.6, 1.9 * len(names) + 0.6))
        axes = np.atleast_1d(fig.subplots(len(names), 1, sharex=True))
        cols = dict(zip(self.space.names, np.median(theta, axis=0), strict=True))
        for ax, name in zip(axes, names, strict=True):
            ch = pb.channels[name]
            with np.errstate(invalid="ignore"):
                med = np.nanmedian(np.where(np.isfinite(model[name]), model[name], np.nan),
                                   axis=0)
            r = ch.residuals(med, float(cols[ch.noise_param]))
            rms = residual_points(ax, pb, r)
            ax.set_ylabel(f"{name}\n[sigma]", fontsize=8)
            ax.set_title(f"{name} at the {label}: rms {rms:.2f} sigma", fontsize=8)
            if pb.model == "reservoir":
                ax.set_xscale("log")
        axes[-1].set_xlabel("pump power [mW]")
        return figure_png(fig)

    def _current_problem(self) -> PowerProblem:
        return self.problem

    def _sampling_run(self, problem, start, walkers, steps):
        provenance = {"started_from": "interactive panel: MAP refined from the slider values"}

        def run(log_likelihood, stop_event):
            sampler = SamplerSettings(n_walkers=walkers, progress=False, stop_event=stop_event,
                                      **steps)
            output = sample_problem(problem, start, sampler=sampler,
                                       log_likelihood=log_likelihood, seed=self.seed)
            return pw.build_power_result(problem, output, self.setup, provenance=provenance)

        return run

    def _corner_names(self, result) -> list[str]:
        return [n for n in self.space.names if n not in self.noise_names]

    def _posterior_residual_png(self, result) -> bytes:
        theta = np.stack([result.draws(n) for n in self.space.names], axis=-1)
        return self._residual_png(theta, "posterior")


def power_panel(
    source,
    *,
    model: str = "coherent",
    calibration=None,
    dispersion=None,
    priors=None,
    seed: int | None = None,
    max_steps: int | None = None,
    min_steps: int | None = None,
    n_walkers: int | None = None,
    out: str | os.PathLike | None = None,
) -> PowerPanel:
    """Build the interactive power-series panel.

    Parameters
    ----------
    source
        A series table (CSV with bracketed units, netCDF, ``.npz``) or an in-memory series
        Dataset (spectra cubes: run :func:`polkit.linefit.extract_observables` first, or
        use :func:`~polkit.jobs.power.run.fit_power`).
    model
        ``"coherent"`` or ``"reservoir"``.
    calibration, dispersion, priors
        As in :func:`~polkit.jobs.power.run.fit_power` (used when the result is built);
        ``calibration`` may be a :class:`~polkit.jobs.power.options.PowerCalibration`
        with the sample's constants and the pump-spot profile.
    seed, max_steps, min_steps, n_walkers
        Sampler settings.
    out
        Default folder of the *Save* button.

    Returns
    -------
    PowerPanel

    Raises
    ------
    DataError, ConfigError
        Bad series, options, priors or calibration (naming the file and the field).
    """
    problem, setup = stages.prepare_power(
        source, model=model, calibration=calibration, dispersion=dispersion, priors=priors,
        cube_refusal="the panel takes a table of observables, found a spectra cube; reduce it "
        "with polkit.linefit.extract_observables first")
    steps = int(max_steps) if max_steps is not None else pw.DEFAULT_STEPS["max_steps"]
    return PowerPanel(problem, setup, seed=seed, max_steps=steps, min_steps=min_steps,
                      n_walkers=n_walkers, out=out)

"""Interactive first fit of a pump-power series: sliders, live model curves, MAP, MCMC, save.

:func:`power_panel` returns a :class:`PowerPanel` holding every widget (drive it from
Python as in JupyterLab: set ``panel.sliders[name].value``, ``panel.refine_button.click()``,
read ``panel.curve_data()`` and ``panel.result``).

* coherent drive: intensity against power for both sweep directions, the model following
  each sweep's history (an up sweep stays on the lower branch until it ends, a down sweep
  on the upper one), so the hysteresis loop is drawn as the data show it;
* nonresonant drive (reservoir model): emission on log-log axes, with the blueshift and
  the linewidth against power where the series has them;
* sliders for the physics parameters (the noise parameters are left to *Refine*); the
  readout shows the bistability criterion and turning-point powers (coherent) or the
  threshold and the occupation at the largest power (reservoir);
* *Refine*, *Sample* (background thread, progress bar, *Stop*) and *Save* as in the
  dispersion panel; the result is the one :func:`~polkit.workflows.power.fit_power` makes
  (calibration and dispersion inputs propagated per draw), started from the refined point.
"""

from __future__ import annotations

import html
import json
import logging
import os
import time
from pathlib import Path
from typing import Any

import numpy as np

from ..errors import DataError
from ..inference import LogPosterior, apply_priors, find_map, run_ensemble
from ..models import coherent
from ..workflows import power as pw
from ..workflows.power_model import (
    PowerProblem,
    calibrated_quantities,
    ciuti_estimate,
    linewidth_prior,
)
from ._canvas import LiveFigure
from ._common import SamplingJob, clip_into, corner_png, parameter_slider, status_html

__all__ = ["power_panel", "PowerPanel"]

log = logging.getLogger(__name__)

MEV = 1e-3
_COLOURS = {"up": "tab:blue", "down": "tab:red", "none": "tab:blue"}
_GRID = 120


class PowerPanel:
    """The widgets and state of one interactive power-series fit (see :func:`power_panel`).

    Attributes
    ----------
    widget
        The whole panel (``ipywidgets.VBox``).
    problem
        The :class:`~polkit.workflows.power_model.PowerProblem` (data and parameter space).
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

    def __init__(self, problem: PowerProblem, *, table, sha: str, source_name: str,
                 model: str, cal, cal_info: dict, disp_draws: dict, disp_info: dict,
                 lw_prior, lw_note, notes: list[str], options: dict, seed, max_steps: int,
                 min_steps: int | None, n_walkers: int | None, out):
        import ipywidgets as w

        self.problem = problem
        self.table = table
        self.sha = sha
        self.source_name = source_name
        self.model = model
        self.cal, self.cal_info = cal, cal_info
        self.disp_draws, self.disp_info = disp_draws, disp_info
        self.lw_prior, self.lw_note = lw_prior, lw_note
        self.notes = notes
        self.options = options
        self.seed = seed
        self.min_steps = min_steps
        self.n_walkers = n_walkers
        self.map_result = None
        self._refined_theta = None
        self.result = None
        self.job: SamplingJob | None = None
        self._hold = False
        self.timings: list[float] = []
        self.readout_values: dict[str, float] = {}
        self.show_corner = True

        self.guess = problem.guess()
        space = problem.space
        x0 = np.array([clip_into(p, self.guess.get(p.name, np.nan)) for p in space])
        self.space = problem.with_scales(dict(zip(space.names, x0, strict=True)))
        self._theta = x0
        self.noise_names = {ch.noise_param for ch in problem.channels.values()}

        self.sliders: dict[str, Any] = {}
        for p, v in zip(self.space, x0, strict=True):
            if p.name in self.noise_names:
                continue
            s = parameter_slider(p, v)
            s.observe(self._on_slider, names="value")
            self.sliders[p.name] = s

        self.refine_button = w.Button(description="Refine (MAP)", icon="crosshairs")
        self.sample_button = w.Button(description="Sample (MCMC)", icon="play",
                                      button_style="primary")
        self.stop_button = w.Button(description="Stop", icon="stop", button_style="warning",
                                    disabled=True)
        self.save_button = w.Button(description="Save", icon="save", disabled=True)
        self.refine_button.on_click(lambda _b: self._guarded(self.refine))
        self.sample_button.on_click(lambda _b: self._guarded(self.sample))
        self.stop_button.on_click(lambda _b: self.stop())
        self.save_button.on_click(lambda _b: self._guarded(self.save))
        self.max_steps = w.BoundedIntText(value=int(max_steps), min=10, max=10_000_000,
                                          description="max steps", layout={"width": "180px"})
        self.out_folder = w.Text(value=str(out) if out is not None else f"polkit-out/{model}",
                                 description="save to", layout={"width": "340px"})
        self.progress = w.IntProgress(value=0, min=0, max=int(max_steps), description="MCMC",
                                      bar_style="info", layout={"width": "320px"})
        self.status = w.HTML(status_html("ready: move the sliders until the curves follow the "
                                         "data, then Refine"))
        self.readout = w.HTML()
        self.summary = w.HTML()
        self.residual_image = w.Image(format="png")
        self.corner_image = w.Image(format="png")

        names = list(problem.channels)
        self.live = LiveFigure(figsize=(4.4 * len(names), 3.6), ncols=len(names))
        self.plot_image = self.live.image
        self._draw_data(names)
        self._update_curves()

        buttons = w.HBox([self.refine_button, self.sample_button, self.stop_button,
                          self.max_steps, self.progress])
        title = w.HTML(f"<b>power-series panel</b> &mdash; {html.escape(source_name)} "
                       f"({html.escape(model)} model)")
        self.widget = w.VBox([
            title, self.plot_image, w.HBox([w.VBox(list(self.sliders.values())), self.readout]),
            buttons, self.status, w.HBox([self.save_button, self.out_folder]),
            w.HBox([self.summary, w.VBox([self.residual_image, self.corner_image])]),
        ])

    # -- display ----------------------------------------------------------------------------
    def _repr_mimebundle_(self, **kwargs):
        return self.widget._repr_mimebundle_(**kwargs)

    def snapshot(self):
        """A static copy of the plot with the current curves (``IPython.display.Image``)."""
        from IPython.display import Image

        return Image(data=self.live.png(), format="png")

    # -- values -----------------------------------------------------------------------------
    def theta(self) -> np.ndarray:
        """The parameter vector at the sliders (noise parameters from the last refinement)."""
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
                self._theta[self.space.names.index(name)] = float(v)
                if name in self.sliders:
                    self.sliders[name].value = float(v)
        finally:
            self._hold = False
        self._update_curves()

    # -- drawing ----------------------------------------------------------------------------
    def _grid(self):
        pb = self.problem
        if pb.model == "reservoir":
            p = pb.power[pb.power > 0]
            return np.geomspace(p.min(), p.max(), _GRID), [(0, _GRID, "none")]
        parts, segs, offset = [], [], 0
        for start, stop, label in pb.segments:
            p = pb.power[start:stop]
            parts.append(np.linspace(p[0], p[-1], _GRID))
            segs.append((offset, offset + _GRID, label))
            offset += _GRID
        return np.concatenate(parts), segs

    def _draw_data(self, names: list[str]) -> None:
        pb = self.problem
        self._curve_grid, self._curve_segs = self._grid()
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
                            lw=0.8, color=_COLOURS.get(label, "tab:blue"),
                            label=f"data ({label})" if label != "none" else "data")
            lines = []
            for _start, _stop, label in self._curve_segs:
                lines.append(ax.plot([], [], "-", lw=1.6, color=_COLOURS.get(label, "tab:blue"),
                                     alpha=0.9, label=f"model ({label})" if label != "none"
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

    def _on_slider(self, _change) -> None:
        if not self._hold:
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
    def _guarded(self, action) -> None:
        from ..errors import PolkitError

        try:
            action()
        except PolkitError as exc:
            self.status.value = status_html(f"error: {exc}", level="error")
            log.warning("%s", exc)

    def refine(self):
        """Maximum a posteriori point, started from the sliders and from the automatic guess
        (the better mode is kept); sliders moved there.

        Returns
        -------
        MapResult
        """
        self.status.value = status_html("refining: maximum a posteriori...", level="busy")
        self.refine_button.disabled = True
        try:
            space = self.space
            post = LogPosterior(self.problem.log_likelihood, space)
            x_sl = np.array([clip_into(p, v) for p, v in zip(space, self.theta(), strict=True)])
            x_auto = np.array([clip_into(p, self.guess.get(p.name, np.nan)) for p in space])
            candidates = [find_map(post, space, x_sl), find_map(post, space, x_auto)]
            start = max(candidates, key=lambda c: c.log_post)
        finally:
            self.refine_button.disabled = False
        self.map_result = start
        self.set_values(dict(zip(space.names, start.x.tolist(), strict=True)))
        self._refined_theta = self.theta()
        self.residual_image.value = self._residual_png(start.x[None, :], "MAP")
        self.status.value = status_html(
            f"refined: log posterior {start.log_post:.2f}; "
            f"{'optimiser converged' if start.success else 'optimiser: ' + start.message}",
            level="ok" if start.success else "warn")
        return start

    def _residual_png(self, theta: np.ndarray, label: str) -> bytes:
        from matplotlib.backends.backend_agg import FigureCanvasAgg
        from matplotlib.figure import Figure

        from ._canvas import figure_png

        pb = self.problem
        model = pb.fit_space_model(theta)
        names = list(pb.channels)
        fig = Figure(figsize=(5.6, 1.9 * len(names) + 0.6), dpi=80, layout="constrained")
        FigureCanvasAgg(fig)
        axes = np.atleast_1d(fig.subplots(len(names), 1, sharex=True))
        cols = dict(zip(self.space.names, np.median(theta, axis=0), strict=True))
        for ax, name in zip(axes, names, strict=True):
            ch = pb.channels[name]
            with np.errstate(invalid="ignore"):
                med = np.nanmedian(np.where(np.isfinite(model[name]), model[name], np.nan),
                                   axis=0)
            r = ch.residuals(med, float(cols[ch.noise_param]))
            for start, stop, lab in pb.segments:
                sl = slice(start, stop)
                ax.plot(pb.power[sl], r[sl], "o", ms=3, color=_COLOURS.get(lab, "tab:blue"))
            ax.axhline(0, color="0.3", lw=0.8)
            for s in (-2, 2):
                ax.axhline(s, color="0.6", lw=0.6, ls="--")
            rms = float(np.sqrt(np.nanmean(r**2))) if np.isfinite(r).any() else float("nan")
            ax.set_ylabel(f"{name}\n[sigma]", fontsize=8)
            ax.set_title(f"{name} at the {label}: rms {rms:.2f} sigma", fontsize=8)
            if pb.model == "reservoir":
                ax.set_xscale("log")
        axes[-1].set_xlabel("pump power [mW]")
        return figure_png(fig)

    def sample(self, *, background: bool = True) -> SamplingJob:
        """Run the MCMC from the refined point (refining first if the sliders moved).

        Parameters
        ----------
        background
            Run in a background thread (*Stop* ends it); ``False`` runs in the calling
            thread and returns when done.

        Returns
        -------
        SamplingJob
        """
        if self.job is not None and self.job.running:
            self.status.value = status_html("already sampling; Stop first", level="warn")
            return self.job
        if (self.map_result is None or self._refined_theta is None
                or not np.array_equal(self._refined_theta, self.theta())):
            self.refine()
        start = self.map_result
        steps = dict(pw.DEFAULT_STEPS)
        steps["max_steps"] = int(self.max_steps.value)
        steps["min_steps"] = min(steps["min_steps"], steps["max_steps"])
        if self.min_steps is not None:
            steps["min_steps"] = int(self.min_steps)
        steps["check_every"] = min(steps["check_every"], steps["max_steps"])
        walkers = self.n_walkers or max(32, 4 * len(self.space))
        space = self.space

        def run(log_likelihood, stop_event):
            output = run_ensemble(log_likelihood, space, start, n_walkers=walkers,
                                  seed=self.seed, progress=False, stop_event=stop_event, **steps)
            return self._build_result(output)

        self.progress.max = steps["max_steps"]
        self.progress.value = 0
        self.progress.bar_style = "info"
        self.sample_button.disabled = True
        self.refine_button.disabled = True
        self.stop_button.disabled = not background
        self.status.value = status_html(
            f"sampling: {walkers} walkers, up to {steps['max_steps']} steps...", level="busy")
        self.job = SamplingJob(run, self.problem.log_likelihood, max_steps=steps["max_steps"],
                               on_progress=self._on_progress, on_done=self._on_done)
        return self.job.start(background=background)

    def _build_result(self, output):
        """A :class:`~polkit.workflows.power.PowerFit` laid out as ``fit_power`` lays it out."""
        pb, space = self.problem, self.space
        post = output.posterior_draws()
        flat = np.stack([post[n].values for n in space.names], axis=-1).reshape(-1, len(space))
        stream = np.random.SeedSequence(output.seed_entropy,
                                        spawn_key=(*output.seed_spawn_key, pw._DERIVED_STREAM))
        rng = np.random.default_rng(stream)
        linewidth = (self.lw_prior.sample(rng, flat.shape[0]) if self.lw_prior is not None
                     else None)
        derived = pb.derived(flat, linewidth=linewidth)
        o = self.options
        extra, cal_notes = calibrated_quantities(
            pb, flat, derived, calibration=self.cal, rng=rng,
            exciton_fraction=self.disp_draws.get("exciton_fraction_k0"), n_wells=o["n_wells"],
            exciton_binding_meV=o["exciton_binding_meV"], bohr_radius_nm=o["bohr_radius_nm"],
            reservoir_lifetime=o["reservoir_lifetime"])
        derived.update(extra)
        notes = [*self.notes, *cal_notes]
        if self.cal is not None:
            notes.append("calibration inputs propagated per draw: each posterior draw paired "
                         "with an independent draw of the calibration's log-normal inputs (the "
                         "likelihood does not depend on them)")
        prov: dict[str, Any] = {
            "input_sha256": self.sha, "input": self.source_name, "notes": notes,
            "linewidth_prior": None if self.lw_prior is None else
            {**self.lw_prior.to_dict(), "units": "meV", "source": self.lw_note},
            "segments": [list(s) for s in pb.segments],
            "derived_stream_spawn_key": [*output.seed_spawn_key, pw._DERIVED_STREAM],
            "started_from": "interactive panel: MAP refined from the slider values"}
        prov.update(self.cal_info)
        prov.update(self.disp_info)
        for key in ("n_wells", "exciton_binding_meV", "bohr_radius_nm"):
            if o[key] is not None:
                prov[key] = o[key]
        if o["reservoir_lifetime"] is not None:
            prov["reservoir_lifetime_ps"] = o["reservoir_lifetime"]
        if o["exciton_binding_meV"] is not None and o["bohr_radius_nm"] is not None:
            prov["exciton_interaction_estimate_ueV_um2"] = ciuti_estimate(
                float(o["exciton_binding_meV"]), float(o["bohr_radius_nm"]))
        attrs = {"notes": json.dumps(notes), "calibrated": int(self.cal is not None),
                 "intensity_units": pb.intensity_units}
        return pw.PowerFit.from_samples(output, space, derived=derived, model=self.model,
                                        kind="power", observed=self.table, provenance=prov,
                                        extra_attrs=attrs)

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
        self.progress.bar_style = "success" if result.converged else "warning"
        if result.converged:
            self.progress.value = self.progress.max
        self.summary.value = result._repr_html_()
        physics = [n for n in self.space.names if n not in self.noise_names]
        if self.show_corner:
            self.corner_image.value = corner_png(result, physics)
        theta = np.stack([result.draws(n) for n in self.space.names], axis=-1)
        self.residual_image.value = self._residual_png(theta, "posterior")
        self.save_button.disabled = False
        if result.converged:
            self.status.value = status_html("sampling done: converged", level="ok")
        else:
            self.status.value = status_html(
                "sampling done: NOT converged ("
                + "; ".join(result.diagnostics.get("reasons", [])) + ")", level="warn")

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
        """Write ``posterior.nc``, ``summary.json`` and the figures (as the command line does).

        Returns
        -------
        list of Path
        """
        if self.result is None:
            raise DataError("no result to save yet: press Sample first", field="result")
        folder = Path(folder if folder is not None else self.out_folder.value)
        self.result.save(folder)
        files = [folder / "posterior.nc", folder / "summary.json", *self.result.figures(folder)]
        self.status.value = status_html(f"saved {len(files)} files to {folder}", level="ok")
        return files


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
    n_wells: int | None = None,
    exciton_binding_meV: float | None = None,
    bohr_radius_nm: float | None = None,
    reservoir_lifetime_ps: float | tuple[float, float] | None = None,
) -> PowerPanel:
    """Build the interactive power-series panel.

    Parameters
    ----------
    source
        A series table (CSV with bracketed units, netCDF, ``.npz``) or an in-memory series
        Dataset (spectra cubes: run :func:`polkit.extract.extract_observables` first, or
        use :func:`~polkit.workflows.power.fit_power`).
    model
        ``"coherent"`` or ``"reservoir"``.
    calibration, dispersion, priors
        As in :func:`~polkit.workflows.power.fit_power` (used when the result is built).
    n_wells, exciton_binding_meV, bohr_radius_nm, reservoir_lifetime_ps
        As in :func:`~polkit.workflows.power.fit_power` (used when the result is built).
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
    lifetime_r = pw._check_options(model, n_wells, exciton_binding_meV, bohr_radius_nm,
                                   reservoir_lifetime_ps)
    raw, sha, source_name, path = pw._load(source)
    where = path if path is not None else source_name
    if pw._is_cube(raw):
        raise DataError("the panel takes a table of observables, found a spectra cube; reduce "
                        "it with polkit.extract.extract_observables first", path=where,
                        field="intensity")
    pw.check_series(raw, model, path=where)
    cal, cal_info = pw._calibration(calibration)
    disp_draws, disp_info = pw._dispersion(dispersion)
    table = pw._table(raw)
    problem = PowerProblem.from_series(table, model, path=where)
    notes: list[str] = []
    if problem.ignored:
        notes.append(f"not used by the {model} model: {', '.join(problem.ignored)}")
    space = problem.default_space()
    user, prior_path, user_lw = pw._split_priors(priors, model)
    if user:
        problem.space = apply_priors(space, user, path=prior_path)
    lw_prior, lw_note = None, None
    if model == "coherent":
        if user_lw is not None:
            lw_prior, lw_note = user_lw, "polariton_linewidth prior as given by the user"
        else:
            lw_prior, lw_note = linewidth_prior(
                dispersion_linewidth=disp_draws.get("lp_linewidth_k0"), calibration=cal)
        notes.append(lw_note + "; drawn from this prior per posterior draw (the likelihood "
                     "depends only on Delta/gamma)")
    steps = int(max_steps) if max_steps is not None else pw.DEFAULT_STEPS["max_steps"]
    options = {"n_wells": n_wells, "exciton_binding_meV": exciton_binding_meV,
               "bohr_radius_nm": bohr_radius_nm, "reservoir_lifetime": lifetime_r}
    return PowerPanel(problem, table=table, sha=sha, source_name=source_name, model=model,
                      cal=cal, cal_info=cal_info, disp_draws=disp_draws, disp_info=disp_info,
                      lw_prior=lw_prior, lw_note=lw_note, notes=notes, options=options,
                      seed=seed, max_steps=steps, min_steps=min_steps, n_walkers=n_walkers,
                      out=out)

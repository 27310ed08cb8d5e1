"""What every fitting panel does alike: values at the sliders, Refine, Sample, Stop, Save.

:class:`FitPanel` holds the buttons, the progress bar, the status line and the result
views, and runs the actions; a panel adds its figure, its sliders and its physics through
a few methods (:meth:`FitPanel._redraw`, :meth:`FitPanel._find_mode`,
:meth:`FitPanel._current_problem`, :meth:`FitPanel._sampling_run`,
:meth:`FitPanel._residual_png`, :meth:`FitPanel._corner_names`,
:meth:`FitPanel._posterior_residual_png`).
"""

from __future__ import annotations

import logging
import os
from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from polkit.errors import DataError, PolkitError
from polkit.jobs.steps import step_limits, walker_count
from polkit.widgets._common import SamplingJob, corner_png, status_html

__all__ = ["FitPanel", "offscreen_figure"]

log = logging.getLogger(__name__)


def offscreen_figure(figsize: tuple[float, float], *, dpi: int = 80):
    """A matplotlib Figure on an Agg canvas, outside pyplot (nothing to close)."""
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, dpi=dpi, layout="constrained")
    FigureCanvasAgg(fig)
    return fig


class FitPanel:
    """The state and actions a fitting panel shares (see the module notes).

    A subclass sets :attr:`space`, :attr:`sliders` (parameter name -> slider, the
    physics parameters) and :attr:`_theta` (the full parameter vector, noise parameters
    included), and :attr:`live` (a :class:`~polkit.widgets._canvas.LiveFigure`).
    """

    #: the job's sampler defaults (``max_steps``, ``min_steps``, ``check_every``)
    default_steps: dict[str, int] = {}
    #: decimals of the log posterior in the status line after *Most probable point*
    _log_post_digits = 2
    #: show warnings recorded during sampling in the status line
    _status_warnings = False

    def _init_state(self, *, seed, min_steps: int | None, n_walkers: int | None) -> None:
        self.seed = seed
        self.min_steps = min_steps
        self.n_walkers = n_walkers
        self.map_result = None
        self._refined_theta: np.ndarray | None = None
        self.result = None
        self.job: SamplingJob | None = None
        self._hold = False
        self.timings: list[float] = []
        self.readout_values: dict[str, float] = {}
        self.show_corner = True

    def _init_actions(self, *, max_steps: int, out_folder: str, ready: str,
                      tooltips: bool = False) -> None:
        """Buttons, step limit, save folder, progress bar, status line and result views."""
        import ipywidgets as w

        tips = {
            "refine": {"tooltip": "move to the most probable point (maximum a posteriori), "
                                  "starting from the sliders"},
            "sample": {"tooltip": "emcee from the refined point, in the background"},
            "stop": {"tooltip": "end sampling after the current step"},
            "save": {"tooltip": "posterior.nc, summary.json and figures"},
        } if tooltips else {}
        self.refine_button = w.Button(description="Most probable point", icon="crosshairs",
                                      **tips.get("refine", {}))
        self.sample_button = w.Button(description="Sample (MCMC)", icon="play",
                                      button_style="primary", **tips.get("sample", {}))
        self.stop_button = w.Button(description="Stop", icon="stop", button_style="warning",
                                    disabled=True, **tips.get("stop", {}))
        self.save_button = w.Button(description="Save", icon="save", disabled=True,
                                    **tips.get("save", {}))
        self.refine_button.on_click(lambda _b: self._guarded(self.refine))
        self.sample_button.on_click(lambda _b: self._guarded(self.sample))
        self.stop_button.on_click(lambda _b: self.stop())
        self.save_button.on_click(lambda _b: self._guarded(self.save))
        self.max_steps = w.BoundedIntText(value=int(max_steps), min=10, max=10_000_000,
                                          description="max steps", layout={"width": "180px"})
        self.out_folder = w.Text(value=out_folder, description="save to",
                                 layout={"width": "340px"})
        self.progress = w.IntProgress(value=0, min=0, max=int(max_steps), description="MCMC",
                                      bar_style="info", layout={"width": "320px"})
        self.status = w.HTML(status_html(ready))
        self.readout = w.HTML()
        self.summary = w.HTML()
        self.residual_image = w.Image(format="png")
        self.corner_image = w.Image(format="png")

    # -- what a panel adds ------------------------------------------------------------------
    def _redraw(self) -> None:
        """Redraw the model over the data at the current slider values."""
        raise NotImplementedError

    def _find_mode(self):
        """The :class:`~polkit.inference.MapResult` that *Most probable point* moved the
        sliders to."""
        raise NotImplementedError

    def _current_problem(self):
        """The problem sampling runs on (its ``log_likelihood`` is counted for progress)."""
        raise NotImplementedError

    def _sampling_run(self, problem, start, walkers: int, steps: dict[str, int]) -> Callable:
        """``run(log_likelihood, stop_event) -> result`` for a :class:`SamplingJob`."""
        raise NotImplementedError

    def _residual_png(self, theta: np.ndarray, label: str) -> bytes:
        raise NotImplementedError

    def _corner_names(self, result) -> list[str]:
        raise NotImplementedError

    def _posterior_residual_png(self, result) -> bytes:
        raise NotImplementedError

    # -- display ----------------------------------------------------------------------------
    def _repr_mimebundle_(self, **kwargs):
        return self.widget._repr_mimebundle_(**kwargs)

    def snapshot(self):
        """A static copy of the figure with the current overlay (``IPython.display.Image``).

        Exported HTML cannot run widgets offline: show this beside the panel.
        """
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
        """Move several sliders at once, with a single redraw.

        A slider keeps its value within its range (the prior's support).
        """
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
        self._redraw()

    def _on_slider(self, _change) -> None:
        if not self._hold:
            self._redraw()

    # -- actions ----------------------------------------------------------------------------
    def _guarded(self, action) -> None:
        """Run a button's action; show a polkit error in the status line instead of raising."""
        try:
            action()
        except PolkitError as exc:
            self.status.value = status_html(f"error: {exc}", level="error")
            log.warning("%s", exc)

    def refine(self):
        """Maximum a posteriori point from the slider values; sliders moved there.

        Returns
        -------
        MapResult
        """
        self.status.value = status_html("refining: maximum a posteriori...", level="busy")
        self.refine_button.disabled = True
        try:
            start = self._find_mode()
        finally:
            self.refine_button.disabled = False
        self.map_result = start
        self.set_values(dict(zip(self.space.names, start.x.tolist(), strict=True)))
        self._refined_theta = self.theta()
        self.residual_image.value = self._residual_png(start.x, "MAP")
        self.status.value = status_html(
            f"refined: log posterior {start.log_post:.{self._log_post_digits}f}; "
            f"{'optimiser converged' if start.success else 'optimiser: ' + start.message}",
            level="ok" if start.success else "warn")
        return start

    def _needs_refine(self) -> bool:
        return (self.map_result is None or self._refined_theta is None
                or not np.array_equal(self._refined_theta, self.theta()))

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
        problem = self._current_problem()
        steps = step_limits(self.default_steps, int(self.max_steps.value), self.min_steps)
        walkers = walker_count(self.n_walkers, self.space)
        run = self._sampling_run(problem, self.map_result, walkers, steps)

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
        self.progress.bar_style = "success" if result.converged else "warning"
        if result.converged:
            self.progress.value = self.progress.max
        self.summary.value = result._repr_html_()
        if self.show_corner:
            self.corner_image.value = corner_png(result, self._corner_names(result))
        self.residual_image.value = self._posterior_residual_png(result)
        self.save_button.disabled = False
        if result.converged:
            self.status.value = status_html("sampling done: converged", level="ok")
            return
        warned = "; ".join(str(wm.message) for wm in job.warnings)
        self.status.value = status_html(
            "sampling done: NOT converged (" + "; ".join(result.diagnostics.get("reasons", []))
            + ")" + (f" [{warned}]" if warned and self._status_warnings else ""), level="warn")

    def stop(self) -> None:
        """End a running sampler after its current step (the result is kept, not converged)."""
        if self.job is not None and self.job.running:
            self.job.stop()
            self.status.value = status_html("stopping after the current step...", level="busy")

    def wait(self, timeout: float | None = None) -> Any:
        """Wait for the sampler and return the result (raises its error, if any)."""
        if self.job is None:
            raise DataError("nothing is sampling: press Sample first", field="job")
        return self.job.wait(timeout)

    def save(self, folder: str | os.PathLike | None = None) -> list[Path]:
        """Write the result as the command line does: ``posterior.nc``, ``summary.json``,
        ``fit.png``, ``residuals.png``, ``corner.png``, ``traces.png`` (and ``spectra.png`` for a
        dispersion fit).

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

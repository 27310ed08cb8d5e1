"""Pieces shared by the panels: sliders from priors, the background sampling job, result views.

Nothing here knows a physical model; the panels pass in their parameter space, their
log-likelihood and a function that turns a sampler run into a result.
"""

from __future__ import annotations

import html
import logging
import math
import threading
import warnings
from collections.abc import Callable
from typing import Any

import numpy as np

from polkit.errors import PolkitError
from polkit.jobs import steps as _steps

log = logging.getLogger(__name__)

__all__ = ["parameter_slider", "clip_into", "SamplingJob", "corner_png", "status_html"]

#: slider step and readout format per unit of a parameter
_STEPS = {"eV": (1e-5, ".5f"), "meV": (1e-3, ".3f"), "1": (1e-4, ".4f")}
_LAYOUT = {"width": "440px"}
_STYLE = {"description_width": "190px"}


def clip_into(param, value: float) -> float:
    """``value`` if strictly inside the prior support of ``param``, else a point just inside
    it (NaN -> the support's centre; a log-uniform support is left by a relative margin)."""
    return _steps.clip_into(param, value, keep_inside=True, log_margin=True)


def _slider_range(param) -> tuple[float, float]:
    prior = param.prior
    lo, hi = prior.bounds
    if prior.kind in ("normal", "truncnormal"):
        lo = max(lo, prior.mu - 5.0 * prior.sigma)
        hi = min(hi, prior.mu + 5.0 * prior.sigma)
    return float(lo), float(hi)


def parameter_slider(param, value: float):
    """A slider over the prior support of ``param`` (log scale for log-uniform priors).

    The description carries the parameter's name and units; the range is the prior's
    support (five standard deviations for a normal prior), so every value a slider can
    take has a finite prior density and a refinement started there is well defined.
    """
    import ipywidgets as w

    lo, hi = _slider_range(param)
    label = f"{param.name} [{param.units}]"
    tooltip = param.description or param.name
    if param.prior.kind == "loguniform" or (lo > 0 and hi / lo > 1e3):
        lo = max(lo, 1e-300)
        v = float(np.clip(value, lo, hi))
        return w.FloatLogSlider(
            value=v, base=10, min=math.log10(lo), max=math.log10(hi), step=1e-3,
            description=label, tooltip=tooltip, readout_format=".4g",
            continuous_update=True, layout=_LAYOUT, style=_STYLE,
        )
    step, fmt = _STEPS.get(param.units, ((hi - lo) / 20000.0, ".4g"))
    step = min(step, (hi - lo) / 200.0)
    return w.FloatSlider(
        value=float(np.clip(value, lo, hi)), min=lo, max=hi, step=step, description=label,
        tooltip=tooltip, readout_format=fmt, continuous_update=True,
        layout=_LAYOUT, style=_STYLE,
    )


def status_html(text: str, *, level: str = "info") -> str:
    """A one-line coloured status message (``info``, ``busy``, ``ok``, ``warn``, ``error``)."""
    colours = {"info": "#444", "busy": "#1f4e9e", "ok": "#1e7e34", "warn": "#a15c00",
               "error": "#b02a37"}
    return (f'<span style="color:{colours.get(level, "#444")}">{html.escape(text)}</span>')


class SamplingJob:
    """One MCMC run, in the calling thread or a background thread, with progress and a stop.

    Parameters
    ----------
    run
        ``run(log_likelihood, stop_event) -> result``: the panel's sampling and result
        assembly, called with a log-likelihood wrapped to count sampler steps.
    log_likelihood
        The vectorised log-likelihood handed to ``run`` (wrapped).
    max_steps
        Step limit (for the progress bar).
    on_progress
        Called with the number of steps done (from the sampling thread).
    on_done
        Called with the job once it has finished (result, error or stop).

    Notes
    -----
    emcee's moves split the ensemble in two halves and evaluate each half in one call, so
    a step is two calls of the vectorised log-likelihood; progress counts calls / 2
    (the first call, on the starting ensemble, is not a step).
    """

    def __init__(self, run: Callable, log_likelihood: Callable, *, max_steps: int,
                 on_progress: Callable[[int], None] | None = None,
                 on_done: Callable[[SamplingJob], None] | None = None):
        self._run = run
        self._like = log_likelihood
        self.max_steps = int(max_steps)
        self.on_progress = on_progress
        self.on_done = on_done
        self.stop_event = threading.Event()
        self.thread: threading.Thread | None = None
        self.result: Any = None
        self.error: BaseException | None = None
        self.warnings: list[warnings.WarningMessage] = []
        self.calls = 0
        self.done = threading.Event()

    @property
    def steps(self) -> int:
        """Sampler steps done so far (from the likelihood calls)."""
        return max(0, (self.calls - 1) // 2)

    def _counting(self, theta):
        self.calls += 1
        if self.on_progress is not None and self.calls % 2 == 1:
            try:
                self.on_progress(min(self.steps, self.max_steps))
            except Exception:  # noqa: BLE001 - a display problem must not end the run
                log.exception("progress display failed")
        return self._like(theta)

    def _work(self, record: bool) -> None:
        try:
            if record:
                with warnings.catch_warnings(record=True) as caught:
                    warnings.simplefilter("always")
                    self.result = self._run(self._counting, self.stop_event)
                self.warnings = list(caught)
            else:
                self.result = self._run(self._counting, self.stop_event)
        except Exception as exc:  # noqa: BLE001 - kept and re-raised by wait()
            self.error = exc
            if not isinstance(exc, PolkitError):
                log.exception("sampling failed")
        finally:
            self.done.set()
            if self.on_done is not None:
                try:
                    self.on_done(self)
                except Exception:  # noqa: BLE001
                    log.exception("updating the panel after sampling failed")

    def start(self, *, background: bool = True) -> SamplingJob:
        """Run the job; in a daemon thread when ``background`` (warnings are then recorded
        in :attr:`warnings` and shown by the panel), else in the calling thread (warnings
        reach the caller, errors are raised)."""
        if background:
            self.thread = threading.Thread(target=self._work, args=(True,), daemon=True,
                                           name="polkit-sampler")
            self.thread.start()
            return self
        self._work(False)
        if self.error is not None:
            raise self.error
        return self

    def stop(self) -> None:
        """Ask the sampler to end after the current step (the result is marked not converged)."""
        self.stop_event.set()

    def wait(self, timeout: float | None = None) -> Any:
        """Wait for the job; return its result or raise its error.

        Raises
        ------
        TimeoutError
            If the job is still running after ``timeout`` seconds.
        """
        if not self.done.wait(timeout):
            raise TimeoutError(f"sampling still running after {timeout} s; call stop() first")
        if self.thread is not None:
            self.thread.join()
        if self.error is not None:
            raise self.error
        return self.result

    @property
    def running(self) -> bool:
        """Whether the job has started and not finished."""
        return self.thread is not None and not self.done.is_set()


def corner_png(result, names: list[str], *, dpi: int = 70) -> bytes:
    """A corner plot (corner) of ``names`` from a result's draws, as PNG bytes (no pyplot)."""
    import corner
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    from polkit.plotting.base import corner_data
    from polkit.widgets._canvas import figure_png

    data, labels = corner_data(result, names)
    k = len(names)
    fig = Figure(figsize=(1.6 * k + 1.0, 1.6 * k + 1.0), dpi=dpi)
    FigureCanvasAgg(fig)
    fig.subplots(k, k)
    corner.corner(data, fig=fig, labels=labels, quantiles=[0.16, 0.5, 0.84], show_titles=False,
                  label_kwargs={"fontsize": 8})
    return figure_png(fig)

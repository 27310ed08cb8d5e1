"""The whole-map mode under the robust noise model, protected against cosmic-ray spikes.

:func:`settle_mode` alternates the robust noise calibration (with its outlier mask,
:func:`~polkit.jobs.dispersion.stages.calibrate_problem_noise`) and the mode.
:func:`protected_mode` does that from the whole-map start and, when the model check then
fails, tries once more from a start found with the spikes the data alone reveal left out
(:func:`~polkit.jobs.dispersion.noise.premask_spikes`): a mode search that sees the
spikes can chase them (a line narrowed to one pixel).  Of the two modes it keeps the one
whose residuals are smaller against the independent noise floor, on every pixel but those
both leave out.
The spike finder can flag the peaks of narrow, fast-dispersing lines on a clean map, so it
is not used when the first mode already passes the check.
# common practice, no published source
"""

from __future__ import annotations

import logging
from typing import Any

import numpy as np

from polkit.jobs.dispersion.check import noise_floor, problem_model_check
from polkit.jobs.dispersion.noise import detector_terms, noise_inverse_variance, premask_spikes

__all__ = ["settle_mode", "protected_mode"]

log = logging.getLogger(__name__)


def settle_mode(problem, start, data: Any, rounds: int = 2):
    """Calibrate the noise model (robust, outliers masked) at ``start`` and refine the mode,
    ``rounds`` times.  Returns ``(mode, noise_note)``."""
    from polkit.jobs.dispersion.stages import calibrate_problem_noise, refine_mode

    note = problem.noise_note
    for _ in range(rounds):
        note = calibrate_problem_noise(problem, start.x, data)
        start = refine_mode(problem, start.x)
    return start, note


def _floor_z2(problem, x: np.ndarray, data: Any, keep: np.ndarray) -> float:
    model = np.asarray(problem.model_map(x).model).reshape(problem.y.shape)
    var, _ = noise_floor(problem.y, model, keep, detector_terms(data, problem.kind))
    z2 = (problem.y - model) ** 2 / np.maximum(var, 1e-300)
    return float(np.sum(z2[keep]))


def protected_mode(problem, start, data: Any, x0: np.ndarray, table_x: np.ndarray):
    """The settled mode from ``start``; from a spike-free start too when the check fails.

    ``x0`` and ``table_x`` are the automatic guess and the peak-table mode (the starts of
    :func:`~polkit.jobs.dispersion.stages.whole_map_start`).  Returns
    ``(mode, noise_note)``; ``problem`` is left with the noise model of the mode returned.
    """
    from polkit.jobs.dispersion.stages import whole_map_start

    mode_a, note_a = settle_mode(problem, start, data)
    if problem_model_check(problem, mode_a.x, data)["passed"]:
        return mode_a, note_a
    state_a = (problem.inv_var.copy(), note_a, problem.noise_calibration)
    # back to the first noise model of the map (the mask of a mode astray would stay)
    problem.set_noise(*noise_inverse_variance(data))
    if not premask_spikes(problem, data):
        problem.set_noise(state_a[0], state_a[1])
        return mode_a, note_a
    start_b = whole_map_start(problem, x0, table_x)
    mode_b, note_b = settle_mode(problem, start_b, data)
    # compare on every pixel but those both modes leave out (the spikes): a mode that went
    # astray leaves out the pixels it misfits, which must count against it
    finite = np.isfinite(problem.y)
    keep = finite & ~((problem.inv_var <= 0) & (state_a[0] <= 0))
    z_a, z_b = _floor_z2(problem, mode_a.x, data, keep), _floor_z2(problem, mode_b.x, data, keep)
    log.info("spike-protected start: residuals against the floor %.4g (first) vs %.4g", z_a, z_b)
    if z_b < z_a:
        return mode_b, note_b
    problem.set_noise(state_a[0], state_a[1])
    problem.noise_calibration = state_a[2]
    return mode_a, note_a

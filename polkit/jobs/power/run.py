"""The power-series job: a pump-power series in, thresholds and interaction constants out.

Each step is a public stage (a decision a practitioner would otherwise make by hand) in
:mod:`polkit.jobs.power.stages`, :mod:`polkit.jobs.steps` or here, so the interactive
panel (:mod:`polkit.widgets.power_panel`) takes the same steps one at a time;
:func:`fit_power` takes them in order:

1. :func:`~polkit.jobs.power.stages.prepare_power`: load the series
   (:func:`polkit.data.load_series`) or take an in-memory Dataset; a spectra cube is
   reduced to intensity, peak energy and linewidth per power by
   :func:`polkit.linefit.extract_observables` (the extraction figure is written so a
   person can check it); job-level checks (:func:`~polkit.jobs.power.stages.check_series`):
   sweep labels for coherent drive, powers monotonic within each sweep, no empty sweep;
   calibration (:func:`polkit.config.calibration.read_calibration`) and dispersion result
   (:meth:`polkit.inference.FitResult.load`) read and checked before any sampling; default
   priors from the data ranges (:mod:`polkit.jobs.power.problem`), user priors on top;
2. :func:`~polkit.jobs.power.stages.power_start` and
   :func:`~polkit.jobs.power.stages.refine_mode`: an automatic starting point, the MAP;
3. :func:`~polkit.jobs.steps.sample_problem`: emcee until the convergence gate passes,
   checkpointed in HDF5;
4. :func:`build_power_result`: derived quantities per posterior draw; calibration inputs
   propagated per draw (:mod:`polkit.jobs.power.calibrated`); the model check against a
   noise floor that owes nothing to the fit (:func:`polkit.jobs.power.check.model_check`,
   the ``model_check`` entry of summary.json); the result with notes; then files and
   figures.
"""

from __future__ import annotations

import json
import logging
import os
import warnings
from collections.abc import Mapping
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from polkit.errors import ConfigError, DataWarning
from polkit.inference import FitResult, SamplerOutput, SamplerSettings
from polkit.jobs.power.calibrated import calibrated_quantities, ciuti_estimate
from polkit.jobs.power.check import check_line, model_check, observed_jumps
from polkit.jobs.power.options import ExtractionWindow, PowerCalibration
from polkit.jobs.power.problem import PowerProblem
from polkit.jobs.power.stages import (
    EXTRACTION_FIGURE,
    PowerSetup,
    power_start,
    prepare_power,
    refine_mode,
)
from polkit.jobs.steps import (
    checkpoint_file,
    job_identity,
    job_sampler,
    locks_output,
    posterior_theta,
    quick_answer,
    sample_problem,
)
from polkit.models.calibration import DensityCalibration

__all__ = ["fit_power", "PowerFit", "PowerCalibration", "ExtractionWindow", "DEFAULT_STEPS",
           "build_power_result"]

log = logging.getLogger(__name__)

DEFAULT_STEPS = {"max_steps": 8000, "min_steps": 400, "check_every": 100}
#: spawn key of the stream that draws calibration inputs and pairs dispersion draws
_DERIVED_STREAM = 0x5EED


class PowerFit(FitResult):
    """A power-series result: a :class:`~polkit.inference.FitResult` that can redraw its figures."""

    def figures(self, folder: str | os.PathLike) -> list[Path]:
        """Write fit.png, residuals.png, corner.png and traces.png into ``folder``."""
        from polkit.plotting import power as plots_power

        return plots_power.power_figures(self, folder)

    @property
    def spot(self) -> str:
        """Pump-spot profile of the fitted model (``"point"`` for results made before it)."""
        return str(self.tree.attrs.get("spot", "point"))

    @property
    def notes(self) -> list[str]:
        """Sentences on what the result can and cannot say (calibration, priors, data)."""
        return list(self.provenance.get("notes", []))

    def problem(self) -> PowerProblem:
        """Rebuild the fitted problem (data in fit space and parameter space) from the result."""
        obs = self.tree["observed_data"].to_dataset()
        with warnings.catch_warnings():  # said once when the fit ran
            warnings.simplefilter("ignore", DataWarning)
            problem = PowerProblem.from_series(obs, self.model, path=obs.attrs.get("source"),
                                               spot=self.spot)
        problem.space = self.space
        return problem



# --------------------------------------------------------------------------------------
# sampling and the result
# --------------------------------------------------------------------------------------
def build_power_result(
    problem: PowerProblem,
    output: SamplerOutput,
    setup: PowerSetup,
    *,
    provenance: Mapping[str, Any] | None = None,
) -> PowerFit:
    """The :class:`PowerFit` of a sampler run: derived quantities per draw, notes.

    The calibration inputs and the dispersion draws are paired with the posterior draws
    by a generator spawned from the run's seed, so the same seed gives the same result.

    Parameters
    ----------
    problem
        The sampled problem.
    output
        The sampler run.
    setup
        What :func:`prepare_power` read besides the problem.
    provenance
        Further provenance entries (after the run's own, before the calibration's).

    Returns
    -------
    PowerFit
    """
    space = problem.space
    opts = setup.options
    cal = setup.calibration
    theta = posterior_theta(output, space)
    flat = theta.reshape(-1, theta.shape[-1])
    stream = np.random.SeedSequence(output.seed_entropy,
                                    spawn_key=(*output.seed_spawn_key, _DERIVED_STREAM))
    rng = np.random.default_rng(stream)
    lw_prior = setup.linewidth_prior
    linewidth = lw_prior.sample(rng, flat.shape[0]) if lw_prior is not None else None
    derived = problem.derived(flat, linewidth=linewidth)
    extra, cal_notes = calibrated_quantities(
        problem, flat, derived, calibration=cal, rng=rng,
        exciton_fraction=setup.dispersion_draws.get("exciton_fraction_k0"),
        n_wells=opts.get("n_wells"), exciton_binding_meV=opts.get("exciton_binding_meV"),
        bohr_radius_nm=opts.get("bohr_radius_nm"),
        reservoir_lifetime=opts.get("reservoir_lifetime"))
    derived.update(extra)
    notes = [*setup.notes, *cal_notes]
    check = model_check(problem, flat)
    if not check["passed"]:
        notes.append("model check failed: " + check["advice"])
    if cal is not None:
        notes.append("calibration inputs propagated per draw: each posterior draw paired with "
                     "an independent draw of the calibration's log-normal inputs (the "
                     "likelihood does not depend on them)")

    prov = _provenance(problem, output, setup, notes, provenance)
    attrs = {"notes": json.dumps(notes), "calibrated": int(cal is not None),
             "intensity_units": problem.intensity_units, "model_check": check}
    if problem.model == "coherent":
        attrs["spot"] = problem.spot
    return PowerFit.from_samples(output, space, derived=derived, model=setup.model,
                                 kind="power", observed=setup.table, provenance=prov,
                                 extra_attrs=attrs)


def _provenance(problem: PowerProblem, output: SamplerOutput, setup: PowerSetup,
                notes: list[str], provenance: Mapping[str, Any] | None) -> dict[str, Any]:
    """The provenance of a power result: input, notes, priors, sweeps, calibration, options."""
    opts = setup.options
    lw_prior = setup.linewidth_prior
    prov: dict[str, Any] = {"input_sha256": setup.sha256, "input": setup.source_name,
                            "notes": notes,
                            "linewidth_prior": None if lw_prior is None else
                            {**lw_prior.to_dict(), "units": "meV",
                             "source": setup.linewidth_note},
                            "segments": [list(s) for s in problem.segments],
                            "derived_stream_spawn_key": [*output.seed_spawn_key,
                                                         _DERIVED_STREAM],
                            **(provenance or {})}
    if problem.model == "coherent":
        prov["spot"] = problem.spot
        prov["observed_jumps"] = observed_jumps(problem)
    prov.update(setup.calibration_info)
    prov.update(setup.dispersion_info)
    for key, option in (("n_wells", "n_wells"), ("exciton_binding_meV", "exciton_binding_meV"),
                        ("bohr_radius_nm", "bohr_radius_nm"),
                        ("reservoir_lifetime_ps", "reservoir_lifetime")):
        if opts.get(option) is not None:
            prov[key] = opts[option]
    e_b, a_b = opts.get("exciton_binding_meV"), opts.get("bohr_radius_nm")
    if e_b is not None and a_b is not None:
        prov["exciton_interaction_estimate_ueV_um2"] = ciuti_estimate(float(e_b), float(a_b))
    return prov


# --------------------------------------------------------------------------------------
# the job
# --------------------------------------------------------------------------------------
@locks_output
def fit_power(
    source: str | os.PathLike | xr.Dataset,
    *,
    model: str = "coherent",
    calibration: PowerCalibration | str | os.PathLike | DensityCalibration | dict | None = None,
    dispersion: str | os.PathLike | FitResult | None = None,
    priors: str | os.PathLike | dict | None = None,
    window: ExtractionWindow | dict | None = None,
    seed: int | np.random.SeedSequence | None = None,
    resume: bool = False,
    out: str | os.PathLike | None = None,
    sampler: SamplerSettings | dict | None = None,
    figures: bool = True,
    quick: bool = False,
) -> PowerFit | dict:
    """Fit a mean-field nonlinear model to a pump-power series.

    Parameters
    ----------
    source
        A series table (CSV with bracketed units, netCDF, ``.npz``) or a spectra cube
        (power x energy [x angle]), as a path or an in-memory Dataset.
    model
        ``"coherent"`` (resonant drive, up and down sweeps fitted jointly) or
        ``"reservoir"`` (nonresonant drive through an exciton reservoir).
    calibration
        A :class:`~polkit.jobs.power.options.PowerCalibration` (density calibration, sample
        constants, pump-spot profile), or the density calibration alone (TOML file, dict or
        :class:`~polkit.models.calibration.DensityCalibration`).  Without one only the
        identifiable products are reported, and the result says so.
    dispersion
        Output folder of a dispersion fit (or its result): its ``exciton_fraction_k0``
        draws give ``exciton_interaction_constant``; its ``lp_linewidth_k0`` sets the
        polariton-linewidth prior of the coherent model.
    priors
        TOML file or dict of priors overriding the defaults (keys: parameter names).
    window
        For a spectra cube: the :class:`~polkit.jobs.power.options.ExtractionWindow` (or a
        dict ``{"energy": ..., "angle": ...}``).
    seed
        Root seed (recorded; the same seed gives the same result).
    resume
        Continue from ``out/chains.h5``.
    out
        Output folder (``posterior.nc``, ``summary.json``, figures, ``chains.h5``); nothing
        is written when ``None``.
    sampler
        :class:`~polkit.inference.SamplerSettings` (or a dict of its fields): ``max_steps``,
        ``min_steps`` (defaults 8000, 400), ``n_walkers`` (default max(32, 4 P)),
        ``progress``, ``strict``, ``stop_event`` (ends sampling early, not converged).
    figures
        Write the result figures to ``out``.  For a cube the extraction figure
        (``extraction.png``) is written whenever ``out`` is given.
    quick
        Stop after the quick answer at the mode (Laplace summary, labelled approximate):
        it is returned as a dict and written to ``out/quick_summary.json``; no chains.

    Returns
    -------
    PowerFit
        Posterior, derived quantities, diagnostics, provenance, notes and the model check
        (``result.model_check``; a failed check is logged and noted in ``result.notes``).

    Raises
    ------
    DataError
        Bad input data (missing sweep labels, non-monotonic or empty sweeps, powers without
        units, ...), naming the file and the field.
    ConfigError
        Bad options, priors or calibration file (e.g. a quantity without units).
    """
    problem, setup = prepare_power(source, model=model, calibration=calibration,
                                   dispersion=dispersion, priors=priors, window=window)
    checkpoint = None if quick else checkpoint_file(out, resume, refusal=ConfigError(
        "resume needs the output folder that holds the checkpoint; pass out=", key="resume"))
    sampler = job_sampler(DEFAULT_STEPS, sampler)

    x0, _guess = power_start(problem)
    start = refine_mode(problem, x0)
    log.info("power-series mode: %s",
             dict(zip(problem.space.names, np.round(start.x, 6), strict=True)))
    if quick:  # the Laplace summary at the mode only: no chains
        return quick_answer(problem, start, out=out)
    output = sample_problem(problem, start, sampler=sampler, seed=seed,
                            checkpoint=checkpoint, resume=resume,
                            identity=_identity(problem, setup))
    result = build_power_result(problem, output, setup)
    for note in result.notes:
        log.info("%s", note)
    check = result.model_check
    if not check["passed"]:  # the command line turns this into a warning line and status 4
        log.warning("%s: %s", setup.source_name, check_line(check))
    if out is not None:
        _write(result, setup, Path(out), figures)
    return result


def _identity(problem: PowerProblem, setup: PowerSetup) -> dict[str, object]:
    """The job's part of the fit identity, stored in the checkpoint and checked on resume."""
    return job_identity(setup.sha256, setup.model, "series", setup.linewidth_note, dict(
        energy_window=setup.window.energy, angle_window=setup.window.angle,
        calibration=setup.calibration_info, dispersion=setup.dispersion_info,
        options=setup.options, spot=problem.spot))


def _write(result: PowerFit, setup: PowerSetup, out_dir: Path, figures: bool) -> None:
    """Save the result, the extraction figure of a cube and (with ``figures``) the figures."""
    result.save(out_dir)
    if setup.extraction is not None:  # the check of the input: written whenever out is given
        _extraction_figure(setup.cube, setup.extraction, out_dir / EXTRACTION_FIGURE)
    if figures:
        result.figures(out_dir)


def _extraction_figure(cube: xr.Dataset, obs: xr.Dataset, target: Path) -> Path:
    from polkit import files
    from polkit.plotting.base import pyplot
    from polkit.plotting.linefit import plot_extraction

    plt = pyplot()
    fig = plot_extraction(cube, obs)
    try:
        return files.save_figure(target, fig)
    finally:
        plt.close(fig)

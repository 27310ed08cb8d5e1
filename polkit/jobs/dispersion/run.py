"""The dispersion job: an angle-resolved map in, the linear parameters of the sample out.

Each step is a public stage (a decision a practitioner would otherwise make by hand), here
or in :mod:`polkit.jobs.dispersion.stages`, so the interactive panel
(:mod:`polkit.widgets.dispersion_panel`) takes the same steps one at a time;
:func:`fit_dispersion` takes them in order:

1. :func:`open_map`: load and validate the map (:func:`polkit.data.load_map`), check the
   model and the kind of spectrum;
2. :func:`prepare_dispersion`: crop to the requested window; per-angle peak table
   (:func:`polkit.linefit.peak_table`; with only one branch visible, a warning that g and
   the detuning are degenerate); automatic starting point from the peak table
   (multi-start least squares), default priors from the data range, user priors on top;
3. :func:`table_mode`: the peak-table fit (MAP; with ``peaks_only`` also the MCMC, a fast
   answer);
4. :func:`whole_map_start`, :func:`~polkit.jobs.dispersion.search.search_modes` and
   :func:`calibrate_problem_noise`: the whole-map MAP from the better of the peak-table
   mode and the raw guess, a global search of the prior box for better modes, the noise
   model calibrated on the residuals of the best (variance = a * model + b), then the MAP
   again;
5. :func:`sample_problem`: a short pre-burn, then emcee until the convergence gate passes,
   checkpointed in HDF5; the run fails the gate when a mode found by the search beats the
   best sampled point by more than 2 nats
   (:func:`~polkit.jobs.dispersion.search.check_mode_margin`);
6. :func:`build_dispersion_result`: derived quantities per posterior draw and the result
   object; then files and figures.
"""

from __future__ import annotations

import dataclasses
import logging
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import xarray as xr

from polkit.errors import DataError
from polkit.inference import FitResult, SamplerOutput, SamplerSettings
from polkit.jobs.dispersion.caveats import PEAK_TABLE_COVERAGE, add_caveats
from polkit.jobs.dispersion.noise import calibrate_noise
from polkit.jobs.dispersion.problem import DispersionProblem
from polkit.jobs.dispersion.robust import protected_mode
from polkit.jobs.dispersion.search import check_mode_margin, search_modes, weigh_strong_coupling
from polkit.jobs.dispersion.stages import (
    DispersionStart,
    MapInput,
    loader_changes,
    map_problem,
    open_map,
    peak_start,
    start_vector,
    table_mode,
    whole_map_start,
)
from polkit.jobs.steps import (
    CHECKPOINT,
    checkpoint_file,
    job_identity,
    job_sampler,
    locks_output,
    posterior_theta,
    quick_answer,
    sample_problem,
    warn_large_map,
)

if TYPE_CHECKING:
    from polkit.data import LoadOptions

__all__ = [
    "fit_dispersion",
    "calibrate_noise",
    "DispersionFit",
    "DEFAULT_STEPS",
    "CHECKPOINT",
    "prepare_dispersion",
    "job_load",
    "sample_problem",
    "build_dispersion_result",
]

log = logging.getLogger(__name__)

DEFAULT_STEPS = {"max_steps": 10000, "min_steps": 400, "check_every": 100}
#: the model name a result records, per model option
MODEL_NAMES = {"weak": "weak_coupling", "two": "two_oscillator", "three": "three_oscillator"}
#: the noise model of the peak-table path
PEAK_TABLE_NOISE = "peak-table errors from the per-angle line fits, times noise_scale"


class DispersionFit(FitResult):
    """A dispersion result: a :class:`~polkit.inference.FitResult` that can redraw its figures."""

    def figures(self, folder: str | os.PathLike, *, corner_process=None) -> list[Path]:
        """Write fit.png, residuals.png, corner.png, traces.png and spectra.png into ``folder``.

        ``corner_process``: a :class:`polkit.plotting.corner_process.CornerProcess` that draws the
        corner plot alongside (the ``polkit`` command passes one).
        """
        from polkit.plotting import dispersion as plots

        return plots.dispersion_figures(self, folder, corner_process=corner_process)


# --------------------------------------------------------------------------------------
# the problem and where it starts
# --------------------------------------------------------------------------------------
def job_load(load: LoadOptions | Mapping[str, Any] | None = None) -> LoadOptions:
    """``load`` as :class:`polkit.data.LoadOptions`, with the default camera steps when unset.

    A job prepares a map with :class:`polkit.data.CameraOptions` (offset, saturation and
    spike masks on) unless ``load.camera`` says otherwise.
    """
    from polkit.data import CameraOptions, LoadOptions

    load = LoadOptions.of(load)
    return load if load.camera is not None else dataclasses.replace(load, camera=CameraOptions())


def prepare_dispersion(
    source: str | os.PathLike | xr.DataArray,
    *,
    model: str = "two",
    priors: str | os.PathLike | dict | None = None,
    load: LoadOptions | Mapping[str, Any] | None = None,
    profile: str = "lorentzian",
) -> tuple[DispersionProblem, DispersionStart]:
    """Load, crop and describe a map: the problem to fit and where to start.

    Parameters are those of :func:`fit_dispersion` (``load.camera=None`` means the default
    :class:`polkit.data.CameraOptions`: offset, saturation and spike masks on).

    Returns
    -------
    tuple
        ``(problem, start)``: the :class:`DispersionProblem` (with the peak table) and
        the :class:`DispersionStart`.
    """
    load = job_load(load)
    src = open_map(source, model=model, load=load).cropped(load.angle_window,
                                                           load.energy_window)
    warn_large_map(src.data)
    table, guess, space = peak_start(src.data, n_excitons=src.n_excitons, kind=src.kind,
                                     priors=priors, profile=profile, coupling=src.coupling,
                                     min_snr=load.camera.min_snr)
    x0 = start_vector(space, guess)
    problem = map_problem(src, space, table=table)
    return problem, DispersionStart(src, table, guess, x0)


# --------------------------------------------------------------------------------------
# sampling and the result
# --------------------------------------------------------------------------------------
def build_dispersion_result(
    problem: DispersionProblem,
    output: SamplerOutput,
    source: MapInput,
    *,
    path: str = "whole_map",
    noise_note: str | None = None,
    profile: str = "lorentzian",
    table: xr.Dataset | None = None,
    provenance: Mapping[str, Any] | None = None,
) -> DispersionFit:
    """The :class:`DispersionFit` of a sampler run: derived quantities per draw, the data.

    Parameters
    ----------
    problem
        The sampled problem (its noise model is stored with the map).
    output
        The sampler run.
    source
        The map as fitted.
    path
        ``"whole_map"`` or ``"peak_table"``.
    noise_note
        How the noise was set (default: the problem's own note).
    profile
        Peak shape of the peak table.
    table
        The peak table, stored with the observed data when given.
    provenance
        Further provenance entries (after the standard ones).

    Returns
    -------
    DispersionFit
    """
    space = problem.space
    axis = source.axis
    derived = problem.derived(posterior_theta(output, space))
    strong = derived.pop("strong_coupling")
    derived["strong_coupling_probability"] = (
        np.asarray(strong[0].mean()),
        "1",
        "posterior probability that 2g > (gamma_C + gamma_X)/2",
    )
    observed = _observed(problem, source, table)
    extra: dict[str, Any] = {"fit_path": path, "in_plane_axis": axis,
                             "n_excitons": source.n_excitons, "background": problem.background}
    if path == "whole_map":
        extra["model_check"] = _model_check(problem, output, source.data)
    prov: dict[str, Any] = {
        "background": f"{problem.background} in energy, per {axis}",
        "input_sha256": source.sha256,
        "input": source.source_name,
        "path": path,
        "noise_model": problem.noise_note if noise_note is None else noise_note,
        "peak_profile": profile,
        **(provenance or {}),
    }
    return DispersionFit.from_samples(
        output,
        space,
        derived=derived,
        model=MODEL_NAMES[source.model],
        kind=source.kind,
        observed=observed,
        provenance=prov,
        extra_attrs=extra,
    )


def _observed(problem: DispersionProblem, source: MapInput,
              table: xr.Dataset | None) -> xr.Dataset:
    """The observed data a result keeps: the map, its inverse variance, the peak table."""
    da = source.data
    observed = xr.Dataset({"map": da.assign_attrs(dict(da.attrs))})
    observed["inverse_variance"] = (
        (source.axis, "energy"),
        problem.inv_var,
        {"units": f"1/({da.attrs.get('units', '1')})^2"},
    )
    for name in ("energy", "energy_error", "fwhm", "fwhm_error", "found"):
        if table is not None and name in table:
            observed[f"peak_{name}"] = (
                table[name].rename({"peak": "peak_index"})
                if "peak" in table[name].dims
                else table[name]
            )
    for key in ("source", "sample", "position"):
        if key in da.attrs:
            observed.attrs[key] = str(da.attrs[key])
    return observed


def _model_check(problem: DispersionProblem, output: SamplerOutput,
                 da: xr.DataArray) -> dict[str, Any]:
    """The model check at the posterior median, with the pixels the noise model left out."""
    from polkit.jobs.dispersion.check import problem_model_check

    space = problem.space
    cal = getattr(problem, "noise_calibration", None) or {}
    median = np.median(posterior_theta(output, space).reshape(-1, len(space)), axis=0)
    check = problem_model_check(problem, median, da)
    check["masked_pixels"] = {"outliers": int(cal.get("outliers", 0)),
                              "saturated": int(cal.get("saturated", 0)),
                              "cut": float(cal.get("cut", float("nan"))),
                              "cut_units": "standardised residual (sigma)"}
    return check


def camera_provenance(begin: DispersionStart) -> dict[str, Any]:
    """What the camera steps masked (from the map's ``preprocessing`` JSON) and min_snr."""
    from polkit.data.camera import preprocessing_record

    return {"preprocessing": preprocessing_record(begin.source.data),
            "peak_min_snr": float(begin.table.attrs.get("min_snr", float("nan")))}


# --------------------------------------------------------------------------------------
# the job
# --------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _Route:
    """Which likelihood a fit samples, from where, and the mode search behind the start."""

    path: str
    log_likelihood: Any
    start: Any
    noise_note: str
    search: Any = None


def _route(problem: DispersionProblem, begin: DispersionStart, peaks_only: bool) -> _Route:
    """The peak-table mode, then (whole map) the mode search and the robust noise model."""
    table_map = table_mode(problem, begin.x0)
    if peaks_only:
        return _Route("peak_table", problem.table_log_likelihood, table_map, PEAK_TABLE_NOISE)
    search = search_modes(problem, [("usual start",
                                     whole_map_start(problem, begin.x0, table_map.x))])
    # robust noise model and outlier mask at the best mode, the mode again (and a
    # spike-free start when the model check then fails)
    start, noise_note = protected_mode(problem, search.best, begin.source.data, begin.x0,
                                       table_map.x)
    search = search.rescored(problem, start)
    return _Route("whole_map", problem.log_likelihood, start, noise_note, search)


def _fit_identity(model: str, begin: DispersionStart, route: _Route, load: LoadOptions,
                  profile: str) -> dict[str, Any]:
    """The fit identity of a dispersion run (what a resumed run must share)."""
    return job_identity(begin.source.sha256, f"{model} {begin.source.kind}", route.path,
                        route.noise_note,
                        dict(angle_window=load.angle_window, energy_window=load.energy_window,
                             profile=profile, wavelength_medium=load.wavelength_medium,
                             load_options=loader_changes(load) or None,
                             camera=camera_provenance(begin)))


def _sampled_result(problem: DispersionProblem, begin: DispersionStart, route: _Route,
                    output: SamplerOutput, profile: str) -> DispersionFit:
    """The result of a run: the mode-margin gate (or the peak-table caveat), the weights."""
    if route.search is not None:
        output = check_mode_margin(output, route.search, problem)
    else:
        output = add_caveats(output, [PEAK_TABLE_COVERAGE])
    result = build_dispersion_result(problem, output, begin.source, path=route.path,
                                     noise_note=route.noise_note, profile=profile,
                                     table=begin.table, provenance=camera_provenance(begin))
    if route.search is not None:
        result = weigh_strong_coupling(result, route.search, problem)
    return result


@locks_output
def fit_dispersion(
    source: str | os.PathLike | xr.DataArray,
    *,
    model: str = "two",
    peaks_only: bool = False,
    priors: str | os.PathLike | dict | None = None,
    seed: int | np.random.SeedSequence | None = None,
    out: str | os.PathLike | None = None,
    resume: bool = False,
    sampler: SamplerSettings | Mapping[str, Any] | None = None,
    load: LoadOptions | Mapping[str, Any] | None = None,
    profile: str = "lorentzian",
    figures: bool = True,
    quick: bool = False,
) -> DispersionFit | dict:
    """Fit a coupled-oscillator model to an angle-resolved map.

    Parameters
    ----------
    source
        A map file (any format :func:`polkit.load_map` reads) or a canonical map.
    model
        ``"two"`` (photon + one exciton), ``"three"`` (photon + two excitons) or ``"weak"``
        (the uncoupled cavity mode and exciton line, ``g = 0``: the alternative of a model
        comparison, :func:`polkit.jobs.dispersion.compare.compare_models`).
    peaks_only
        Fit the per-angle peak table only (fast; seeds the whole-map fit otherwise).
    priors
        TOML file or dict of priors overriding the defaults (keys: parameter names).
    seed
        Root seed (recorded; the same seed gives the same summary).
    out
        Output folder (``posterior.nc``, ``summary.json``, figures, ``chains.h5``); nothing
        is written when ``None`` (then ``resume`` is unavailable).
    resume
        Continue from ``out/chains.h5``.
    sampler
        A :class:`polkit.inference.SamplerSettings` (or a dict of its fields): step limits
        (defaults 10000 and 400 steps; 32 walkers, more for the three-oscillator model),
        ``strict`` (four ensembles gated on nested R-hat <= 1.01), ``progress`` (a
        tqdm.auto bar, default on) and ``stop_event`` (a :class:`threading.Event` that
        ends sampling early; the result is then marked not converged).
    load
        A :class:`polkit.data.LoadOptions` (or a dict of its fields): ``kind``
        (``"emission"`` or ``"reflectance"``; default from the map's attributes),
        ``wavelength_medium`` and the loader's options (see :func:`polkit.load_map`),
        ``angle_window`` and ``energy_window`` (crop before fitting: degree or 1/um; eV),
        and ``camera``: a :class:`polkit.data.CameraOptions` (default: its defaults):
        camera offset subtracted before unit conversion, saturated pixels and cosmic-ray
        spikes masked, excluded windows, the peak table's detection threshold.  What was
        masked is counted in the observed map's ``preprocessing`` attribute and in the
        provenance.
    profile
        Peak shape of the peak table, ``"lorentzian"`` or ``"voigt"``.
    figures
        Write figures to ``out``.
    quick
        Stop after the quick answer at the mode (Laplace summary, labelled approximate):
        it is returned as a dict and written to ``out/quick_summary.json``; no chains.

    Returns
    -------
    DispersionFit
        Posterior, derived quantities, diagnostics and provenance.
    """
    load = job_load(load)
    problem, begin = prepare_dispersion(source, model=model, priors=priors, load=load,
                                        profile=profile)
    checkpoint = None if quick else checkpoint_file(out, resume, refusal=DataError(
        "resume needs the output folder that holds the checkpoint; pass out=.", field="resume"))
    sampler = job_sampler(DEFAULT_STEPS, sampler)
    route = _route(problem, begin, peaks_only)
    if quick:  # the Laplace summary at the mode only: no chains
        return quick_answer(problem, route.start, log_likelihood=route.log_likelihood, out=out)
    output = sample_problem(problem, route.start, sampler=sampler,
                            log_likelihood=route.log_likelihood, seed=seed, pre_burn=True,
                            checkpoint=checkpoint, resume=resume,
                            identity=_fit_identity(model, begin, route, load, profile))
    result = _sampled_result(problem, begin, route, output, profile)
    if out is not None:
        result.save(Path(out))
        if figures:
            result.figures(Path(out))
    return result

"""The power-series job: a pump-power series in, thresholds and interaction constants out.

Steps (each a decision a practitioner would otherwise make by hand):

1. load the series (:func:`polkit.data.load_series`) or take an in-memory Dataset; a
   spectra cube is reduced to intensity, peak energy and linewidth per power by
   :func:`polkit.extract.extract_observables` (the extraction figure is written so a
   person can check it);
2. job-level checks (:func:`check_series`): sweep labels for coherent drive, powers
   monotonic within each sweep, no empty sweep;
3. calibration (:func:`polkit.models.calibration.load_calibration`) and dispersion result
   (:meth:`polkit.inference.FitResult.load`) read and checked before any sampling;
4. default priors from the data ranges (:mod:`polkit.workflows.power_model`), user priors on
   top, an automatic starting point, the MAP, then emcee until the convergence gate passes,
   checkpointed in HDF5;
5. derived quantities per posterior draw; calibration inputs propagated per draw; the result
   with notes, files and figures.
"""

from __future__ import annotations

import hashlib
import json
import logging
import os
import threading
import tomllib
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..errors import ConfigError, DataError, DataWarning
from ..inference import FitResult, LogPosterior, Prior, apply_priors, find_map, run_ensemble
from ..models.calibration import DensityCalibration, load_calibration
from .dispersion import file_sha256
from .power_model import (
    MIN_POINTS,
    MODELS,
    PowerProblem,
    calibrated_quantities,
    ciuti_estimate,
    linewidth_prior,
    sweep_segments,
)

__all__ = ["fit_power", "check_series", "PowerFit"]

log = logging.getLogger(__name__)

DEFAULT_STEPS = {"max_steps": 8000, "min_steps": 400, "check_every": 100}
CHECKPOINT = "chains.h5"
EXTRACTION_FIGURE = "extraction.png"
#: spawn key of the stream that draws calibration inputs and pairs dispersion draws
_DERIVED_STREAM = 0x5EED


class PowerFit(FitResult):
    """A power-series result: a :class:`~polkit.inference.FitResult` that can redraw its figures."""

    def figures(self, folder: str | os.PathLike) -> list[Path]:
        """Write fit.png, residuals.png, corner.png and traces.png into ``folder``."""
        from .. import plots_power

        return plots_power.power_figures(self, folder)

    @property
    def notes(self) -> list[str]:
        """Sentences on what the result can and cannot say (calibration, priors, data)."""
        return list(self.provenance.get("notes", []))

    def problem(self) -> PowerProblem:
        """Rebuild the fitted problem (data in fit space and parameter space) from the result."""
        obs = self.tree["observed_data"].to_dataset()
        with warnings.catch_warnings():  # said once when the fit ran
            warnings.simplefilter("ignore", DataWarning)
            problem = PowerProblem.from_series(obs, self.model, path=obs.attrs.get("source"))
        problem.space = self.space
        return problem


# --------------------------------------------------------------------------------------
# job-level checks
# --------------------------------------------------------------------------------------
def check_series(series: xr.Dataset, model: str, *, path=None) -> None:
    """Refuse what the data layer accepts but the power-series job cannot fit.

    * coherent drive without ``sweep`` labels (the branch depends on the sweep history);
    * powers not monotonic within a run of one sweep label (non-decreasing for ``up``,
      non-increasing for ``down``);
    * a sweep with fewer than 3 usable intensities (an empty sweep).

    Raises
    ------
    DataError
        Naming the field, what was expected, what was found and the fix.
    """
    if model == "coherent" and "sweep" not in series.variables:
        raise DataError(
            "the coherent model needs the sweep direction of every point (the branch followed "
            "depends on the sweep history); found no sweep labels. Fix: add a column 'sweep' "
            "with 'up' or 'down' on every row, in acquisition order",
            path=path,
            field="sweep",
        )
    power = np.asarray(series["power"].values, dtype=float).reshape(-1)
    intensity = np.asarray(series["intensity"].values, dtype=float).reshape(-1)
    for start, stop, label in sweep_segments(series):
        p = power[start:stop]
        if label in ("up", "down") and p.size > 1:
            steps = np.diff(p)
            wrong = np.flatnonzero(steps < 0 if label == "up" else steps > 0)
            if wrong.size:
                i = int(wrong[0])
                raise DataError(
                    f"expected {'non-decreasing' if label == 'up' else 'non-increasing'} powers "
                    f"within the {label} sweep of rows {start + 1}-{stop}, found "
                    f"{p[i]:g} mW then {p[i + 1]:g} mW at rows {start + i + 1}-{start + i + 2}. "
                    "Fix: list each sweep in acquisition order and label it correctly",
                    path=path,
                    field="power",
                )
        usable = int(np.count_nonzero(np.isfinite(intensity[start:stop])))
        if label != "none" and usable < MIN_POINTS:
            raise DataError(
                f"expected at least {MIN_POINTS} measured intensities in the {label} sweep of "
                f"rows {start + 1}-{stop}, found {usable}"
                + (": an empty sweep" if usable == 0 else "")
                + ". Fix: remove its rows, or measure (fill in) at least "
                f"{MIN_POINTS} powers in it",
                path=path,
                field="sweep",
            )


# --------------------------------------------------------------------------------------
# inputs
# --------------------------------------------------------------------------------------
def _dataset_sha256(ds: xr.Dataset) -> str:
    h = hashlib.sha256()
    for name in sorted(map(str, ds.variables)):
        values = np.asarray(ds[name].values)
        h.update(name.encode())
        h.update(values.astype(str).tobytes() if values.dtype.kind in "USO"
                 else np.ascontiguousarray(values, dtype=float).tobytes())
    return h.hexdigest()


def _load(source) -> tuple[xr.Dataset, str, str, Path | None]:
    """(series or cube, sha256, source name, path) from a file or an in-memory Dataset."""
    from .. import data

    if isinstance(source, xr.Dataset):
        name = str(source.attrs.get("source", "<in memory>"))
        if "intensity" in source.data_vars and "energy" in source["intensity"].dims:
            return source, _dataset_sha256(source), name, None  # cube: checked by the extraction
        return data.validate_series(source), _dataset_sha256(source), name, None
    if not isinstance(source, (str, os.PathLike)):
        raise DataError(
            f"expected a file path or an xarray.Dataset power series, found "
            f"{type(source).__name__}",
            field="source",
        )
    path = Path(source)
    return data.load_series(path), file_sha256(path), str(path), path


def _is_cube(ds: xr.Dataset) -> bool:
    return "energy" in ds["intensity"].dims


def _table(series: xr.Dataset) -> xr.Dataset:
    """Only the variables the job uses, with netCDF-safe attributes (the observed data)."""
    keep = [v for v in ("intensity", "intensity_error", "peak_energy", "peak_energy_error",
                        "linewidth", "linewidth_error") if v in series.data_vars]
    out = series[keep].copy()
    if "sweep" in series.variables and "sweep" not in out.variables:
        out = out.assign_coords(sweep=series["sweep"])
    for name in out.variables:
        out[name].attrs = {k: v for k, v in out[name].attrs.items()
                           if isinstance(v, (str, int, float))}
    out.attrs = {k: str(v) for k, v in series.attrs.items()
                 if k in ("source", "sample", "position", "history", "noise_model", "profile")}
    return out


def _calibration(calibration) -> tuple[DensityCalibration | None, dict[str, Any]]:
    if calibration is None:
        return None, {}
    if isinstance(calibration, DensityCalibration):
        cal = calibration
        info = {"calibration": cal.to_dict()}
    else:
        cal = load_calibration(calibration)
        info = {"calibration": cal.to_dict()}
        if isinstance(calibration, (str, os.PathLike)):
            info["calibration_file"] = str(calibration)
            info["calibration_sha256"] = file_sha256(calibration)
    return cal, info


def _dispersion(dispersion) -> tuple[dict[str, np.ndarray], dict[str, Any]]:
    if dispersion is None:
        return {}, {}
    res = dispersion if isinstance(dispersion, FitResult) else FitResult.load(dispersion)
    if "exciton_fraction_k0" not in res.posterior:
        raise DataError(
            "expected a dispersion result with the posterior variable 'exciton_fraction_k0'; "
            f"found {sorted(map(str, res.posterior.data_vars))}. Fix: pass the output folder "
            "of a dispersion fit",
            path=None if isinstance(dispersion, FitResult) else dispersion,
            field="exciton_fraction_k0",
        )
    draws = {"exciton_fraction_k0": res.draws("exciton_fraction_k0")}
    if "lp_linewidth_k0" in res.posterior:
        draws["lp_linewidth_k0"] = res.draws("lp_linewidth_k0")
    info = {"dispersion": str(dispersion) if not isinstance(dispersion, FitResult) else
            "<in memory>", "dispersion_input_sha256": res.provenance.get("input_sha256")}
    return draws, info


def _split_priors(priors, model):
    """(sampled-parameter priors, their file, polariton_linewidth prior or None).

    The coherent model does not sample the linewidth (its posterior is its prior), so a
    ``polariton_linewidth`` entry is taken out and used as that prior.
    """
    if priors is None:
        return None, None, None
    path = None
    if isinstance(priors, (str, os.PathLike)):
        path = Path(priors)
        try:
            with open(path, "rb") as fh:
                table = tomllib.load(fh)
        except FileNotFoundError:
            raise ConfigError("prior file not found; check the path", path=path) from None
        except (OSError, tomllib.TOMLDecodeError, UnicodeDecodeError) as exc:
            raise ConfigError(f"cannot read the prior file as TOML ({exc})", path=path) from None
    elif isinstance(priors, dict):
        table = dict(priors)
    else:
        raise ConfigError(f"expected a TOML file or a dict of priors, found "
                          f"{type(priors).__name__}", key="priors")
    lw = None
    if model == "coherent" and "polariton_linewidth" in table:
        lw = Prior.from_dict(table.pop("polariton_linewidth"), units="meV", path=path,
                             key="polariton_linewidth")
        if lw.bounds[0] < 0 or lw.kind == "normal":
            raise ConfigError("a linewidth is positive: use a uniform, loguniform or "
                              "truncnormal prior with low >= 0", path=path,
                              key="polariton_linewidth")
    return table, path, lw


def _check_options(model, n_wells, exciton_binding_meV, bohr_radius_nm, reservoir_lifetime_ps):
    if model not in MODELS:
        raise ConfigError(f"expected model 'coherent' or 'reservoir', found {model!r}",
                          key="model")
    if n_wells is not None and not (isinstance(n_wells, (int, np.integer)) and n_wells >= 1):
        raise ConfigError(f"expected a whole number of quantum wells >= 1, found {n_wells!r}",
                          key="n_wells")
    if exciton_binding_meV is not None and bohr_radius_nm is not None:
        try:
            ciuti_estimate(float(exciton_binding_meV), float(bohr_radius_nm))
        except DataError as exc:
            raise ConfigError(exc.reason, key=exc.field) from None
    if reservoir_lifetime_ps is None:
        return None
    value = reservoir_lifetime_ps
    pair = tuple(value) if isinstance(value, (tuple, list)) else (value, 0.0)
    if len(pair) != 2 or not all(isinstance(v, (int, float)) for v in pair) or not (
            pair[0] > 0 and pair[1] >= 0):
        raise ConfigError(
            f"expected a lifetime in ps > 0, or (value_ps, relative_error), found {value!r}",
            key="reservoir_lifetime_ps")
    return float(pair[0]), float(pair[1])


# --------------------------------------------------------------------------------------
# the job
# --------------------------------------------------------------------------------------
def fit_power(
    source: str | os.PathLike | xr.Dataset,
    *,
    model: str = "coherent",
    calibration: str | os.PathLike | DensityCalibration | dict | None = None,
    dispersion: str | os.PathLike | FitResult | None = None,
    priors: str | os.PathLike | dict | None = None,
    seed: int | np.random.SeedSequence | None = None,
    resume: bool = False,
    strict: bool = False,
    out: str | os.PathLike | None = None,
    max_steps: int | None = None,
    n_walkers: int | None = None,
    progress: bool = True,
    stop_event: threading.Event | None = None,
    figures: bool = True,
    energy_window: tuple[float, float] | None = None,
    angle_window: tuple[float, float] | None = None,
    n_wells: int | None = None,
    exciton_binding_meV: float | None = None,
    bohr_radius_nm: float | None = None,
    reservoir_lifetime_ps: float | tuple[float, float] | None = None,
    min_steps: int | None = None,
) -> PowerFit:
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
        Density calibration: a TOML file, a dict in the same form, or a
        :class:`~polkit.models.calibration.DensityCalibration`.  Without it only the
        identifiable products are reported, and the result says so.
    dispersion
        Output folder of a dispersion fit (or its result): its ``exciton_fraction_k0``
        draws give ``exciton_interaction_constant``; its ``lp_linewidth_k0`` sets the
        polariton-linewidth prior of the coherent model.
    priors
        TOML file or dict of priors overriding the defaults (keys: parameter names).
    seed
        Root seed (recorded; the same seed gives the same result).
    resume
        Continue from ``out/chains.h5``.
    strict
        Four ensembles gated on nested R-hat <= 1.01.
    out
        Output folder (``posterior.nc``, ``summary.json``, figures, ``chains.h5``); nothing
        is written when ``None``.
    max_steps, min_steps, n_walkers
        Sampler limits (defaults 8000, 400 and max(32, 4 P)).
    progress
        Progress bar (tqdm.auto).
    stop_event
        A :class:`threading.Event` that ends sampling early (result marked not converged).
    figures
        Write the result figures to ``out``.  For a cube the extraction figure
        (``extraction.png``) is written whenever ``out`` is given.
    energy_window, angle_window
        For a spectra cube: the extraction window in eV, and the angle (or k) window
        replacing the default k = 0 columns.
    n_wells
        Number of equivalent quantum wells: the exciton interaction constant per well.
    exciton_binding_meV, bohr_radius_nm
        Exciton binding energy and Bohr radius: the exciton interaction constant is
        compared with ``6 E_b a_B^2`` (Ciuti et al., PRB 58, 7926, 1998).
    reservoir_lifetime_ps
        Reservoir lifetime (ps), or ``(value, relative_error)``: with a cw calibration it
        gives the reservoir density at threshold and ``reservoir_interaction_constant``.

    Returns
    -------
    PowerFit
        Posterior, derived quantities, diagnostics, provenance and notes.

    Raises
    ------
    DataError
        Bad input data (missing sweep labels, non-monotonic or empty sweeps, powers without
        units, ...), naming the file and the field.
    ConfigError
        Bad options, priors or calibration file (e.g. a quantity without units).
    """
    lifetime_r = _check_options(model, n_wells, exciton_binding_meV, bohr_radius_nm,
                                reservoir_lifetime_ps)
    raw, sha, source_name, path = _load(source)
    where = path if path is not None else source_name
    cube = _is_cube(raw)
    if not cube and (energy_window is not None or angle_window is not None):
        key = "energy_window" if energy_window is not None else "angle_window"
        raise ConfigError("windows apply to spectra cubes only; this source is a table of "
                          "observables. Fix: drop the window", key=key)
    notes: list[str] = []
    extraction = None
    if cube:
        from ..extract import extract_observables

        extraction = extract_observables(raw, energy_window=energy_window,
                                         angle_window=angle_window, rng=0)
        series = extraction
        if "source" not in series.attrs or not series.attrs["source"]:
            series.attrs["source"] = source_name
        notes.append("observables extracted from the spectra cube (extract_observables, "
                     f"{series.attrs.get('profile', 'lorentzian')} line, noise: "
                     f"{series.attrs.get('noise_model', 'n/a')}); check {EXTRACTION_FIGURE}")
    else:
        series = raw
    check_series(series, model, path=where)
    cal, cal_info = _calibration(calibration)
    disp_draws, disp_info = _dispersion(dispersion)

    table = _table(series)
    problem = PowerProblem.from_series(table, model, path=where)
    if problem.ignored:
        notes.append(f"not used by the {model} model: {', '.join(problem.ignored)}")
    space = problem.default_space()
    user, prior_path, user_lw = _split_priors(priors, model)
    if user:
        space = apply_priors(space, user, path=prior_path)
        problem.space = space
    lw_prior, lw_note = None, None
    if model == "coherent":
        if user_lw is not None:
            lw_prior, lw_note = user_lw, "polariton_linewidth prior as given by the user"
        else:
            lw_prior, lw_note = linewidth_prior(
                dispersion_linewidth=disp_draws.get("lp_linewidth_k0"), calibration=cal)
        notes.append(lw_note + "; drawn from this prior per posterior draw (the likelihood "
                     "depends only on Delta/gamma)")

    out_dir = Path(out) if out is not None else None
    checkpoint = (out_dir / CHECKPOINT) if out_dir is not None else None
    if resume and checkpoint is None:
        raise ConfigError("resume needs the output folder that holds the checkpoint; pass out=",
                          key="resume")
    if checkpoint is not None and checkpoint.exists() and not resume:
        checkpoint.unlink()  # a fresh run replaces an old checkpoint explicitly
    steps = dict(DEFAULT_STEPS)
    if max_steps is not None:
        steps["max_steps"] = int(max_steps)
        steps["min_steps"] = min(steps["min_steps"], int(max_steps))
    if min_steps is not None:
        steps["min_steps"] = int(min_steps)
    steps["check_every"] = min(steps["check_every"], steps["max_steps"])
    walkers = n_walkers or max(32, 4 * len(space))

    guess = problem.guess()
    x0 = np.array([_clip_into(p, guess.get(p.name, np.nan)) for p in space])
    space = problem.with_scales(dict(zip(space.names, x0, strict=True)))
    start = find_map(LogPosterior(problem.log_likelihood, space), space, x0)
    log.info("power-series mode: %s", dict(zip(space.names, np.round(start.x, 6), strict=True)))
    output = run_ensemble(problem.log_likelihood, space, start, n_walkers=walkers, seed=seed,
                          checkpoint=checkpoint, resume=resume, progress=progress,
                          strict=strict, stop_event=stop_event, **steps)

    post = output.posterior_draws()
    theta = np.stack([post[n].values for n in space.names], axis=-1)
    flat = theta.reshape(-1, theta.shape[-1])
    stream = np.random.SeedSequence(output.seed_entropy,
                                    spawn_key=(*output.seed_spawn_key, _DERIVED_STREAM))
    rng = np.random.default_rng(stream)
    linewidth = lw_prior.sample(rng, flat.shape[0]) if lw_prior is not None else None
    derived = problem.derived(flat, linewidth=linewidth)
    extra, cal_notes = calibrated_quantities(
        problem, flat, derived, calibration=cal, rng=rng,
        exciton_fraction=disp_draws.get("exciton_fraction_k0"), n_wells=n_wells,
        exciton_binding_meV=exciton_binding_meV, bohr_radius_nm=bohr_radius_nm,
        reservoir_lifetime=lifetime_r)
    derived.update(extra)
    notes += cal_notes
    if cal is not None:
        notes.append("calibration inputs propagated per draw: each posterior draw paired with "
                     "an independent draw of the calibration's log-normal inputs (the "
                     "likelihood does not depend on them)")

    prov: dict[str, Any] = {"input_sha256": sha, "input": source_name, "notes": notes,
                            "linewidth_prior": None if lw_prior is None else
                            {**lw_prior.to_dict(), "units": "meV", "source": lw_note},
                            "segments": [list(s) for s in problem.segments],
                            "derived_stream_spawn_key": [*output.seed_spawn_key,
                                                         _DERIVED_STREAM]}
    prov.update(cal_info)
    prov.update(disp_info)
    for key, value in (("n_wells", n_wells), ("exciton_binding_meV", exciton_binding_meV),
                       ("bohr_radius_nm", bohr_radius_nm),
                       ("reservoir_lifetime_ps", lifetime_r)):
        if value is not None:
            prov[key] = value
    if exciton_binding_meV is not None and bohr_radius_nm is not None:
        prov["exciton_interaction_estimate_ueV_um2"] = ciuti_estimate(
            float(exciton_binding_meV), float(bohr_radius_nm))
    attrs = {"notes": json.dumps(notes), "calibrated": int(cal is not None),
             "intensity_units": problem.intensity_units}
    result = PowerFit.from_samples(output, space, derived=derived, model=model, kind="power",
                                   observed=table, provenance=prov, extra_attrs=attrs)
    for note in notes:
        log.info("%s", note)
    if out_dir is not None:
        result.save(out_dir)
        if extraction is not None:  # the check of the input: written whenever out is given
            _extraction_figure(raw, extraction, out_dir / EXTRACTION_FIGURE)
        if figures:
            result.figures(out_dir)
    return result


def _extraction_figure(cube: xr.Dataset, obs: xr.Dataset, target: Path) -> Path:
    from .. import io
    from ..extract import plot_extraction
    from ..plots_power import _plt

    plt = _plt()
    fig = plot_extraction(cube, obs)
    try:
        return io.save_figure(target, fig)
    finally:
        plt.close(fig)


def _clip_into(param, value: float) -> float:
    """``value`` if strictly inside the prior support, else a point just inside it."""
    lo, hi = param.prior.bounds
    if not np.isfinite(value):
        value = 0.5 * (lo + hi) if np.isfinite(lo) and np.isfinite(hi) else 1.0
    if lo < value < hi:
        return float(value)
    eps = 1e-6 * (hi - lo) if np.isfinite(hi - lo) else 1e-6
    return float(np.clip(value, lo + eps, hi - eps))

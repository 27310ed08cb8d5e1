"""The steps of the power-series job before sampling, one function each.

:func:`polkit.jobs.power.run.fit_power` takes them in order and the interactive panel
(:mod:`polkit.widgets.power_panel`) one at a time:

* :func:`prepare_power`: the options checked, the series loaded (a spectra cube reduced
  by :func:`polkit.linefit.extract_observables`) and checked (:func:`check_series`), the
  calibration and the dispersion result read, the
  :class:`~polkit.jobs.power.problem.PowerProblem` with its priors and the
  polariton-linewidth prior of the coherent model;
* :func:`power_start`: the automatic starting point inside the priors, and the
  optimiser scales it implies;
* :func:`refine_mode`: the mode of the posterior from a starting point.
"""

from __future__ import annotations

import hashlib
import logging
import os
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from polkit.config.calibration import read_calibration
from polkit.config.priors import apply_priors, read_prior_file
from polkit.errors import ConfigError, DataError
from polkit.files import file_sha256
from polkit.inference import FitResult, LogPosterior, MapResult, Prior, find_map
from polkit.jobs.power.calibrated import ciuti_estimate
from polkit.jobs.power.channels import MIN_POINTS, sweep_segments
from polkit.jobs.power.options import ExtractionWindow, PowerCalibration
from polkit.jobs.power.problem import MODELS, PowerProblem, linewidth_prior
from polkit.jobs.steps import clip_into
from polkit.models.calibration import DensityCalibration
from polkit.models.pump_spot import SPOTS

__all__ = ["check_series", "PowerSetup", "prepare_power", "power_start", "refine_mode"]

log = logging.getLogger(__name__)

#: file name of the extraction figure written beside the result of a spectra cube
EXTRACTION_FIGURE = "extraction.png"


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
    from polkit import data

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


def _resolve_spot(spot, from_calibration, model) -> str:
    """The pump-spot profile: the option, else the calibration's key, else ``"point"``."""
    if spot is not None and spot not in SPOTS:
        raise ConfigError(f"expected spot one of {', '.join(map(repr, SPOTS))}, found "
                          f"{spot!r}. Fix: --spot point|gaussian|flat", key="spot")
    if spot is not None and from_calibration is not None and spot != from_calibration:
        raise ConfigError(f"the option asks for spot {spot!r} but the calibration file says "
                          f"spot = {from_calibration!r}. Fix: drop one of them or make them "
                          "agree", key="spot")
    chosen = spot if spot is not None else (from_calibration or "point")
    if model != "coherent" and chosen != "point":
        raise ConfigError(f"the pump-spot profile applies to the coherent model only, found "
                          f"spot {chosen!r} with model {model!r}. Fix: drop --spot (or the "
                          "calibration's spot key) for the reservoir model", key="spot")
    return chosen


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
        table = read_prior_file(path)
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


def _check_options(model, physics: PowerCalibration):
    """Refuse a bad model or sample constant; the reservoir lifetime as ``(value_ps, rel)``."""
    n_wells, exciton_binding_meV = physics.n_wells, physics.exciton_binding_meV
    bohr_radius_nm, reservoir_lifetime_ps = physics.bohr_radius_nm, physics.reservoir_lifetime_ps
    if model not in MODELS:
        raise ConfigError(f"expected model 'coherent' or 'reservoir', found {model!r}",
                          key="model")
    if n_wells is not None and (isinstance(n_wells, bool) or not (
            isinstance(n_wells, (int, np.integer)) and n_wells >= 1)):
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
    if len(pair) != 2 or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                 for v in pair) or not (
            pair[0] > 0 and pair[1] >= 0):
        raise ConfigError(
            f"expected a lifetime in ps > 0, or (value_ps, relative_error), found {value!r}",
            key="reservoir_lifetime_ps")
    return float(pair[0]), float(pair[1])


# --------------------------------------------------------------------------------------
# the stages
# --------------------------------------------------------------------------------------
@dataclass(eq=False)
class PowerSetup:
    """Everything a power-series fit needs besides its problem (built by :func:`prepare_power`).

    Attributes
    ----------
    table
        The observed data (only the variables the job uses, netCDF-safe attributes).
    sha256, source_name
        Hex SHA-256 and name of the input.
    model
        ``"coherent"`` or ``"reservoir"``.
    calibration, calibration_info
        The density calibration (``None`` without one) and its provenance.
    dispersion_draws, dispersion_info
        Draws taken from a dispersion result (``exciton_fraction_k0`` and, where present,
        ``lp_linewidth_k0``) and its provenance.
    linewidth_prior, linewidth_note
        Prior of the polariton linewidth drawn per posterior draw (coherent model), and
        where it came from.
    notes
        Sentences on what the result can and cannot say, so far.
    options
        ``n_wells``, ``exciton_binding_meV``, ``bohr_radius_nm`` and
        ``reservoir_lifetime`` (``(value_ps, relative_error)`` or ``None``).
    cube, extraction
        For a spectra cube: the cube and the extracted observables (else ``None``).
    spot
        Pump-spot profile of the coherent model (``"point"``, ``"gaussian"``, ``"flat"``).
    window
        The extraction window of a spectra cube (:class:`ExtractionWindow`).
    """

    table: xr.Dataset
    sha256: str
    source_name: str
    model: str
    calibration: DensityCalibration | None = None
    calibration_info: dict[str, Any] = field(default_factory=dict)
    dispersion_draws: dict[str, np.ndarray] = field(default_factory=dict)
    dispersion_info: dict[str, Any] = field(default_factory=dict)
    linewidth_prior: Prior | None = None
    linewidth_note: str | None = None
    notes: list[str] = field(default_factory=list)
    options: dict[str, Any] = field(default_factory=dict)
    cube: xr.Dataset | None = None
    extraction: xr.Dataset | None = None
    spot: str = "point"
    window: ExtractionWindow = field(default_factory=ExtractionWindow)


@dataclass(eq=False)
class _Observed:
    """A loaded and checked series: what :func:`_observe` hands on to :func:`prepare_power`."""

    raw: xr.Dataset
    series: xr.Dataset
    sha256: str
    source_name: str
    where: Any
    extraction: xr.Dataset | None
    notes: list[str]


def _observe(source, model: str, window: ExtractionWindow, cube_refusal: str | None
             ) -> _Observed:
    """Load the source, reduce a spectra cube to observables, run the job-level checks."""
    raw, sha, source_name, path = _load(source)
    where = path if path is not None else source_name
    cube = _is_cube(raw)
    if cube and cube_refusal is not None:
        raise DataError(cube_refusal, path=where, field="intensity")
    if not cube and window.given:
        key = "energy_window" if window.energy is not None else "angle_window"
        raise ConfigError("windows apply to spectra cubes only; this source is a table of "
                          "observables. Fix: drop the window", key=key)
    notes: list[str] = []
    extraction = None
    if cube:
        from polkit.linefit import extract_observables

        extraction = extract_observables(raw, energy_window=window.energy,
                                         angle_window=window.angle, rng=0)
        series = extraction
        if "source" not in series.attrs or not series.attrs["source"]:
            series.attrs["source"] = source_name
        notes.append("observables extracted from the spectra cube (extract_observables, "
                     f"{series.attrs.get('profile', 'lorentzian')} line, noise: "
                     f"{series.attrs.get('noise_model', 'n/a')}); check {EXTRACTION_FIGURE}")
    else:
        series = raw
    check_series(series, model, path=where)
    return _Observed(raw, series, sha, source_name, where, extraction, notes)


def _spot_note(spot: str) -> list[str]:
    """What the pump-spot profile means for the result (none for a point spot)."""
    if spot == "gaussian":
        return ["Gaussian pump spot integrated by the camera: the single-mode steady "
                "state is averaged over the spot, each radius on its own hysteresis "
                "branch; the thresholds are the powers where the spot centre switches "
                "(the integrated signal has no true jump: the switched area grows from "
                "the centre, so the largest steps of the data need not sit there)"]
    if spot == "flat":
        return ["flat-top pump spot: every point of the imaged area sees the same "
                "drive, so the single-mode loop applies"]
    return []


def _linewidth(model: str, user_lw: Prior | None, disp_draws: dict,
               cal: DensityCalibration | None, notes: list[str]
               ) -> tuple[Prior | None, str | None]:
    """The polariton-linewidth prior of the coherent model and its note (``None`` else)."""
    if model != "coherent":
        return None, None
    if user_lw is not None:
        lw_prior, lw_note = user_lw, "polariton_linewidth prior as given by the user"
    else:
        lw_prior, lw_note = linewidth_prior(
            dispersion_linewidth=disp_draws.get("lp_linewidth_k0"), calibration=cal)
    notes.append(lw_note + "; drawn from this prior per posterior draw (the likelihood "
                 "depends only on Delta/gamma)")
    return lw_prior, lw_note


def prepare_power(
    source: str | os.PathLike | xr.Dataset,
    *,
    model: str = "coherent",
    calibration: PowerCalibration | str | os.PathLike | DensityCalibration | dict | None = None,
    dispersion: str | os.PathLike | FitResult | None = None,
    priors: str | os.PathLike | dict | None = None,
    window: ExtractionWindow | dict | None = None,
    cube_refusal: str | None = None,
) -> tuple[PowerProblem, PowerSetup]:
    """Check the options, load and check the series, read the calibration and priors.

    Parameters are those of :func:`~polkit.jobs.power.run.fit_power`, and

    cube_refusal
        Refuse a spectra cube with this message (a :class:`~polkit.errors.DataError` on
        ``intensity``); ``None`` reduces a cube with
        :func:`polkit.linefit.extract_observables`.

    Returns
    -------
    tuple
        ``(problem, setup)``: the :class:`~polkit.jobs.power.problem.PowerProblem`
        with its parameter space (user priors applied) and the :class:`PowerSetup`.

    Raises
    ------
    DataError, ConfigError
        Bad series, options, priors or calibration (naming the file and the field).
    """
    physics = PowerCalibration.of(calibration)
    window = ExtractionWindow.of(window)
    lifetime_r = _check_options(model, physics)
    seen = _observe(source, model, window, cube_refusal)
    notes = seen.notes
    cal, cal_info, cal_spot = read_calibration(physics.density)
    spot = _resolve_spot(physics.spot, cal_spot, model)
    disp_draws, disp_info = _dispersion(dispersion)

    table = _table(seen.series)
    problem = PowerProblem.from_series(table, model, path=seen.where, spot=spot)
    notes.extend(_spot_note(spot))
    if problem.ignored:
        notes.append(f"not used by the {model} model: {', '.join(problem.ignored)}")
    space = problem.default_space()
    user, prior_path, user_lw = _split_priors(priors, model)
    if user:
        problem.space = apply_priors(space, user, path=prior_path)
    lw_prior, lw_note = _linewidth(model, user_lw, disp_draws, cal, notes)
    options = {"n_wells": physics.n_wells, "exciton_binding_meV": physics.exciton_binding_meV,
               "bohr_radius_nm": physics.bohr_radius_nm, "reservoir_lifetime": lifetime_r}
    setup = PowerSetup(table=table, sha256=seen.sha256, source_name=seen.source_name,
                       model=model, calibration=cal, calibration_info=cal_info,
                       dispersion_draws=disp_draws, dispersion_info=disp_info,
                       linewidth_prior=lw_prior, linewidth_note=lw_note, notes=notes,
                       options=options, cube=seen.raw if seen.extraction is not None else None,
                       extraction=seen.extraction, spot=spot, window=window)
    return problem, setup


def power_start(problem: PowerProblem, *, log_margin: bool = False
                ) -> tuple[np.ndarray, dict[str, float]]:
    """The automatic starting point inside the priors; sets the optimiser scales.

    The guess (:meth:`~polkit.jobs.power.problem.PowerProblem.guess`) is moved just
    inside the prior support where needed (``log_margin`` as in
    :func:`polkit.jobs.steps.clip_into`), and the problem's parameter space gets
    the optimiser and ball scales that starting point implies
    (:meth:`~polkit.jobs.power.problem.PowerProblem.with_scales`).

    Returns
    -------
    tuple
        ``(x0, guess)``: the starting vector and the guess ``{name: value}``.
    """
    guess = problem.guess()
    x0 = np.array([clip_into(p, guess.get(p.name, np.nan), log_margin=log_margin)
                   for p in problem.space])
    problem.with_scales(dict(zip(problem.space.names, x0, strict=True)))
    return x0, guess


def refine_mode(problem: PowerProblem, x0: np.ndarray) -> MapResult:
    """The mode of the power-series posterior, started at ``x0``."""
    space = problem.space
    return find_map(LogPosterior(problem.log_likelihood, space), space, x0)

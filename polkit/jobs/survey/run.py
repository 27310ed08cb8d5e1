"""The wafer survey: fit every measured position of a wafer, in parallel and resumably, then
map detuning, Rabi splitting, linewidths and photon fraction across it.

A grown wafer has a thickness gradient, so the cavity energy and with it the detuning change
across it.  The grower measures a grid of positions and wants to know where the detuning
is zero, how the Rabi splitting and the linewidths vary, and which positions failed.

Steps
-----
1. Read the positions (:func:`polkit.config.manifest.read_manifest`): a CSV manifest with
   bracketed units, or a folder of map files whose attributes carry ``x``/``y``.
2. Spawn one :class:`numpy.random.SeedSequence` child per position from one root, in
   manifest order (:mod:`polkit.jobs.survey.state`), so a position's result depends
   neither on the worker count nor on the order in which the positions finish.
3. One dask.distributed task per position (:func:`polkit.jobs.survey.tasks.fit_position`,
   scheduled by :mod:`polkit.jobs.survey.scheduler`): the dispersion job of
   :func:`polkit.jobs.dispersion.run.fit_dispersion` on that map (``quick``: the
   peak-table posterior; ``full``: the whole-map MCMC with its convergence gate).  Each
   task writes its own result folder (``posterior.nc`` and ``summary.json``, atomically)
   and, last, a small done-file; a failing position is recorded with its reason and the
   others go on.  A rerun skips positions whose done-file matches the input file,
   options and seed.
4. Assemble one :class:`xarray.Dataset` over positions
   (:func:`polkit.jobs.survey.result.assemble_survey`) and fit a smooth low-order
   polynomial surface to the detuning (:func:`polkit.jobs.survey.surface.fit_surface`):
   gradient in meV/mm with its uncertainty and the zero-detuning line with a band.

The output folder is described in :mod:`polkit.jobs.survey.layout`.

Scope: the fits are the dispersion job's; this package schedules them, keeps the books and
fits the surface.  Scheduling belongs to dask.distributed (no process pools inside tasks:
dask workers are daemonic processes).
"""

from __future__ import annotations

import dataclasses
import json
import logging
import os
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from polkit.config.manifest import PositionSpec, read_manifest
from polkit.errors import ConfigError
from polkit.files import write_json, write_netcdf, write_text
from polkit.folder_lock import folder_lock
from polkit.inference.settings import SamplerSettings
from polkit.jobs.dispersion.problem import COUPLED_MODELS as MODELS
from polkit.jobs.survey.layout import SURFACE_JSON, SURVEY_CSV, SURVEY_NC
from polkit.jobs.survey.result import SurveyResult, assemble_survey, survey_csv_text
from polkit.jobs.survey.scheduler import run_tasks
from polkit.jobs.survey.state import open_state, priors_key
from polkit.jobs.survey.surface import SURFACE_TERMS, surface_from_dataset
from polkit.jobs.survey.tasks import build_task, is_finished

__all__ = ["run_survey", "MODES"]

log = logging.getLogger(__name__)

MODES = ("quick", "full")
#: the sampler settings a survey uses: ``max_steps`` goes to every position's fit;
#: ``progress`` is the survey's own bar over positions (the fits run without bars)
_SAMPLER_FIELDS = ("max_steps", "progress")


def run_survey(
    manifest: str | os.PathLike,
    *,
    mode: str = "quick",
    workers: int | None = None,
    scheduler=None,
    out: str | os.PathLike,
    seed: int | np.random.SeedSequence | None = None,
    sampler: SamplerSettings | Mapping[str, Any] | None = None,
    model: str = "two",
    retry_failed: bool = False,
    priors: str | os.PathLike | dict | None = None,
    surface_degree: int = 1,
    figures: bool = True,
) -> SurveyResult:
    """Fit every position of a wafer on dask.distributed and map the results across it.

    Parameters
    ----------
    manifest
        CSV manifest or folder of map files (see
        :func:`polkit.config.manifest.read_manifest`).
    mode
        ``"quick"``: the peak-table posterior of each map (fast); ``"full"``: the
        whole-map MCMC with its convergence gate.
    workers
        Worker processes of the embedded cluster (one thread each); default: the cores
        available to this process.  Not allowed together with ``scheduler``.
    scheduler
        Address of an existing dask scheduler (``"tcp://host:8786"``), a cluster object
        with a ``scheduler_address`` (e.g. dask-jobqueue's ``SLURMCluster``) or a
        :class:`dask.distributed.Client`; the workers must import the same polkit, run one
        thread each, and see the map files and ``out`` at the same paths.  Default: an embedded
        ``LocalCluster(processes=True, threads_per_worker=1)``, closed at the end.
    out
        Output folder (see :mod:`polkit.jobs.survey.layout`).  A rerun into the same
        folder skips finished positions.
    seed
        Root seed; one child per position is spawned in manifest order.  ``None``: fresh
        entropy on the first run, the recorded one on reruns.  The root entropy is stored
        in ``survey_state.json`` and ``survey.nc``.
    sampler
        :class:`~polkit.inference.settings.SamplerSettings` (or a dict of its fields).
        The survey uses two of them: ``max_steps``, the MCMC step limit per position
        (default: the dispersion job's), and ``progress``, one ``tqdm.auto`` bar over
        completed positions (default on).  Other fields set are refused.
    model
        ``"two"`` or ``"three"`` oscillators (a manifest ``model`` column overrides it).
    retry_failed
        Also refit positions recorded as failed or not converged.
    priors
        TOML file or dict of priors for every position (a manifest ``priors`` column
        overrides it).
    surface_degree
        1 (plane) or 2 (quadric) for the detuning surface.
    figures
        Write ``wafer_maps.png`` and ``wafer_detuning.png``.

    Returns
    -------
    SurveyResult
        ``counts`` gives how many positions succeeded, failed and did not converge;
        ``table()`` the printable report.

    Raises
    ------
    DataError
        A bad manifest (naming the file, row and column).
    ConfigError
        Bad options, an unreachable scheduler, or an output folder holding a survey with
        another mode, model or seed.
    """
    sampler = _survey_sampler(sampler)
    _check_options(mode, model, workers, scheduler, sampler.max_steps, surface_degree)
    specs = read_manifest(manifest)
    out = Path(out).resolve()
    out.mkdir(parents=True, exist_ok=True)
    with folder_lock(out):  # one survey per output folder, after the manifest is read
        root, todo, reused = _plan(specs, out, mode=mode, model=model, seed=seed,
                                   priors=priors, max_steps=sampler.max_steps,
                                   retry_failed=retry_failed)
        fitted: list[str] = []
        if todo:
            fitted = run_tasks(todo, scheduler, workers, sampler.progress)
        ds = assemble_survey(out, specs, attrs=_survey_attrs(mode, model, root, manifest))
        result = _write_survey(ds, out, surface_degree, fitted, reused)
        if figures:
            from polkit.plotting import survey as plots_survey

            result.files.extend(plots_survey.survey_figures(ds, result.surface, out))
        log.info("%s", result.table())
        return result


def _survey_attrs(mode: str, model: str, root: np.random.SeedSequence,
                  manifest) -> dict[str, Any]:
    """The global attributes of ``survey.nc``: what was run, with which root seed."""
    return {
        "mode": mode,
        "model": model,
        "seed_entropy": str(int(root.entropy)),
        "seed_spawn_key": json.dumps([int(k) for k in root.spawn_key]),
        "manifest": str(Path(manifest)),
        "polkit_version": _polkit_version(),
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
        "comment": "per-position results in positions/<position>/ (posterior.nc, "
                   "summary.json, done.json)",
    }


def _survey_sampler(sampler) -> SamplerSettings:
    """The sampler settings of a survey; fields it would not use are refused, not ignored."""
    settings = SamplerSettings.of(sampler)
    default = SamplerSettings()
    unused = [f.name for f in dataclasses.fields(SamplerSettings)
              if f.name not in _SAMPLER_FIELDS
              and getattr(settings, f.name) != getattr(default, f.name)]
    if unused:
        raise ConfigError(
            f"the survey uses only max_steps (per position) and progress (its bar over "
            f"positions) of the sampler settings; found {', '.join(unused)} set. Fix: leave "
            "them unset",
            key="sampler",
        )
    return settings


def _check_options(mode, model, workers, scheduler, max_steps, surface_degree) -> None:
    if mode not in MODES:
        raise ConfigError(f"expected mode 'quick' or 'full'; found {mode!r}", key="mode")
    if model not in MODELS:
        raise ConfigError(f"expected model 'two' or 'three'; found {model!r}", key="model")
    if workers is not None and (isinstance(workers, bool) or not isinstance(workers, int)
                                or workers < 1):
        raise ConfigError(f"expected workers >= 1 (an int); found {workers!r}", key="workers")
    if workers is not None and scheduler is not None:
        raise ConfigError(
            "workers sets the size of the embedded cluster; with scheduler= the existing "
            "cluster decides. Fix: pass one of them",
            key="workers",
        )
    if max_steps is not None and (not isinstance(max_steps, (int, np.integer))
                                  or isinstance(max_steps, bool) or max_steps < 1):
        raise ConfigError(f"expected a whole number max_steps >= 1; found {max_steps!r}",
                          key="max_steps")
    if surface_degree not in SURFACE_TERMS:
        raise ConfigError(f"expected surface_degree 1 or 2; found {surface_degree!r}",
                          key="surface_degree")


def _plan(specs: list[PositionSpec], out: Path, *, mode, model, seed, priors, max_steps,
          retry_failed):
    """Seed every position and build its task; keep those an earlier run did not finish.

    Returns ``(root seed, tasks to run, ids reused from an earlier run)``.
    """
    key = priors_key(priors)
    priors_arg = (str(Path(priors).resolve()) if isinstance(priors, (str, os.PathLike))
                  else priors)
    root = open_state(out, mode, model, seed, key)
    children = root.spawn(len(specs))
    tasks = [build_task(s, c, out, mode, model, priors_arg, key, max_steps)
             for s, c in zip(specs, children, strict=True)]
    todo = [t for t in tasks if not is_finished(t, retry_failed)]
    todo_ids = {t["position_id"] for t in todo}
    reused = [t["position_id"] for t in tasks if t["position_id"] not in todo_ids]
    log.info("survey of %d positions: %d to fit, %d finished earlier", len(tasks), len(todo),
             len(reused))
    return root, todo, reused


def _write_survey(ds, out: Path, surface_degree: int, fitted, reused) -> SurveyResult:
    """Fit the detuning surface; write the combined table and the surface."""
    surface, note = surface_from_dataset(ds, surface_degree)
    surf_dict = surface.to_dict() if surface is not None else {"degree": None, "note": note}
    ds.attrs["detuning_surface"] = json.dumps(_json_ready(surf_dict))
    files = [
        write_netcdf(out / SURVEY_NC, ds),
        write_text(out / SURVEY_CSV, survey_csv_text(ds)),
        write_json(out / SURFACE_JSON, surf_dict),
    ]
    return SurveyResult(dataset=ds, surface=surface, out=out, fitted=fitted, reused=reused,
                        surface_note=note, files=files)


def _json_ready(obj):
    from polkit.files import json_safe

    return json_safe(obj)


def _polkit_version() -> str:
    from polkit import __version__

    return __version__

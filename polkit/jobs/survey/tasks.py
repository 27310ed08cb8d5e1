"""One position of a survey: the task a dask worker runs, and how the driver builds it.

A task is a plain dict (picklable, JSON-able but for the seed) holding what the dispersion
job needs for one map and the ``key`` that identifies the fit: a rerun skips a position
whose done-file carries the same key.
"""

from __future__ import annotations

import contextlib
import logging
import time
import warnings
from datetime import UTC, datetime
from pathlib import Path
from typing import Any

import numpy as np

from polkit.config.manifest import PositionSpec
from polkit.errors import ConfigError
from polkit.files import write_json
from polkit.inference.identity import CheckpointMismatch
from polkit.jobs.survey import layout
from polkit.jobs.survey.layout import one_line, read_json
from polkit.jobs.survey.state import sha_or_none

__all__ = ["fit_position", "build_task", "is_finished", "lost_record"]

log = logging.getLogger(__name__)


def fit_position(task: dict[str, Any]) -> dict[str, Any]:
    """Fit one position and write its result folder; never raises for a bad position.

    This is the dask task of :func:`~polkit.jobs.survey.run.run_survey` (importable by the
    workers).  It removes any old done-file, fits the map with
    :func:`~polkit.jobs.dispersion.run.fit_dispersion` (quick: ``peaks_only=True``),
    writes ``posterior.nc`` and ``summary.json`` atomically, and last ``done.json``
    (atomically) with the status (``ok``, ``not_converged`` or ``failed``), the reason,
    the warnings raised during the fit and the task's key.  A full-mode fit interrupted
    earlier with the same key resumes from its ``chains.h5`` checkpoint; the checkpoint is
    removed once the position is done.

    Parameters
    ----------
    task
        ``position_id``, ``folder``, ``file``, ``mode``, ``model``, ``kind``,
        ``energy_window``, ``wavelength_medium``, ``priors``, ``seed`` (a
        SeedSequence), ``max_steps`` and ``key`` (the JSON-able identity of the fit).

    Returns
    -------
    dict
        The content of ``done.json``.
    """
    from polkit.jobs.dispersion.run import fit_dispersion

    folder = Path(task["folder"])
    folder.mkdir(parents=True, exist_ok=True)
    (folder / layout.DONE_FILE).unlink(missing_ok=True)
    checkpoint = folder / layout.CHECKPOINT
    started = read_json(folder / layout.STARTED_FILE)
    resume = (task["mode"] == "full" and checkpoint.is_file() and started is not None
              and started.get("key") == task["key"])
    if not resume:
        checkpoint.unlink(missing_ok=True)
    write_json(folder / layout.STARTED_FILE, {"key": task["key"]})
    seed = task["seed"]
    record: dict[str, Any] = {
        "position": task["position_id"],
        "file": str(task["file"]),
        "key": task["key"],
        "seed_entropy": str(seed.entropy),
        "seed_spawn_key": [int(k) for k in seed.spawn_key],
    }
    t0 = time.perf_counter()
    with warnings.catch_warnings(record=True) as caught, _serial_dask():
        warnings.simplefilter("always")
        try:
            result = _fit(fit_dispersion, task, folder, resume)
        except Exception as exc:  # noqa: BLE001 - a bad position is recorded, the rest go on
            record["status"] = "failed"
            record["reason"] = layout.reason(exc)
            log.info("%s failed: %s", task["position_id"], record["reason"])
        else:
            if result.converged:
                record["status"], record["reason"] = "ok", ""
            else:
                reasons = result.diagnostics.get("reasons") or ["convergence gate not passed"]
                record["status"] = "not_converged"
                record["reason"] = one_line("; ".join(reasons))
    record["warnings"] = _messages(caught)
    record["seconds"] = round(time.perf_counter() - t0, 3)
    record["finished"] = datetime.now(UTC).isoformat(timespec="seconds")
    write_json(folder / layout.DONE_FILE, record)
    with contextlib.suppress(OSError):
        checkpoint.unlink(missing_ok=True)
    return record


def _fit(fit_dispersion, task: dict[str, Any], folder: Path, resume: bool):
    """``fit_dispersion`` (the dispersion job) on the task's map, saved in ``folder``."""
    from polkit.data.options import LoadOptions
    from polkit.inference.settings import SamplerSettings

    options = dict(
        model=task["model"],
        peaks_only=task["mode"] == "quick",
        priors=task["priors"],
        seed=task["seed"],
        sampler=SamplerSettings(max_steps=task["max_steps"], progress=False),
        load=LoadOptions(kind=task["kind"], wavelength_medium=task["wavelength_medium"],
                         energy_window=task["energy_window"]),
        figures=False,
    )
    if task["mode"] == "full":
        try:
            return fit_dispersion(task["file"], out=folder, resume=resume, **options)
        except (ConfigError, CheckpointMismatch):
            if not resume:
                raise
            log.warning("%s: checkpoint not resumable; starting afresh", task["position_id"])
            return fit_dispersion(task["file"], out=folder, resume=False, **options)
    result = fit_dispersion(task["file"], out=None, **options)
    result.save(folder)
    return result


def _messages(caught: list[warnings.WarningMessage]) -> list[str]:
    """The warnings raised during a fit, one line each, each once, in order."""
    messages = []
    for w in caught:
        text = one_line(f"{w.category.__name__}: {w.message}")
        if text not in messages:
            messages.append(text)
    return messages


@contextlib.contextmanager
def _serial_dask():
    """Inside a task, let libraries that consult dask (xarray's netCDF writer picks its
    file locks from the active scheduler) work serially, as in a plain process: a task is
    one whole fit, and the worker's cluster-wide locks are not meant for its files."""
    try:
        import dask
    except ImportError:  # pragma: no cover - dask is a dependency
        yield
        return
    with dask.config.set(scheduler="synchronous"):
        yield


def build_task(spec: PositionSpec, child: np.random.SeedSequence, out: Path, mode: str,
               model: str, priors, priors_key, max_steps) -> dict[str, Any]:
    """The task of one position: its options, its seed child and the key of its fit.

    ``priors`` is the survey's priors (a file name or a dict) and ``priors_key`` their
    identity (:func:`polkit.jobs.survey.state.priors_key`); a manifest ``priors`` cell
    overrides both.
    """
    pos_priors = spec.priors if spec.priors is not None else priors
    key = {
        "file_sha256": sha_or_none(spec.file),
        "file": str(spec.file),
        "mode": mode,
        "model": spec.model or model,
        "kind": spec.kind,
        "energy_window": list(spec.energy_window) if spec.energy_window else None,
        "wavelength_medium": spec.wavelength_medium,
        "priors": ({"file": str(spec.priors), "sha256": sha_or_none(spec.priors)}
                   if spec.priors is not None else priors_key),
        "seed_entropy": str(int(child.entropy)),
        "seed_spawn_key": [int(k) for k in child.spawn_key],
    }
    return {
        "position_id": spec.position_id,
        "folder": str(out / layout.POSITIONS_DIR / spec.position_id),
        "file": str(spec.file),
        "mode": mode,
        "model": spec.model or model,
        "kind": spec.kind,
        "energy_window": spec.energy_window,
        "wavelength_medium": spec.wavelength_medium,
        "priors": str(pos_priors) if isinstance(pos_priors, Path) else pos_priors,
        "seed": child,
        "max_steps": max_steps,
        "key": key,
    }


def is_finished(task: dict[str, Any], retry_failed: bool) -> bool:
    """Whether an earlier run finished this task with the same key (and it need not rerun)."""
    folder = Path(task["folder"])
    done = read_json(folder / layout.DONE_FILE)
    if done is None or done.get("key") != task["key"]:
        return False
    status = done.get("status")
    if status not in layout.STATUSES:
        return False
    if status != "failed" and not (folder / layout.SUMMARY_FILE).is_file():
        return False
    return not (retry_failed and status != "ok")


def lost_record(task: dict[str, Any], exc: BaseException) -> dict[str, Any]:
    """Record a position whose task died with its worker (the task itself never raises)."""
    record = {
        "position": task["position_id"],
        "file": task["file"],
        "key": task["key"],
        "status": "failed",
        "reason": one_line(f"the worker running it was lost ({type(exc).__name__}: {exc})"),
        "warnings": [],
        "finished": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    try:
        write_json(Path(task["folder"]) / layout.DONE_FILE, record)
    except OSError as err:
        log.warning("%s: cannot record the failure (%s)", task["position_id"], err)
    return record

"""The dask.distributed side of a survey: a client (an embedded loopback-only LocalCluster
or an existing scheduler) and one submitted task per position, collected as they finish.

No process pools inside tasks: dask workers are daemonic processes.
"""

from __future__ import annotations

import contextlib
import logging
import os
from typing import Any

from polkit.errors import ConfigError
from polkit.jobs.survey.tasks import fit_position, lost_record

__all__ = ["run_tasks", "client_for"]

log = logging.getLogger(__name__)


def _default_workers() -> int:
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:
        return max(1, os.cpu_count() or 1)


def _local_cluster_options() -> dict[str, Any]:
    """Where the embedded cluster listens and keeps its scratch files.

    The scheduler and the workers listen on the loopback interface only (127.0.0.1) and
    the dask dashboard is off: nothing of a survey is reachable from the network.  Worker
    scratch space (spilled data, worker files) goes to dask's ``temporary-directory``
    setting when it is set, else to the system's temporary folder
    (:func:`tempfile.gettempdir`, e.g. ``/tmp``, or ``$TMPDIR`` when set), in a
    ``dask-scratch-space`` folder that dask removes when the workers close.
    """
    import tempfile

    import dask

    scratch = dask.config.get("temporary-directory", default=None) or tempfile.gettempdir()
    log.info("survey: dask scratch space in %s", scratch)
    return {"host": "127.0.0.1", "dashboard_address": None, "local_directory": scratch}


@contextlib.contextmanager
def client_for(scheduler, workers: int | None):
    """A dask client: an embedded LocalCluster, or one on an existing scheduler."""
    try:
        from dask.distributed import Client, LocalCluster
    except ImportError:  # pragma: no cover - a declared dependency
        raise ConfigError(
            "the survey runs on dask.distributed, which is not installed. Fix: pip install "
            "'dask[distributed]'",
            key="scheduler",
        ) from None
    if scheduler is not None:
        if isinstance(scheduler, Client):
            yield scheduler
            return
        address = getattr(scheduler, "scheduler_address", scheduler)  # a cluster object
        try:
            client = Client(str(address), timeout="30s")
        except (OSError, TimeoutError) as exc:
            raise ConfigError(
                f"cannot reach the dask scheduler at {scheduler!r} ({exc}). Fix: check the "
                "address (tcp://host:port) and that the scheduler is running",
                key="scheduler",
            ) from None
        try:
            yield client
        finally:
            client.close()
        return
    n = workers or _default_workers()
    cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True,
                           **_local_cluster_options(), silence_logs=_scheduler_log_level())
    try:
        client = Client(cluster)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


def _scheduler_log_level() -> int:
    """The embedded cluster's own log level: errors only, unless polkit logs at INFO or below
    (``polkit --verbose`` / ``--debug``), so its lines do not reach the terminal by default."""
    return logging.INFO if logging.getLogger().isEnabledFor(logging.INFO) else logging.ERROR


def run_tasks(todo: list[dict], scheduler, workers, progress: bool) -> list[str]:
    """Submit one task per position; collect as they complete; returns the ids fitted."""
    from dask.distributed import as_completed
    from tqdm.auto import tqdm

    fitted: list[str] = []
    with client_for(scheduler, workers) as client:
        futures = {}
        for task in todo:
            fut = client.submit(fit_position, task, pure=False,
                                key=f"polkit-survey-{task['position_id']}-{os.urandom(4).hex()}")
            futures[fut.key] = (fut, task)
        bar = tqdm(total=len(todo), disable=not progress, desc="survey", unit="position",
                   dynamic_ncols=True)
        try:
            for fut in as_completed([f for f, _ in futures.values()]):
                task = futures[fut.key][1]
                try:
                    record = fut.result()
                except Exception as exc:  # noqa: BLE001 - a lost worker fails one position
                    record = lost_record(task, exc)
                fitted.append(task["position_id"])
                bar.set_postfix_str(f"{task['position_id']}: {record['status']}", refresh=False)
                bar.update(1)
        except BaseException:
            client.cancel([f for f, _ in futures.values()])
            raise
        finally:
            bar.close()
    return fitted

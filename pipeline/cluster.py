"""Run sweep tasks on dask: a LocalCluster, or batch jobs through dask-jobqueue.

``[cluster] scheduler = "local"`` starts ``cluster.workers`` worker processes on this
machine (one thread each: the solvers use BLAS threads); ``"slurm"`` / ``"pbs"`` start one
dask worker per batch job (``cluster.cores``, ``cluster.memory`` GiB, ``cluster.walltime``).
Workers import this checkout (``PYTHONPATH``) and run :func:`pipeline.sweep.run_task`.
"""

from __future__ import annotations

import os
import sys
import time
from collections.abc import Callable
from pathlib import Path
from typing import Any

from pipeline.config import ClusterConfig
from pipeline.errors import BackendError
from pipeline.store import Store
from pipeline.sweep import SweepTask, TaskResult, record_failure, run_task

__all__ = ["jobqueue_cluster", "make_cluster", "run_tasks"]

REPO = Path(__file__).resolve().parents[1]


def _worker_environment(settings: ClusterConfig) -> dict[str, str]:
    env = {"OMP_NUM_THREADS": str(settings.cores), "OPENBLAS_NUM_THREADS": str(settings.cores),
           "GAPLINE_PROGRESS": os.environ.get("GAPLINE_PROGRESS", "plain")}
    path = os.environ.get("PYTHONPATH")
    env["PYTHONPATH"] = f"{REPO}:{path}" if path else str(REPO)
    return env


def jobqueue_cluster(settings: ClusterConfig, log_directory: str | Path | None = None):
    """A dask-jobqueue cluster (not yet scaled) for ``cluster.scheduler`` slurm or pbs."""
    try:
        import dask_jobqueue
    except ImportError:
        raise BackendError("cluster.scheduler: dask-jobqueue is not installed; fix: pip "
                           "install dask-jobqueue, or use scheduler = 'local'") from None
    classes = {"slurm": dask_jobqueue.SLURMCluster, "pbs": dask_jobqueue.PBSCluster}
    cluster_class = classes[settings.scheduler]
    prologue = [f"export {key}={value}" for key, value in _worker_environment(settings).items()]
    options: dict[str, Any] = {
        "cores": settings.cores,
        "processes": 1,
        "memory": f"{settings.memory:g}GiB",
        "walltime": settings.walltime,
        "job_name": "gapline-worker",
        "python": sys.executable,
        "job_script_prologue": prologue,
        "scheduler_options": {"dashboard_address": None},
    }
    if settings.queue:
        options["queue"] = settings.queue
    if settings.account:
        options["account"] = settings.account
    if log_directory is not None:
        options["log_directory"] = str(log_directory)
    return cluster_class(**options)


def make_cluster(settings: ClusterConfig, log_directory: str | Path | None = None):
    """The dask cluster ``[cluster]`` asks for, scaled to ``cluster.workers``."""
    if settings.scheduler == "local":
        from distributed import LocalCluster

        return LocalCluster(n_workers=settings.workers, threads_per_worker=1, processes=True,
                            memory_limit=f"{settings.memory:g}GiB", dashboard_address=None,
                            env=_worker_environment(settings))
    cluster = jobqueue_cluster(settings, log_directory)
    cluster.scale(jobs=settings.workers)
    return cluster


def run_tasks(
    tasks: list[SweepTask],
    store_path: str,
    settings: ClusterConfig,
    on_result: Callable[[TaskResult], None] | None = None,
    log_directory: str | Path | None = None,
) -> list[TaskResult]:
    """Run ``tasks`` on the cluster; results in task order. A worker that dies (memory,
    a killed job) marks its task failed in the store; the other tasks go on."""
    from distributed import Client, as_completed

    if not tasks:
        return []
    results: dict[int, TaskResult] = {}
    with make_cluster(settings, log_directory) as cluster, Client(cluster) as client:
        futures = {}
        for task in tasks:
            future = client.submit(run_task, task, store_path, key=f"gapline-task-{task.index}-"
                                   f"{time.time_ns()}", pure=False, retries=0)
            futures[future] = task
        for future in as_completed(futures):
            task = futures[future]
            try:
                result = future.result()
            except Exception as error:  # the worker process died under the task
                message = " ".join(f"{type(error).__name__}: {error}".split())
                bookkeeping = {"name": task.config.sweep.name, "index": task.index,
                               "parameters": task.parameters}
                record_failure(Store(store_path), task.run, bookkeeping, message)
                result = TaskResult(task.index, task.run, "failed", error=message)
            results[task.index] = result
            if on_result is not None:
                on_result(result)
    return [results[task.index] for task in tasks]

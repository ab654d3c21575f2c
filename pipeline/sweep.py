"""Parameter sweeps: expansion of ``[sweep]`` into tasks, one task's run, resume bookkeeping.

A sweep is the product of its ``grid`` lists times the rows of its ``zip`` lists (lockstep).
Each task is the base config with those fields set (the same dotted paths as ``--set``) and
its own run group, named from the values: ``SWEEP.size-64`` or
``SWEEP.forward0-0.5_backward0-1.5``. Bookkeeping is per task (the attribute ``sweep`` of
its own run group), so tasks running in different processes never write the same metadata;
only the driver writes ``_sweeps/SWEEP`` (the definition and the task list), before any
task starts. A task is *complete* when every stage is committed with its current
fingerprint (:func:`pipeline.stages.runner.run_is_current`), whatever its ``sweep.status``
says; so a task killed midway is simply run again.
"""

from __future__ import annotations

import contextlib
import copy
import io
import itertools
import re
import time
import traceback
from dataclasses import dataclass, field
from typing import Any

from pipeline.config import Config, fingerprint, parse_config, set_field
from pipeline.errors import ConfigError, GaplineError
from pipeline.store import Store

__all__ = [
    "SWEEPS_GROUP",
    "SweepTask",
    "TaskResult",
    "expand_sweep",
    "record_sweep",
    "run_task",
    "sweep_tasks",
    "task_is_complete",
]

SWEEPS_GROUP = "_sweeps"
MAX_NAME = 96
_UNSAFE = re.compile(r"[^A-Za-z0-9_.\-]+")


@dataclass(frozen=True)
class SweepTask:
    """One point of a sweep: its position, run name, parameter values and full config."""

    index: int
    run: str
    parameters: dict[str, Any]
    config: Config = field(compare=False, repr=False)


@dataclass
class TaskResult:
    index: int
    run: str
    status: str  # 'complete' (ran now), 'skipped' (already complete) or 'failed'
    verified: bool | None = None
    error: str | None = None
    seconds: float = 0.0


def expand_sweep(config: Config) -> list[SweepTask]:
    """The tasks of ``config.sweep`` in a fixed order (grid in C order, zip rows innermost).

    Every task config is validated; a bad value raises :class:`ConfigError` naming the
    sweep entry, e.g. ``sweep.grid.'model.size'[2]: model.size: sites per axis must be >= 2``.
    """
    sweep = config.sweep
    if sweep is None:
        raise ConfigError("sweep: the config has no [sweep] table; fix: add one, e.g. "
                          "[sweep] grid = {\"model.size\" = [32, 64, 128]}")
    grid_keys = [key for key, _ in sweep.grid]
    zip_keys = [key for key, _ in sweep.zip]
    zip_rows = list(zip(*(values for _, values in sweep.zip), strict=True)) or [()]
    tasks: list[SweepTask] = []
    names: set[str] = set()
    for index, (grid_point, zip_row) in enumerate(
        itertools.product(itertools.product(*(values for _, values in sweep.grid)), zip_rows)
    ):
        parameters = dict(zip(grid_keys, grid_point, strict=True))
        parameters.update(zip(zip_keys, zip_row, strict=True))
        raw = copy.deepcopy(config.raw)
        raw.pop("sweep", None)
        for key, value in parameters.items():
            kind = "grid" if key in grid_keys else "zip"
            position = _position(sweep, kind, key, value)
            label = f"sweep.{kind}.{key!r}[{position}]"
            set_field(raw, key, copy.deepcopy(value), label=label)
        run = task_run_name(sweep.name, index, parameters)
        if run in names:
            run = f"{sweep.name}.{index:04d}-{fingerprint(parameters)[:8]}"
        names.add(run)
        raw.setdefault("run", {})["name"] = run
        raw["sweep"] = {**copy.deepcopy(config.raw["sweep"]), "name": sweep.name}
        try:
            task_config = parse_config(raw, source=config.source)
        except ConfigError as error:
            raise ConfigError(f"sweep task {index} ({_describe(parameters)}): {error}") from None
        tasks.append(SweepTask(index=index, run=run, parameters=parameters, config=task_config))
    return tasks


def _position(sweep, kind: str, key: str, value: Any) -> int:
    values = dict(getattr(sweep, kind))[key]
    return next(i for i, item in enumerate(values) if item == value)


def _describe(parameters: dict[str, Any]) -> str:
    return ", ".join(f"{key}={value!r}" for key, value in parameters.items())


def task_run_name(sweep: str, index: int, parameters: dict[str, Any]) -> str:
    """``SWEEP.<field>-<value>_...`` from the last path part of each field (indices kept:
    ``forward[0]`` -> ``forward0``); too long a name becomes ``SWEEP.<index>-<hash>``."""
    parts = []
    for key, value in parameters.items():
        short = key.split(".")[-1].replace("[", "").replace("]", "")
        parts.append(f"{short}-{_value_text(value)}")
    name = _UNSAFE.sub("-", f"{sweep}.{'_'.join(parts)}")
    if len(name) > MAX_NAME:
        name = f"{sweep}.{index:04d}-{fingerprint(parameters)[:8]}"
    return name


def _value_text(value: Any) -> str:
    if isinstance(value, list):
        return "x".join(_value_text(item) for item in value)
    if isinstance(value, float):
        return f"{value:g}"
    return str(value)


def sweep_tasks(config: Config, store: Store) -> list[SweepTask]:
    """Expand the sweep and refuse run names that collide with runs of another sweep."""
    tasks = expand_sweep(config)
    for task in tasks:
        if store.has_run(task.run):
            owner = store.run_attrs(task.run).get("sweep", {}).get("name")
            # an empty group is a creation cut short: taking it over loses nothing
            if owner != config.sweep.name and not store.run_is_empty(task.run):
                raise ConfigError(f"sweep.name: run {task.run!r} already exists in the store "
                                  f"and is not part of sweep {config.sweep.name!r}; fix: choose "
                                  "another sweep.name")
    return tasks


def record_sweep(store: Store, config: Config, tasks: list[SweepTask]) -> None:
    """Write ``_sweeps/SWEEP`` (definition and task list); the driver does this once, before
    any task runs, so no task ever writes it."""
    import zarr

    zarr.open_group(str(store.path / SWEEPS_GROUP), mode="a", zarr_format=3)
    group = zarr.open_group(str(store.path / SWEEPS_GROUP / config.sweep.name), mode="a",
                            zarr_format=3)
    from pipeline.store import _jsonable

    group.attrs.update(_jsonable({
        "definition": config.raw.get("sweep", {}),
        "config_source": config.source,
        "parameters": [key for key, _ in config.sweep.grid + config.sweep.zip],
        "tasks": [{"index": t.index, "run": t.run, "parameters": t.parameters} for t in tasks],
    }))


def task_is_complete(store: Store, task: SweepTask) -> bool:
    from pipeline.stages.runner import run_is_current, stage_fingerprints

    return run_is_current(store, task.run, stage_fingerprints(task.config))


def run_task(task: SweepTask, store_path: str) -> TaskResult:
    """Run one task into its own run group (skipping it when already complete).

    Never raises for a failing task: the error is recorded in the run group's ``sweep``
    attribute (``status = "failed"``, ``error`` one line) and returned.
    """
    from pipeline.progress import log
    from pipeline.stages.runner import run_pipeline

    store = Store(store_path, create=True)
    started = time.perf_counter()
    if task_is_complete(store, task):
        verify = store.group(task.run, "verify", required=False)
        verified = bool(verify.attrs["passed"]) if verify is not None else None
        return TaskResult(task.index, task.run, "skipped", verified=verified)
    bookkeeping = {"name": task.config.sweep.name, "index": task.index,
                   "parameters": task.parameters}
    store.open_run(task.run, {"sweep": {**bookkeeping, "status": "running", "error": None}})
    try:
        with contextlib.redirect_stdout(io.StringIO()):  # the summary is in RUN/report
            outcome = run_pipeline(task.config, store_path=store_path)
    except Exception as error:  # one failed task must not stop the others
        if isinstance(error, GaplineError):
            message = f"{type(error).__name__}: {error}"
        else:
            frame = traceback.extract_tb(error.__traceback__)[-1]
            message = (f"{type(error).__name__}: {error} (at {frame.filename}:{frame.lineno})")
        message = " ".join(message.split())
        log(f"sweep task {task.index} ({task.run}): failed: {message}")
        record_failure(store, task.run, bookkeeping, message)
        return TaskResult(task.index, task.run, "failed", error=message,
                          seconds=time.perf_counter() - started)
    store.update_run_attrs(task.run, {"sweep": {**bookkeeping, "status": "complete",
                                                "error": None, "verified": outcome.verified}})
    return TaskResult(task.index, task.run, "complete", verified=outcome.verified,
                      seconds=time.perf_counter() - started)


def record_failure(store: Store, run: str, bookkeeping: dict[str, Any], message: str) -> None:
    """Mark a task's run group failed with a one-line error (the stages it committed stay)."""
    store.open_run(run, {"sweep": {**bookkeeping, "status": "failed", "error": message,
                                   "failed_at": time.strftime("%Y-%m-%dT%H:%M:%S%z")}})

"""Run stages in order: fingerprints, stage selection, atomic commits, timings."""

from __future__ import annotations

import platform
import resource
import time
from dataclasses import dataclass
from importlib.metadata import PackageNotFoundError, version
from typing import Any

import pipeline
from pipeline.config import Config, fingerprint
from pipeline.errors import ConfigError, StoreError
from pipeline.models import build_model
from pipeline.parallel import World, world
from pipeline.progress import log
from pipeline.stages import STAGE_NAMES, STAGES
from pipeline.stages.base import RunContext
from pipeline.store import STAGE_GROUPS, Store

__all__ = [
    "RunOutcome",
    "config_sections",
    "run_is_current",
    "run_pipeline",
    "software_versions",
    "stage_fingerprints",
    "stage_is_current",
]


@dataclass
class RunOutcome:
    run: str
    store: str
    stages_run: list[str]
    verified: bool | None  # None when verify did not run


def software_versions() -> dict[str, str]:
    """Versions of the packages a result depends on (without importing them)."""
    versions = {"gapline": pipeline.__version__, "python": platform.python_version()}
    for name in ("numpy", "scipy", "zarr", "xarray", "dask", "petsc4py", "slepc4py", "mpi4py"):
        try:
            versions[name] = version(name)
        except PackageNotFoundError:
            continue
    return versions


def stage_fingerprints(config: Config) -> dict[str, str]:
    """Fingerprint of each stage: hash of the config sections it reads, its upstream
    fingerprint and the code version."""
    resolved = config.resolved()
    prints: dict[str, str] = {}
    for stage in STAGES:
        payload: dict[str, Any] = {
            "sections": config_sections(resolved, stage.CONFIG_SECTIONS),
            "upstream": prints.get(stage.UPSTREAM) if stage.UPSTREAM else None,
            "code": pipeline.__version__,
        }
        prints[stage.NAME] = fingerprint(payload)
    return prints


def config_sections(resolved: dict[str, Any], names: tuple[str, ...]) -> dict[str, Any]:
    """The parts of a resolved config a stage reads: whole sections (``"model"``) or single
    fields (``"store.matrix"``)."""
    picked: dict[str, Any] = {}
    for name in names:
        node: Any = resolved
        for part in name.split("."):
            node = node.get(part) if isinstance(node, dict) else None
        picked[name] = node
    return picked


def stage_is_current(store: Store, run: str, stage: str, prints: dict[str, str]) -> bool:
    """True when ``stage`` of ``run`` is committed with the current fingerprint and every
    group it wrote is complete (not interrupted, superseded or stale)."""
    if not store.has_run(run):
        return False
    record = store.stage_record(run, stage)
    if record is None or record.get("fingerprint") != prints[stage]:
        return False
    return all(store.group_status(run, name) == "complete"
               for name in record.get("groups", STAGE_GROUPS[stage]))


def run_is_current(store: Store, run: str, prints: dict[str, str]) -> bool:
    """True when every stage of ``run`` is committed and current (nothing left to do)."""
    return all(stage_is_current(store, run, name, prints) for name in STAGE_NAMES)


def run_pipeline(
    config: Config,
    store_path: str | None = None,
    start: str | None = None,
    only: str | None = None,
) -> RunOutcome:
    """Run the stages of ``config``: without ``start``/``only`` every stage that is not up
    to date (committed with its current fingerprint, groups complete); ``start`` forces that
    stage and all later ones, ``only`` forces one stage."""
    for label, value in (("--from", start), ("--only", only)):
        if value is not None and value not in STAGE_NAMES:
            raise ConfigError(f"{label}: unknown stage {value!r}; expected one of "
                              + ", ".join(STAGE_NAMES))
    if only:
        selected = [only]
    elif start:
        selected = list(STAGE_NAMES[STAGE_NAMES.index(start):])
    else:
        selected = list(STAGE_NAMES)
    from pipeline.backends import select_backend

    backend = select_backend(config.solve.backend)  # refuse early (e.g. under mpiexec)
    backend.configure(config.solve)
    model = build_model(config.model)
    parallel = world()
    path = store_path or config.store.path
    store = Store(path, create=True)
    prints = stage_fingerprints(config)
    run = config.run.name
    ctx = RunContext(config=config, store=store, run=run, model=model,
                     backend_name=config.solve.backend, fingerprints=prints,
                     _backend=backend)
    first = STAGES[STAGE_NAMES.index(selected[0])]
    if first.UPSTREAM is not None:
        _require_upstream(store, run, first.UPSTREAM, prints)
    # The run's descriptive attrs are rewritten only after a stage commits, so a failed rerun
    # never pairs the stored results with a config they were not computed from.
    store.open_run(run, {})
    run_attrs = {
        "config": config.resolved(),
        "config_source": config.source,
        "description": config.run.description,
        "model": model.describe(),
        "versions": software_versions(),
    }
    verified = None
    forced = start is not None or only is not None
    executed = []
    for stage in STAGES:
        if stage.NAME not in selected:
            continue
        if not forced and stage_is_current(store, run, stage.NAME, prints):
            log(f"stage {stage.NAME}: up to date")
            if stage.NAME == "verify":
                verified = bool(store.group(run, "verify").attrs["passed"])
            continue
        executed.append(stage.NAME)
        log(f"stage {stage.NAME}: started")
        started = time.perf_counter()
        if getattr(stage, "COLLECTIVE", False):
            output = stage.run(ctx)
        else:  # reads the store: once, on rank 0; every rank gets the outcome
            output = parallel.on_root(lambda stage=stage: stage.run(ctx))
        record = {**output.record,
                  "config": config_sections(config.resolved(), stage.CONFIG_SECTIONS),
                  "ranks": parallel.size,
                  "peak_memory_mib_per_rank": _peak_memory(parallel)}
        store.write_stage(run, stage.NAME, output.groups, prints[stage.NAME], record,
                          upstream=stage.UPSTREAM)
        seconds = time.perf_counter() - started
        timings = dict(store.run_attrs(run).get("timings", {}))
        timings[stage.NAME] = seconds
        store.update_run_attrs(run, {**run_attrs, "timings": timings})
        log(f"stage {stage.NAME}: committed in {seconds:.2f} s")
        if stage.NAME == "verify":
            verified = output.passed
    return RunOutcome(run=run, store=str(store.path), stages_run=executed, verified=verified)


def _peak_memory(parallel: World) -> list[float]:
    """Peak resident memory of each rank so far (MiB)."""
    peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # kB on Linux
    return [round(value, 1) for value in parallel.allgather(peak)]


def _require_upstream(store: Store, run: str, upstream: str, prints: dict[str, str]) -> None:
    """Refuse to start mid-pipeline unless the upstream stage is committed for this config."""
    if not store.has_run(run):
        raise StoreError(f"run {run!r} is not in {str(store.path)!r}; run all stages first "
                         "(without --from/--only)")
    record = store.stage_record(run, upstream)
    if record is None:
        raise StoreError(f"run {run!r}: stage {upstream!r} has no committed result; rerun "
                         f"with --from {upstream}")
    if record.get("fingerprint") != prints[upstream]:
        raise StoreError(f"run {run!r}: stored {upstream!r} results come from a different "
                         f"config (fingerprint {record.get('fingerprint')}, expected "
                         f"{prints[upstream]}); rerun with --from {upstream}")
    status = store.group_status(run, STAGE_GROUPS[upstream][0])
    if status != "complete":
        raise StoreError(f"run {run!r}: stored {upstream!r} results are {status}; rerun with "
                         f"--from {upstream}")

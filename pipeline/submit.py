"""Batch scripts for SLURM and PBS from ``workflows/batch-job.sh``, and their submission.

``gapline submit CONFIG --scheduler slurm|pbs`` writes, for a config with ``[sweep]``:

* ``sweep-array.sh``: a job array, one task per array index (``gapline sweep-task CONFIG
  --index $SLURM_ARRAY_TASK_ID`` / ``$PBS_ARRAY_INDEX``), each writing its own run group;
* ``collect.sh``: ``gapline collect STORE SWEEP``, submitted to start after every array task
  succeeded (``afterok``);

and for a single config ``run.sh``: one ``gapline run``, under ``mpiexec -n RANKS`` when the
backend is distributed. Memory and time come from the ``check`` estimate
(:func:`pipeline.estimate.resource_numbers`) with safety factors; ``[cluster]`` gives the
queue, account, cores and, when set, ranks and walltime. Scheduler specifics are the few
class attributes of :class:`Scheduler`.
"""

from __future__ import annotations

import math
import shlex
import shutil
import string
import subprocess
import sys
from dataclasses import dataclass, field
from pathlib import Path

from pipeline.config import Config
from pipeline.errors import BackendError, GaplineError

__all__ = ["PBS", "SCHEDULERS", "SLURM", "JobPlan", "Scheduler", "render_jobs", "submit"]

REPO = Path(__file__).resolve().parents[1]
TEMPLATE = REPO / "workflows" / "batch-job.sh"
MEMORY_FACTOR = 1.5  # estimate -> request (LU fill-in and Python are not in the estimate)
TIME_FACTOR = 10.0  # rough time estimate -> time limit
MIN_SECONDS = 600
MIN_MEMORY_GIB = 1


class _Template(string.Template):
    delimiter = "@"


@dataclass(frozen=True)
class Scheduler:
    name: str
    submit_command: str
    directive: str
    array_index: str  # environment variable of the array index inside a task

    def header(self, job_name: str, cores: int, memory_gib: int, time_limit: str,
               log_dir: Path, queue: str | None, account: str | None, array: int | None,
               ranks: int) -> list[str]:
        raise NotImplementedError

    def dependency_args(self, job_id: str) -> list[str]:
        raise NotImplementedError


class _Slurm(Scheduler):
    def header(self, job_name, cores, memory_gib, time_limit, log_dir, queue, account, array,
               ranks):
        d = self.directive
        lines = [f"{d} --job-name={job_name}", f"{d} --ntasks={ranks}",
                 f"{d} --cpus-per-task={cores}", f"{d} --mem={memory_gib * ranks}G",
                 f"{d} --time={time_limit}"]
        if array is not None:
            lines += [f"{d} --array=0-{array - 1}", f"{d} --output={log_dir}/%x-%A_%a.out"]
        else:
            lines.append(f"{d} --output={log_dir}/%x-%j.out")
        if queue:
            lines.append(f"{d} --partition={queue}")
        if account:
            lines.append(f"{d} --account={account}")
        return lines

    def dependency_args(self, job_id):
        return [f"--dependency=afterok:{job_id}"]


class _Pbs(Scheduler):
    def header(self, job_name, cores, memory_gib, time_limit, log_dir, queue, account, array,
               ranks):
        d = self.directive
        lines = [f"{d} -N {job_name}",
                 f"{d} -l select={ranks}:ncpus={cores}:mpiprocs=1:mem={memory_gib}gb",
                 f"{d} -l walltime={time_limit}", f"{d} -j oe", f"{d} -o {log_dir}"]
        if array is not None:
            lines.append(f"{d} -J 0-{array - 1}")  # PBS Pro array syntax
        if queue:
            lines.append(f"{d} -q {queue}")
        if account:
            lines.append(f"{d} -A {account}")
        return lines

    def dependency_args(self, job_id):
        return ["-W", f"depend=afterok:{job_id}"]


SLURM = _Slurm("slurm", "sbatch", "#SBATCH", "SLURM_ARRAY_TASK_ID")
PBS = _Pbs("pbs", "qsub", "#PBS", "PBS_ARRAY_INDEX")
SCHEDULERS = {"slurm": SLURM, "pbs": PBS}


@dataclass
class JobScript:
    name: str
    path: Path
    text: str
    depends_on: str | None = None  # name of the script this one waits for (afterok)
    job_id: str | None = None


@dataclass
class JobPlan:
    scheduler: str
    scripts: list[JobScript] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    submitted: bool = False

    def describe(self) -> str:
        lines = []
        for script in self.scripts:
            after = f" (after {script.depends_on} succeeds)" if script.depends_on else ""
            state = f"submitted as job {script.job_id}" if script.job_id else "written"
            lines.append(f"{script.name}: {script.path} {state}{after}")
        lines += [f"  {note}" for note in self.notes]
        if not self.submitted:
            lines.append("dry run: nothing submitted")
        return "\n".join(lines)


def _time_text(seconds: float) -> str:
    seconds = int(math.ceil(seconds))
    return f"{seconds // 3600:02d}:{seconds % 3600 // 60:02d}:{seconds % 60:02d}"


def _seconds(text: str) -> int:
    hours, minutes, seconds = (int(part) for part in text.split(":"))
    return 3600 * hours + 60 * minutes + seconds


def _requests(config: Config, per_task: list[Config]) -> tuple[int, int, str, list[str]]:
    """(ranks, memory GiB per rank, time limit, notes) from the largest task's estimate."""
    from pipeline.estimate import resource_numbers
    from pipeline.models import build_model

    numbers = max((resource_numbers(build_model(c.model), c) for c in per_task),
                  key=lambda n: n["total_bytes"])
    total_gib = numbers["total_bytes"] * MEMORY_FACTOR / 2**30
    distributed = config.solve.backend == "slepc"
    settings = config.cluster
    if settings.ranks:
        ranks = settings.ranks
    elif distributed:
        ranks = max(1, math.ceil(total_gib / settings.memory))
    else:
        ranks = 1
    if ranks > 1 and not distributed:
        raise GaplineError(f"cluster.ranks: {ranks} ranks need solve.backend = 'slepc'; the "
                           f"{config.solve.backend!r} backend runs on one process")
    memory = max(MIN_MEMORY_GIB, math.ceil(total_gib / ranks))
    if "walltime" in config.raw.get("cluster", {}):
        limit = settings.walltime
    else:
        limit = _time_text(max(MIN_SECONDS, TIME_FACTOR * numbers["seconds"]))
    notes = [f"estimate (largest task): {numbers['states']} states, {numbers['nonzeros']} "
             f"nonzeros, {numbers['method']}, {numbers['total_bytes'] / 2**30:.2f} GiB, about "
             f"{numbers['seconds']:.0f} s; requested {ranks} rank(s) x {memory} GiB, {limit}"]
    return ranks, memory, limit, notes


def render_jobs(config: Config, config_path: str | Path, scheduler: str,
                store: str | None = None, jobs_dir: str | Path | None = None,
                overrides: list[str] | tuple[str, ...] = ()) -> JobPlan:
    """Write the scripts (see the module docstring) into ``jobs_dir``; submit nothing."""
    if scheduler not in SCHEDULERS:
        raise GaplineError(f"--scheduler: expected one of {', '.join(SCHEDULERS)}, got "
                           f"{scheduler!r}")
    kind = SCHEDULERS[scheduler]
    store_path = Path(store or config.store.path).resolve()
    config_path = Path(config_path).resolve()
    name = config.sweep.name if config.sweep is not None else config.run.name
    jobs = Path(jobs_dir) if jobs_dir else Path(f"{store_path}.jobs") / name
    jobs = jobs.resolve()
    jobs.mkdir(parents=True, exist_ok=True)
    python = shlex.quote(sys.executable)
    sets = "".join(f" --set {shlex.quote(item)}" for item in overrides)
    base = f"{python} -m pipeline"
    quoted_config, quoted_store = shlex.quote(str(config_path)), shlex.quote(str(store_path))
    template = _Template(TEMPLATE.read_text(encoding="utf-8"))
    plan = JobPlan(scheduler=scheduler)
    settings = config.cluster

    def script(file_name: str, label: str, job_name: str, command: str, cores: int,
               memory: int, limit: str, ranks: int, array: int | None = None,
               depends_on: str | None = None) -> None:
        header = kind.header(job_name, cores, memory, limit, jobs, settings.queue,
                             settings.account, array, ranks)
        text = template.substitute(kind=label, header="\n".join(header), threads=cores,
                                   project_dir=str(REPO), work_dir=str(jobs), command=command)
        path = jobs / file_name
        path.write_text(text, encoding="utf-8")
        path.chmod(0o755)
        plan.scripts.append(JobScript(file_name, path, text, depends_on=depends_on))

    if config.sweep is not None:
        from pipeline.sweep import expand_sweep

        tasks = expand_sweep(config)
        ranks, memory, limit, notes = _requests(config, [t.config for t in tasks])
        if ranks > 1:
            raise GaplineError("cluster.ranks: sweep tasks run on one process each; fix: "
                               "leave cluster.ranks = 0 with a one-process backend")
        plan.notes += notes + [f"{len(tasks)} array tasks"]
        command = (f"{base} sweep-task {quoted_config} --index \"${kind.array_index}\" "
                   f"--store {quoted_store}{sets}")
        script("sweep-array.sh", f"job array of sweep {name} ({len(tasks)} tasks)",
               f"{name}-tasks", command, settings.cores, memory, limit, 1, array=len(tasks))
        script("collect.sh", f"collect sweep {name}", f"{name}-collect",
               f"{base} collect {quoted_store} {shlex.quote(name)}", 1, MIN_MEMORY_GIB,
               _time_text(MIN_SECONDS), 1, depends_on="sweep-array.sh")
    else:
        ranks, memory, limit, notes = _requests(config, [config])
        plan.notes += notes
        command = f"{base} run {quoted_config} --store {quoted_store}{sets}"
        if ranks > 1:
            command = f"mpiexec -n {ranks} {command}"
        script("run.sh", f"run {name} ({ranks} rank(s))", name, command, settings.cores,
               memory, limit, ranks)
    return plan


def submit(config: Config, config_path: str | Path, scheduler: str, store: str | None = None,
           jobs_dir: str | Path | None = None, dry_run: bool = False,
           overrides: list[str] | tuple[str, ...] = ()) -> JobPlan:
    """Render the scripts and, unless ``dry_run``, submit them in order with dependencies."""
    plan = render_jobs(config, config_path, scheduler, store, jobs_dir, overrides)
    if dry_run:
        return plan
    kind = SCHEDULERS[scheduler]
    if shutil.which(kind.submit_command) is None:
        raise BackendError(f"--scheduler {scheduler}: '{kind.submit_command}' not found on "
                           "PATH; fix: run on the cluster's login node, or use --dry-run")
    if config.sweep is not None:
        from pipeline.store import Store
        from pipeline.sweep import record_sweep, sweep_tasks

        target = Store(store or config.store.path, create=True)
        record_sweep(target, config, sweep_tasks(config, target))  # before any task runs
    ids: dict[str, str] = {}
    for job in plan.scripts:
        args = [kind.submit_command]
        if scheduler == "slurm":
            args.append("--parsable")
        if job.depends_on:
            args += kind.dependency_args(ids[job.depends_on])
        args.append(str(job.path))
        result = subprocess.run(args, capture_output=True, text=True, check=False,
                                cwd=job.path.parent)
        if result.returncode != 0:
            message = " ".join((result.stderr or result.stdout).split())
            raise BackendError(f"{kind.submit_command} {job.name}: failed ({message})")
        job.job_id = result.stdout.strip().split(";")[0]
        ids[job.name] = job.job_id
    plan.submitted = True
    return plan

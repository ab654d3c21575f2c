"""Batch scripts (rendered text), the dask-jobqueue job script, and a real one-node SLURM:
a sweep submitted as a job array plus a dependent collect job."""

from __future__ import annotations

import re

import numpy as np
import pytest
import xarray as xr

from pipeline.config import load_config
from pipeline.errors import GaplineError
from pipeline.submit import render_jobs

from .conftest import run_cli, write_config
from .slurm_cluster import SlurmUnavailableError, start_local_slurm
from .test_sweep import SIZES, ring_gap, sweep_config

BIG = """\
[run]
name = "bigrun"

[model]
type = "lattice"
size = [2000, 2000]

[solve]
modes = 8
backend = "{backend}"

[cluster]
memory = 2.0
queue = "long"
account = "proj7"
"""


def _directives(text: str, prefix: str) -> list[str]:
    return [line[len(prefix):].strip() for line in text.splitlines() if line.startswith(prefix)]


def test_slurm_sweep_scripts(tmp_path):
    config = load_config(sweep_config(tmp_path))
    plan = render_jobs(config, sweep_config(tmp_path), "slurm", store=str(tmp_path / "s.zarr"))
    array, collect = plan.scripts
    assert (array.name, collect.name, collect.depends_on) == ("sweep-array.sh", "collect.sh",
                                                              "sweep-array.sh")
    directives = _directives(array.text, "#SBATCH")
    assert f"--array=0-{len(SIZES) - 1}" in directives
    assert "--ntasks=1" in directives
    assert re.search(r'sweep-task \S+ --index "\$SLURM_ARRAY_TASK_ID" --store \S+s\.zarr',
                     array.text)
    assert re.search(r"collect \S+s\.zarr ringsweep$", collect.text, re.MULTILINE)
    assert array.path.read_text() == array.text and array.path.stat().st_mode & 0o100
    assert "@{" not in array.text  # every slot filled


def test_pbs_sweep_scripts(tmp_path):
    config = load_config(sweep_config(tmp_path))
    array, collect = render_jobs(config, sweep_config(tmp_path), "pbs",
                                   jobs_dir=tmp_path / "jobs").scripts
    directives = _directives(array.text, "#PBS")
    assert f"-J 0-{len(SIZES) - 1}" in directives
    assert '--index "$PBS_ARRAY_INDEX"' in array.text


def test_mpi_job_takes_ranks_and_memory_from_the_estimate(tmp_path):
    from pipeline.estimate import resource_numbers
    from pipeline.models import build_model

    path = write_config(tmp_path, "big", BIG.format(backend="slepc"))
    config = load_config(path)
    (job,) = render_jobs(config, path, "slurm", jobs_dir=tmp_path / "jobs").scripts
    numbers = resource_numbers(build_model(config.model), config)
    # 2000 x 2000 torus: CSR of 2e7 nonzeros plus an Arnoldi basis of up to 801 vectors.
    ranks = int(np.ceil(numbers["total_bytes"] * 1.5 / 2**30 / 2.0))
    directives = _directives(job.text, "#SBATCH")
    assert f"--ntasks={ranks}" in directives and ranks > 1
    assert f"mpiexec -n {ranks} " in job.text
    assert "--partition=long" in directives and "--account=proj7" in directives
    memory = int(next(d for d in directives if d.startswith("--mem=")).removeprefix("--mem=")
                 .removesuffix("G"))
    assert memory >= numbers["total_bytes"] * 1.5 / 2**30  # the whole estimate is requested
    (pbs_job,) = render_jobs(config, path, "pbs", jobs_dir=tmp_path / "jobs").scripts
    assert f"-l select={ranks}:ncpus=1:mpiprocs=1:mem=" in pbs_job.text


def test_one_process_backend_cannot_take_ranks(tmp_path):
    path = write_config(tmp_path, "big", BIG.format(backend="scipy") + "ranks = 4\n")
    with pytest.raises(GaplineError, match="cluster.ranks: 4 ranks need solve.backend"):
        render_jobs(load_config(path), path, "slurm", jobs_dir=tmp_path / "jobs")
    (job,) = render_jobs(load_config(write_config(tmp_path, "one", BIG.format(
        backend="scipy"))), tmp_path / "one.toml", "slurm", jobs_dir=tmp_path / "jobs").scripts
    assert "--ntasks=1" in job.text and "mpiexec" not in job.text


def test_dry_run_command(tmp_path):
    path = sweep_config(tmp_path)
    result = run_cli("submit", path, "--scheduler", "slurm", "--dry-run", "--store", "s.zarr",
                     cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "dry run: nothing submitted" in result.stdout
    assert not (tmp_path / "s.zarr").exists()


def test_jobqueue_slurm_job_script(tmp_path):
    from pipeline.cluster import jobqueue_cluster

    path = sweep_config(tmp_path, extra="")
    text = path.read_text().replace("workers = 2", 'workers = 2\nscheduler = "slurm"\n'
                                    'cores = 2\nmemory = 3.0\nwalltime = "00:20:00"\n'
                                    'queue = "short"')
    path.write_text(text)
    config = load_config(path)
    cluster = jobqueue_cluster(config.cluster, log_directory=tmp_path)
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    directives = _directives(script, "#SBATCH")
    assert "--cpus-per-task=2" in directives
    assert "-t 00:20:00" in directives
    assert "-p short" in directives
    assert any(d.startswith("--mem=3") for d in directives)
    assert "export OMP_NUM_THREADS=2" in script
    assert "export PYTHONPATH=" in script


@pytest.fixture(scope="module")
def slurm(tmp_path_factory):
    try:
        cluster = start_local_slurm(tmp_path_factory.mktemp("slurm"))
    except SlurmUnavailableError as reason:
        pytest.skip(f"no local SLURM: {reason}")
    yield cluster
    cluster.stop()


@pytest.mark.slow
def test_sweep_on_real_slurm(slurm, tmp_path):
    path = sweep_config(tmp_path, sweep="slurmsweep")
    result = run_cli("submit", path, "--scheduler", "slurm", "--store", "s.zarr",
                     cwd=tmp_path, env_extra=slurm.env)
    assert result.returncode == 0, result.stderr
    ids = re.findall(r"submitted as job (\d+)", result.stdout)
    assert len(ids) == 2, result.stdout
    slurm.wait_for_jobs(ids)
    assert set(slurm.job_states(ids[0])) == {"COMPLETED"}, slurm.run("scontrol", "show",
                                                                     "job", ids[0]).stdout
    assert slurm.job_states(ids[1]) == ["COMPLETED"]
    ds = xr.open_zarr(str(tmp_path / "s.zarr"), group="_sweeps/slurmsweep/collected",
                      consolidated=False)
    assert list(ds["status"].values) == ["complete"] * len(SIZES)
    np.testing.assert_allclose(ds["gap"].values, ring_gap(SIZES), rtol=1e-9)
    fit = ds.attrs["gap_fit"]  # as on the local dask cluster (test_sweep.py)
    assert abs(fit["z"] - 2) <= 3 * fit["z_stderr"] and fit["z_stderr"] < 1e-3
    logs = sorted(tmp_path.glob("s.zarr.jobs/slurmsweep/slurmsweep-tasks-*.out"))
    assert len(logs) == len(SIZES)


@pytest.mark.slow
def test_dask_jobqueue_sweep_on_real_slurm(slurm, tmp_path):
    # [cluster] scheduler = "slurm": the dask workers are SLURM jobs (dask-jobqueue).
    sizes = SIZES[:3]
    path = sweep_config(tmp_path, sweep="jqsweep", lines=f'grid = {{ "model.size" = {sizes} }}',
                        workers=1)
    path.write_text(path.read_text().replace("workers = 1", 'workers = 1\nscheduler = "slurm"\n'
                                             'walltime = "00:10:00"\nmemory = 2.0'))
    result = run_cli("sweep", path, "--store", "s.zarr", cwd=tmp_path, env_extra=slurm.env,
                     timeout=300)
    assert result.returncode == 0, result.stdout + result.stderr
    assert f"{len(sizes)} to run on slurm" in result.stdout
    ds_result = run_cli("collect", tmp_path / "s.zarr", "jqsweep", cwd=tmp_path)
    assert ds_result.returncode == 0, ds_result.stderr
    ds = xr.open_zarr(str(tmp_path / "s.zarr"), group="_sweeps/jqsweep/collected",
                      consolidated=False)
    np.testing.assert_allclose(ds["gap"].values, ring_gap(sizes), rtol=1e-9)
    worker_logs = list((tmp_path / "s.zarr.jobs" / "jqsweep").glob("*.err")) + list(
        (tmp_path / "s.zarr.jobs" / "jqsweep").glob("*.out"))
    assert worker_logs, "no SLURM job ran the dask worker"


def test_jobqueue_pbs_job_script(tmp_path):
    from pipeline.cluster import jobqueue_cluster

    path = sweep_config(tmp_path)
    path.write_text(path.read_text().replace("workers = 2", 'workers = 1\nscheduler = "pbs"\n'
                                             'cores = 4\naccount = "proj7"'))
    cluster = jobqueue_cluster(load_config(path).cluster)
    try:
        script = cluster.job_script()
    finally:
        cluster.close()
    directives = _directives(script, "#PBS")
    assert any(d.startswith("-l select=1:ncpus=4") for d in directives)
    assert "-A proj7" in directives
    assert "export OMP_NUM_THREADS=4" in script


def test_sweep_task_index_out_of_range(tmp_path):
    from .conftest import assert_one_line_user_error

    path = sweep_config(tmp_path)
    result = run_cli("sweep-task", path, "--index", "5", "--store", "s.zarr", cwd=tmp_path)
    line = assert_one_line_user_error(result)
    assert f"tasks 0..{len(SIZES) - 1}, got 5" in line


def test_check_lists_the_sweep(tmp_path):
    result = run_cli("check", sweep_config(tmp_path), cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert (f"sweep ringsweep: {len(SIZES)} tasks, runs ringsweep.size-32 .. "
            "ringsweep.size-512") in result.stdout

"""Under a real ``mpiexec -n 2`` the one-process backend refuses with one line per rank,
instead of running the same job twice (common practice: MPI launchers export the world size,
OMPI_COMM_WORLD_SIZE for Open MPI)."""

import os
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

CONFIGS = Path(__file__).resolve().parents[1] / "configs"
MPIEXEC = shutil.which("mpiexec")


@pytest.mark.skipif(MPIEXEC is None, reason="mpiexec is not installed (make installs openmpi-bin)")
def test_scipy_backend_refuses_to_run_duplicated_under_mpiexec(tmp_path):
    command = [MPIEXEC, "-n", "2"]
    if os.geteuid() == 0:
        command += ["--allow-run-as-root"]
    command += ["--oversubscribe", sys.executable, "-m", "pipeline", "run",
                str(CONFIGS / "demo.toml"), "--store", str(tmp_path / "s.zarr"),
                "--set", 'solve.backend="scipy"']
    env = dict(os.environ, GAPLINE_PROGRESS="off", OMPI_MCA_rmaps_base_oversubscribe="1")
    result = subprocess.run(command, capture_output=True, text=True, env=env, timeout=120)
    assert result.returncode != 0
    errors = [line for line in result.stderr.splitlines() if line.startswith("gapline: error:")]
    # mpiexec may stop the second rank once the first has failed: one or two lines.
    assert 1 <= len(errors) <= 2, result.stderr
    assert all("2 MPI ranks" in line for line in errors)
    assert "Traceback" not in result.stderr
    assert not (tmp_path / "s.zarr").exists()  # refused before touching the store


@pytest.mark.parametrize("given, expected", [(None, "1"), ("2", "2")])
def test_one_blas_thread_per_rank_under_a_launcher(given, expected):
    """With a world size > 1 in the environment (what mpiexec exports), importing the
    package sets one BLAS thread per rank unless the user chose a number."""
    env = {key: value for key, value in os.environ.items()
           if key not in ("OPENBLAS_NUM_THREADS", "OMP_NUM_THREADS")}
    env["OMPI_COMM_WORLD_SIZE"] = "2"
    if given is not None:
        env["OPENBLAS_NUM_THREADS"] = given
    code = "import os, pipeline; print(os.environ['OPENBLAS_NUM_THREADS'])"
    result = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True,
                            env=env, cwd=Path(__file__).resolve().parents[1], timeout=60)
    assert result.stdout.strip() == expected, result.stderr

"""The slepc backend under a real ``mpiexec -n 2``: the same numbers as on one rank and as
the scipy backend (to 1e-9), the published spectra (through ``verify``), stores written in
whole chunks per rank, provenance, and errors that reach every rank (no hang)."""

from __future__ import annotations

import os
import shutil
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import zarr

from pipeline.parallel import ownership_ranges, state_chunk

from .conftest import multiset_distance, write_config

MPIEXEC = shutil.which("mpiexec")
REPO = Path(__file__).resolve().parents[1]
pytestmark = [
    pytest.mark.skipif(MPIEXEC is None, reason="mpiexec is not installed (make installs "
                       "openmpi-bin)"),
    pytest.mark.slow,
]

# name: (lattice fields, modes). Sources of the exact spectra: ring and chain formulas
# (Gray 2006, Toeplitz and Circulant Matrices, eq. 3.7; reflecting chain 0 and
# -(u+v) + 2 sqrt(uv) cos(pi k/L), from memory), torus = their Kronecker sum (Horn and
# Johnson 1991, 4.4); verify compares with them (pipeline.analytic), checked below.
CASES = {
    "ring": ('size = 400\nforward = 1.3\nbackward = 0.4\n', 9),
    "chain": ('size = 200\nboundary = "reflecting"\nforward = 1.04\nbackward = 0.96\n', 8),
    "torus": ('size = [48, 48]\nforward = [1.0, 0.8]\nbackward = [0.6, 0.8]\n', 13),
    # Large enough (65536 states) for the coarse start from 4 x 4 blocks of sites: one
    # factorization at a test shift placed from the aggregated problem.
    "wide": ('size = [256, 256]\nforward = [1.0, 0.8]\nbackward = [0.6, 0.8]\n', 13),
    # Driven ring with random barriers: the balanced generator is not normal, so the
    # general Krylov–Schur path on W runs (no exact spectrum: compared across backends).
    "barriers": ('size = 300\nforward = 1.2\nbackward = 0.7\n[model.disorder]\n'
                 'on = "bonds"\nlow = 0.5\nhigh = 1.5\nseed = 7\n', 6),
}
# cases the scipy backend skips (its completeness certificate at this size takes minutes;
# the two slepc runs and the published spectrum, through verify, are compared instead)
SLEPC_ONLY = {"wide"}


def _config(directory: Path, name: str, backend: str) -> Path:
    fields, modes = CASES[name]
    text = (f'[run]\nname = "{name}"\n[model]\ntype = "lattice"\n{fields}'
            f'[solve]\nmodes = {modes}\nbackend = "{backend}"\nmethod = "shift-invert"\n'
            "vectors = true\n")
    return write_config(directory, f"{name}-{backend}", text)


def _run(config: Path, store: Path, ranks: int) -> subprocess.CompletedProcess:
    env = dict(os.environ, GAPLINE_PROGRESS="off", OMP_NUM_THREADS="1")
    for variable in ("OMPI_COMM_WORLD_SIZE", "PMI_SIZE", "PMIX_SIZE", "PMIX_RANK",
                     "MPI_LOCALNRANKS"):
        env.pop(variable, None)
    command = [sys.executable, "-m", "pipeline", "run", str(config), "--store", str(store)]
    if ranks > 1:
        launcher = [MPIEXEC, "-n", str(ranks), "--oversubscribe"]
        if os.geteuid() == 0:
            launcher.append("--allow-run-as-root")  # Open MPI refuses root otherwise
        command = launcher + command
    return subprocess.run(command, capture_output=True, text=True, env=env, timeout=300,
                          cwd=REPO)


@pytest.fixture(scope="module")
def stores(tmp_path_factory):
    """Every case run by scipy (1 process), slepc on 1 rank and slepc on 2 ranks."""
    directory = tmp_path_factory.mktemp("mpi")
    results = {}
    for name in CASES:
        for label, backend, ranks in (("scipy", "scipy", 1), ("slepc-1", "slepc", 1),
                                      ("slepc-2", "slepc", 2)):
            if label == "scipy" and name in SLEPC_ONLY:
                continue
            store = directory / f"{name}-{label}.zarr"
            outcome = _run(_config(directory, name, backend), store, ranks)
            assert outcome.returncode == 0, outcome.stderr[-3000:]
            results[name, label] = zarr.open_group(str(store / name), mode="r")
    return results


@pytest.mark.parametrize("name", list(CASES))
@pytest.mark.parametrize("label", ["slepc-1", "scipy"])
def test_two_ranks_give_the_same_eigenvalues(stores, name, label):
    if (name, label) not in stores:
        pytest.skip("the scipy backend does not run this size here")
    two = stores[name, "slepc-2"]
    other = stores[name, label]
    norm1 = float(two["assemble"].attrs["norm1"])
    distance = multiset_distance(two["spectrum/eigenvalues"][:],
                                 other["spectrum/eigenvalues"][:])
    assert distance <= 1e-9 * norm1


@pytest.mark.parametrize("name", list(CASES))
@pytest.mark.parametrize("label", ["slepc-1", "scipy"])
def test_two_ranks_give_the_same_stationary_law(stores, name, label):
    if (name, label) not in stores:
        pytest.skip("the scipy backend does not run this size here")
    two = stores[name, "slepc-2"]["stationary/distribution"][:]
    other = stores[name, label]["stationary/distribution"][:]
    assert np.abs(two - other).sum() <= 1e-9


@pytest.mark.parametrize("name", list(CASES))
def test_two_ranks_give_the_same_eigenvectors(stores, name):
    """Equal invariant subspaces per group of equal eigenvalues: the largest principal
    angle (Golub and Van Loan 2013, Matrix Computations, 6.4.3) is ~0."""
    two, one = stores[name, "slepc-2"], stores[name, "slepc-1"]
    values = two["spectrum/eigenvalues"][:]
    norm1 = float(two["assemble"].attrs["norm1"])
    a, b = two["spectrum/vectors"][:], one["spectrum/vectors"][:]
    other_values = one["spectrum/eigenvalues"][:]
    for value in np.unique(np.round(values, 9)):  # a loop over groups of modes
        mine = np.abs(values - value) <= 1e-8 * norm1
        theirs = np.abs(other_values - value) <= 1e-8 * norm1
        if mine.sum() != theirs.sum():
            continue  # a group cut at the requested count can differ in which copy is kept
        qa, _ = np.linalg.qr(a[:, mine])
        qb, _ = np.linalg.qr(b[:, theirs])
        cosines = np.linalg.svd(qa.conj().T @ qb, compute_uv=False)
        assert cosines.min() >= 1 - 1e-8


@pytest.mark.parametrize("name", list(CASES))
def test_two_rank_runs_verify_against_the_published_spectra(stores, name):
    verify = dict(stores[name, "slepc-2"]["verify"].attrs)
    assert verify["passed"]
    names = {check["name"] for check in verify["checks"]}
    if name != "barriers":
        assert "spectrum.slowest_set" in names and "stationary.exact" in names
    spectrum = dict(stores[name, "slepc-2"]["spectrum"].attrs)
    assert spectrum["certified"] is True


def test_the_search_path_follows_normality(stores):
    paths = {name: dict(stores[name, "slepc-2"]["spectrum"].attrs)["search"] for name in CASES}
    assert paths == {"ring": "symmetric part", "chain": "symmetric part",
                     "torus": "symmetric part", "wide": "symmetric part",
                     "barriers": "general"}


@pytest.mark.parametrize("label", ["slepc-1", "slepc-2"])
def test_large_tori_start_from_the_aggregated_problem(stores, label):
    rounds = dict(stores["wide", label]["spectrum"].attrs)["rounds"]
    assert rounds[0]["start"].startswith("aggregated")
    assert rounds[0]["coarse_start"]["outcome"] == "certified"
    assert rounds[0]["factorizations"] == 1


@pytest.mark.parametrize("name", list(CASES))
def test_ranks_write_whole_chunks_they_own(stores, name):
    group = stores[name, "slepc-2"]
    n = int(group["assemble"].attrs["n_states"])
    chunk = state_chunk(n, 2)
    distribution = group["stationary/distribution"]
    assert distribution.chunks == (chunk,)
    for start, stop in ownership_ranges(n, 2):  # each rank's rows are whole chunks
        assert start % chunk == 0 and (stop % chunk == 0 or stop == n)
    assert chunk % group["spectrum/vectors"].chunks[0] == 0
    assert group["assemble"].attrs["ownership_ranges"] == [list(r) for r in
                                                           ownership_ranges(n, 2)]


def test_provenance_records_ranks_method_and_memory(stores):
    general = dict(stores["barriers", "slepc-2"]["spectrum"].attrs)
    assert general["inner_solver"] == "direct" and general["pc_type"] == "lu"
    group = stores["torus", "slepc-2"]
    spectrum = dict(group["spectrum"].attrs)
    assert spectrum["backend"] == "slepc" and spectrum["ranks"] == 2
    assert spectrum["inner_solver"] == "direct" and spectrum["pc_type"] == "cholesky"
    assert spectrum["iterations"] >= 1 and spectrum["rounds"]
    assert len(spectrum["peak_memory_mib_per_rank"]) == 2
    run_attrs = dict(stores["torus", "slepc-2"].attrs)
    record = run_attrs["stages"]["solve"]
    assert record["ranks"] == 2 and len(record["peak_memory_mib_per_rank"]) == 2
    assert set(run_attrs["timings"]) >= {"assemble", "solve", "verify", "report"}


def test_an_error_in_one_ranks_rows_stops_every_rank(tmp_path):
    """A broken rate in the last rows (owned by rank 1) must end both ranks with the same
    one-line error, not leave rank 0 waiting in a collective."""
    launcher = [MPIEXEC, "-n", "2", "--oversubscribe"]
    if os.geteuid() == 0:
        launcher.append("--allow-run-as-root")
    script = REPO / "tests" / "mpi_broken_rows.py"
    env = dict(os.environ, GAPLINE_PROGRESS="off", PYTHONPATH=str(REPO))
    outcome = subprocess.run(launcher + [sys.executable, str(script), str(tmp_path)],
                             capture_output=True, text=True, env=env, timeout=120)
    written = sorted(path.name for path in tmp_path.glob("rank-*.txt"))
    assert written == ["rank-0.txt", "rank-1.txt"], outcome
    messages = {(tmp_path / name).read_text() for name in written}
    assert len(messages) == 1 and "no error" not in messages, messages


def test_a_bad_config_under_mpiexec_is_one_line(tmp_path):
    config = write_config(tmp_path, "bad", '[run]\nname = "bad"\n[model]\ntype = "lattice"\n'
                          'size = 10\n[solve]\nbackend = "slepc"\ninner = "gmres"\n')
    outcome = _run(config, tmp_path / "s.zarr", 2)
    assert outcome.returncode == 2
    # One line from gapline (rank 0 speaks for all); the rest is mpiexec's own abort notice.
    errors = [line for line in outcome.stderr.splitlines() if line.startswith("gapline")]
    assert len(errors) == 1 and errors[0].startswith("gapline: error: solve.inner"), errors
    assert "Traceback" not in outcome.stderr


def test_stored_generator_written_and_read_by_two_ranks(tmp_path):
    """store.matrix under mpiexec -n 2: each rank writes its rows (rank after rank); the CSR
    equals the one-process assembly, and a rerun of solve on 2 ranks reads it back."""
    config = _config(tmp_path, "torus", "slepc")
    two = tmp_path / "two.zarr"
    one = tmp_path / "one.zarr"
    env_set = ["--set", "store.matrix=true"]
    outcome = _run_with(config, two, 2, env_set)
    assert outcome.returncode == 0, outcome.stderr[-2000:]
    reference = _run_with(_config(tmp_path, "torus", "scipy"), one, 1, env_set)
    assert reference.returncode == 0, reference.stderr[-2000:]
    a = zarr.open_group(str(two / "torus" / "matrix"), mode="r")
    b = zarr.open_group(str(one / "torus" / "matrix"), mode="r")
    import scipy.sparse as sp

    n = int(a.attrs["n_states"])
    matrices = [sp.csr_matrix((g["data"][:], g["indices"][:], g["indptr"][:]), shape=(n, n))
                for g in (a, b)]
    np.testing.assert_array_equal(a["indptr"][:], b["indptr"][:])  # the same rows
    assert abs(matrices[0] - matrices[1]).max() == 0  # the same entries (order within a row
    # may differ: PETSc keeps column indices sorted)
    rerun = _run_with(config, two, 2, [*env_set, "--from", "solve"], progress="plain")
    assert rerun.returncode == 0, rerun.stderr[-2000:]
    assert "reading the stored generator" in rerun.stderr


def _run_with(config: Path, store: Path, ranks: int, extra: list[str],
              progress: str = "off") -> subprocess.CompletedProcess:
    env = dict(os.environ, GAPLINE_PROGRESS=progress, OMP_NUM_THREADS="1")
    command = [sys.executable, "-m", "pipeline", "run", str(config), "--store", str(store),
               *extra]
    if ranks > 1:
        command = [MPIEXEC, "-n", str(ranks), "--oversubscribe",
                   *(["--allow-run-as-root"] if os.geteuid() == 0 else []), *command]
    return subprocess.run(command, capture_output=True, text=True, env=env, timeout=300,
                          cwd=REPO)


def test_analysis_on_two_ranks_then_again_on_one_process(tmp_path):
    """analyze runs on 2 ranks (each its own rows): the entropy production of the biased
    ring is (u - v) ln(u/v) per unit time (Schnakenberg 1976, Rev. Mod. Phys. 48, 571);
    `--from analyze` on one process over the same store gives the same currents."""
    config = _config(tmp_path, "ring", "slepc")
    store = tmp_path / "s.zarr"
    first = _run_with(config, store, 2, [])
    assert first.returncode == 0, first.stderr[-2000:]
    two = zarr.open_group(str(store / "ring" / "analysis"), mode="r")
    currents = dict(two.attrs)["currents"]
    assert dict(two.attrs)["ranks"] == 2
    np.testing.assert_allclose(currents["entropy_production"],
                               (1.3 - 0.4) * np.log(1.3 / 0.4), rtol=1e-10)
    flux, current = two["channel_flux"][:], two["channel_current"][:]
    again = _run_with(config, store, 1, ["--from", "analyze"])
    assert again.returncode == 0, again.stderr[-2000:]
    one = zarr.open_group(str(store / "ring" / "analysis"), mode="r")
    assert dict(one.attrs)["ranks"] == 1
    np.testing.assert_allclose(one["channel_flux"][:], flux, rtol=1e-12)
    np.testing.assert_allclose(one["channel_current"][:], current, rtol=1e-12)
    np.testing.assert_allclose(dict(one.attrs)["currents"]["entropy_production"],
                               currents["entropy_production"], rtol=1e-12)


@pytest.mark.parametrize("name", list(CASES))
def test_two_rank_currents_equal_scipy(stores, name):
    if (name, "scipy") not in stores:
        pytest.skip("the scipy backend does not run this size here")
    two, one = stores[name, "slepc-2"]["analysis"], stores[name, "scipy"]["analysis"]
    scale = float(np.abs(one["channel_flux"][:]).max())
    for array in ("channel_flux", "channel_current"):
        assert np.abs(two[array][:] - one[array][:]).max() <= 1e-9 * scale
    a, b = (dict(group.attrs)["currents"] for group in (two, one))
    assert a["entropy_production"] == pytest.approx(b["entropy_production"], rel=1e-9,
                                                    abs=1e-12)

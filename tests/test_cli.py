"""The command line, run as a subprocess (python -m pipeline)."""

from __future__ import annotations

import re

import numpy as np
import pytest

from pipeline.config import describe_schema

from .conftest import (
    assert_one_line_user_error,
    norm1,
    reference_generator,
    ring_config,
    run_cli,
    slowest_first,
    tolerance_for,
    write_config,
)

RUN = "cli-ring"
SIZE = 40
MODES = 5
MODE_LINE = re.compile(r"^\s+(\d+)\s+(\S+)\s+(\S+)\s+(\S+)$")


@pytest.fixture(scope="module")
def finished(tmp_path_factory):
    """One full run shared by the read-only tests: (directory, config, store, result)."""
    directory = tmp_path_factory.mktemp("cli")
    config = ring_config(directory, RUN, SIZE, MODES)
    result = run_cli("run", config, "--store", "store.zarr", cwd=directory)
    return directory, config, directory / "store.zarr", result


def test_run_end_to_end(finished):
    _, _, store, result = finished
    assert result.returncode == 0, result.stderr
    assert f"run {RUN}" in result.stdout
    assert "verify: PASSED" in result.stdout
    assert store.is_dir()


def test_show_lists_the_run(finished):
    directory, _, store, _ = finished
    result = run_cli("show", store, cwd=directory)
    assert result.returncode == 0, result.stderr
    rows = [line for line in result.stdout.splitlines() if line.startswith(RUN)]
    assert len(rows) == 1
    assert "passed" in rows[0]
    assert str(SIZE) in rows[0].split()


def test_show_run_prints_modes_and_checks(finished):
    directory, _, store, _ = finished
    result = run_cli("show", store, RUN, cwd=directory)
    assert result.returncode == 0, result.stderr
    printed = []
    for line in result.stdout.splitlines():
        match = MODE_LINE.match(line)
        if match:
            printed.append(complex(float(match.group(2)), float(match.group(3))))
    assert len(printed) == MODES
    # The printed modes are the dense eigenvalues of the ring (numpy.linalg.eigvals of the
    # reference generator), slowest first, to the 10 printed digits.
    W = reference_generator((SIZE,), ("periodic",), (1.3,), (0.4,))
    truth = slowest_first(np.linalg.eigvals(W), tolerance_for(W))[:MODES]
    np.testing.assert_allclose(np.array(printed), truth, atol=1e-9 * norm1(W))
    for check in ("generator.conservation", "spectrum.residuals", "spectrum.slowest_set",
                  "spectrum.completeness", "stationary.exact"):
        assert re.search(rf"^\s+ok\s+{re.escape(check)}\s", result.stdout, re.MULTILINE), check
    assert "verify: PASSED" in result.stdout


def test_check_prints_states_and_nonzeros(tmp_path):
    text = """\
[model]
type = "lattice"
size = [6, 5, 4]
boundary = ["periodic", "reflecting", "absorbing"]
forward = [1.0, 0.0, 0.9]
backward = [0.7, 0.8, 1.1]
"""
    config = write_config(tmp_path, "cube", text)
    result = run_cli("check", config, cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    W = reference_generator((6, 5, 4), ("periodic", "reflecting", "absorbing"),
                            (1.0, 0.0, 0.9), (0.7, 0.8, 1.1))
    nonzeros = np.count_nonzero(W - np.diag(np.diag(W))) + W.shape[0]
    assert re.search(r"^\s+states\s+120$", result.stdout, re.MULTILINE), result.stdout
    assert re.search(rf"^\s+nonzeros\s+{nonzeros}$", result.stdout, re.MULTILINE), result.stdout
    assert not list(tmp_path.glob("*.zarr")), "check must not create a store"


BAD_CONFIGS = {
    "unknown field": ("mode = 3\n", [], "did you mean 'modes'"),
    "negative rate": ("", ["model.forward=[-2]"], "model.forward[0]: rate must be >= 0, got -2"),
    "zero size": ("", ["model.size=[0]"], "model.size[0]: sites per axis must be >= 2"),
    "invalid TOML": ("[solve\n", [], "invalid TOML"),
    "bad --set": ("", ["solve.modes"], "expected KEY=VALUE"),
    "bad --set index": ("", ["model.size[4]=3"], "out of range"),
}


@pytest.mark.parametrize("command", ["run", "check"])
@pytest.mark.parametrize("case", sorted(BAD_CONFIGS))
def test_bad_config_exits_2_with_one_line(tmp_path, case, command):
    extra, overrides, message = BAD_CONFIGS[case]
    config = ring_config(tmp_path, "bad", 10, 3)
    if extra:
        config.write_text(config.read_text() + extra)
    args = [command, config]
    for item in overrides:
        args += ["--set", item]
    line = assert_one_line_user_error(run_cli(*args, cwd=tmp_path))
    assert message in line
    assert not list(tmp_path.glob("*.zarr")), "a bad config must not create a store"


def test_unknown_stage(tmp_path):
    config = ring_config(tmp_path, "stage", 10, 3)
    line = assert_one_line_user_error(run_cli("run", config, "--from", "polish", cwd=tmp_path))
    assert "unknown stage 'polish'" in line


@pytest.mark.parametrize("command", ["run", "check"])
def test_missing_config_file(tmp_path, command):
    line = assert_one_line_user_error(run_cli(command, "nowhere.toml", cwd=tmp_path))
    assert "nowhere.toml" in line and "not found" in line


def test_show_missing_store(tmp_path):
    line = assert_one_line_user_error(run_cli("show", tmp_path / "none.zarr", cwd=tmp_path))
    assert "not found" in line


def test_show_missing_run(finished):
    directory, _, store, _ = finished
    line = assert_one_line_user_error(run_cli("show", store, "no-such-run", cwd=directory))
    assert "no-such-run" in line and RUN in line


@pytest.mark.parametrize("name", [f"{RUN}/spectrum", f"{RUN}/..", "_staging", "zarr.json"])
def test_show_refuses_what_is_not_a_run(finished, name):
    # Only names a config can give (run.name) are runs: not a group inside a run, not the
    # store root, not the staging area.
    directory, _, store, _ = finished
    line = assert_one_line_user_error(run_cli("show", store, name, cwd=directory))
    assert "not in store" in line and RUN in line


ZARR_ARRAY = (
    '{"zarr_format": 3, "node_type": "array", "shape": [1], "data_type": "float64", '
    '"chunk_grid": {"name": "regular", "configuration": {"chunk_shape": [1]}}, '
    '"chunk_key_encoding": {"name": "default"}, "fill_value": 0.0, '
    '"codecs": [{"name": "bytes", "configuration": {"endian": "little"}}]}'
)


@pytest.mark.parametrize("command", ["show", "run"])
@pytest.mark.parametrize("metadata", [ZARR_ARRAY, "{"], ids=["zarr-array", "broken-json"])
def test_store_that_is_not_a_zarr_group(tmp_path, command, metadata):
    # A zarr v3 array (zarr v3 specification: node_type "array") or unreadable metadata where
    # the store should be: one line naming the store, not a zarr traceback.
    store = tmp_path / "other.zarr"
    store.mkdir()
    (store / "zarr.json").write_text(metadata)
    args = ["show", store] if command == "show" else [
        "run", ring_config(tmp_path, "x", 10, 3), "--store", store]
    line = assert_one_line_user_error(run_cli(*args, cwd=tmp_path))
    assert "other.zarr" in line


def test_unknown_command(tmp_path):
    assert_one_line_user_error(run_cli("frobnicate", cwd=tmp_path))


def test_impossible_tolerance_fails_verification(tmp_path):
    config = ring_config(tmp_path, "strict", SIZE, MODES)
    result = run_cli("run", config, "--store", "s.zarr", "--set", "verify.tolerance=1e-300",
                     cwd=tmp_path)
    assert result.returncode == 1, result.stderr
    assert "Traceback" not in result.stderr
    assert "verify: FAILED" in result.stdout
    assert "verification FAILED" in result.stderr


def test_only_report_and_from_verify_after_a_full_run(tmp_path):
    config = ring_config(tmp_path, RUN, SIZE, MODES)
    assert run_cli("run", config, "--store", "s.zarr", cwd=tmp_path).returncode == 0
    only = run_cli("run", config, "--store", "s.zarr", "--only", "report", cwd=tmp_path)
    assert only.returncode == 0, only.stderr
    assert f"run {RUN}" in only.stdout and "verify: PASSED" in only.stdout
    again = run_cli("run", config, "--store", "s.zarr", "--from", "verify", cwd=tmp_path)
    assert again.returncode == 0, again.stderr
    assert "verify: PASSED" in again.stdout
    # After changing solve settings, --from verify refuses (stale results) with one line.
    stale = run_cli("run", config, "--store", "s.zarr", "--from", "verify",
                    "--set", "solve.modes=7", cwd=tmp_path)
    line = assert_one_line_user_error(stale)
    assert "different config" in line


def test_schema_prints_the_reference(tmp_path):
    result = run_cli("schema", cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert result.stdout.strip() == describe_schema().strip()
    for field in ("size", "boundary", "forward", "backward", "modes", "max_search", "tolerance"):
        assert f"`{field}`" in result.stdout


def test_scipy_backend_refuses_to_run_duplicated_under_mpi(tmp_path):
    config = ring_config(tmp_path, "mpi", SIZE, MODES)
    result = run_cli("run", config, "--store", "s.zarr", cwd=tmp_path,
                     env_extra={"OMPI_COMM_WORLD_SIZE": "2"})
    line = assert_one_line_user_error(result)
    assert "MPI" in line and "scipy" in line


def test_lognormal_disorder_out_of_float_range_is_one_line(tmp_path):
    # exp(sigma z) for a standard normal z leaves the float64 range (about e^+-709; IEEE 754
    # double, common practice) at sigma = 1000 already for |z| > 0.71: most sites of a ring.
    extra = '[model.disorder]\non = "bonds"\nlaw = "lognormal"\nsigma = 1000.0\n'
    config = ring_config(tmp_path, "wild", 20, 3)
    config.write_text(config.read_text().replace("[solve]", extra + "\n[solve]"))
    line = assert_one_line_user_error(run_cli("run", config, "--store", "s.zarr", cwd=tmp_path))
    assert "model.disorder.sigma" in line

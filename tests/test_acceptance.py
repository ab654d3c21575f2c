"""Acceptance: the shipped configs run end to end through the command line and verify."""

from __future__ import annotations

import tomllib
from pathlib import Path

import numpy as np
import pytest
import zarr

from .conftest import chain_matrix, run_cli, slowest_first, submultiset_distance

CONFIGS = Path(__file__).parents[1] / "configs"
ACCEPTANCE = ["ring-2000.toml", "lattice-3d-mixed.toml"]
TOLERANCE = 1e-9


def _exact_slowest(model: dict, count: int) -> np.ndarray:
    """(slowest eigenvalues, ||W||_1) of the lattice from hand-built 1D generators: all sums
    of 1D eigenvalues (numpy.linalg.eigvals of each axis), as the spectrum of a Kronecker sum
    is (Horn and Johnson 1991, Topics in Matrix Analysis, 4.4)."""
    size = model["size"] if isinstance(model["size"], list) else [model["size"]]
    dims = len(size)

    def per_axis(name, default):
        value = model.get(name, default)
        return value if isinstance(value, list) else [value] * dims

    boundary = per_axis("boundary", "periodic")
    forward = per_axis("forward", 1.0)
    backward = per_axis("backward", 1.0)
    keep = count + 8
    sums = np.zeros(1, dtype=complex)
    for axis in range(dims):
        axis_values = np.linalg.eigvals(chain_matrix(size[axis], boundary[axis], forward[axis],
                                                     backward[axis]))
        # Enough per axis: a combined mode using an axis's k-th slowest value has k - 1
        # faster-or-equal partners, so count + 8 per axis covers the count slowest sums.
        axis_values = axis_values[np.argsort(-axis_values.real)][: keep]
        sums = (sums[:, None] + axis_values[None, :]).ravel()
    scale = 2 * sum(u + v for u, v in zip(forward, backward, strict=True))
    return slowest_first(sums, 1e-9 * scale), scale


@pytest.mark.slow
@pytest.mark.parametrize("name", ACCEPTANCE)
def test_shipped_config_runs_and_verifies(tmp_path, name):
    path = CONFIGS / name
    assert path.is_file(), f"{path} is missing"
    result = run_cli("run", path, "--store", tmp_path / "store.zarr",
                     "--set", f"verify.tolerance={TOLERANCE}", cwd=tmp_path, timeout=280)
    assert result.returncode == 0, result.stdout + result.stderr
    assert "verify: PASSED" in result.stdout
    config = tomllib.loads(path.read_text(encoding="utf-8"))
    run = config.get("run", {}).get("name", path.stem)
    root = zarr.open_group(str(tmp_path / "store.zarr"), mode="r")
    verify = dict(root[run]["verify"].attrs)
    assert verify["passed"] is True
    names = {check["name"] for check in verify["checks"]}
    assert {"spectrum.slowest_set", "spectrum.residuals", "spectrum.completeness"} <= names
    for check in verify["checks"]:
        assert check["passed"] is True, check
    assert root[run]["spectrum"].attrs["certified"] is True
    # Independently of the verify stage: the stored modes against the Kronecker sum of
    # dense 1D spectra.
    values = root[run]["spectrum"]["eigenvalues"][:]
    exact, scale = _exact_slowest(config["model"], values.size)
    tol = 1e-9 * scale
    last = values[-1].real
    # The stored modes are a sub-multiset of the exact slowest set (the count may cut the
    # last group), and every exact mode strictly slower than the last stored one is stored.
    candidates = exact[exact.real >= last - tol]
    assert submultiset_distance(values, candidates) <= TOLERANCE * scale
    for z in exact[exact.real > last + tol]:
        assert np.abs(values - z).min() <= TOLERANCE * scale, z


def test_acceptance_configs_exist():
    missing = [name for name in ACCEPTANCE if not (CONFIGS / name).is_file()]
    assert not missing, f"configs missing: {missing}"


def test_acceptance_configs_describe_their_scenario():
    ring = tomllib.loads((CONFIGS / "ring-2000.toml").read_text(encoding="utf-8"))["model"]
    assert ring["size"] in ([2000], 2000)
    assert ring.get("boundary", "periodic") in ("periodic", ["periodic"])
    cube = tomllib.loads((CONFIGS / "lattice-3d-mixed.toml").read_text(encoding="utf-8"))
    model = cube["model"]
    assert len(model["size"]) == 3
    assert set(model["boundary"]) == {"periodic", "reflecting", "absorbing"}


@pytest.mark.parametrize("path", sorted(CONFIGS.glob("*.toml")), ids=lambda p: p.name)
def test_every_config_passes_check(tmp_path, path):
    result = run_cli("check", path, cwd=tmp_path)
    assert result.returncode == 0, result.stderr
    assert "valid" in result.stdout
    assert "states" in result.stdout and "nonzeros" in result.stdout

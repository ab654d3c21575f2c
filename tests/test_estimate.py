"""Resource estimates of ``gapline check`` against what assembly builds."""

from __future__ import annotations

import pytest

from pipeline.backends.scipy_ import ScipyBackend
from pipeline.config import parse_config
from pipeline.estimate import estimate_resources
from pipeline.models import build_model

UNITS = {"B": 1, "KiB": 2**10, "MiB": 2**20, "GiB": 2**30, "TiB": 2**40}


def _config(size, **solve):
    raw = {"run": {"name": "estimate"}, "model": {"type": "lattice", "size": list(size)},
           "solve": {"backend": "scipy", **solve}}
    return parse_config(raw)


def _bytes(text: str) -> float:
    number, unit = text.split()
    return float(number) * UNITS[unit]


def _csr_bytes(nnz: int, n: int, index_bytes: int, pointer_bytes: int) -> int:
    # CSR storage: a float64 value and a column index per nonzero, n + 1 row pointers
    # (common practice; scipy.sparse.csr_matrix data/indices/indptr).
    return nnz * (8 + index_bytes) + (n + 1) * pointer_bytes


def test_matrix_estimate_equals_the_assembled_matrix():
    config = _config((30, 20))
    model = build_model(config.model)
    operator = ScipyBackend().assemble(model)
    estimate = _bytes(estimate_resources(model, config)["matrix (CSR)"])
    assert estimate == pytest.approx(operator.info["matrix_bytes"], rel=0.05)


@pytest.mark.parametrize(
    ("size", "index_bytes"),
    [
        # 1D, 5e8 sites: 3 nonzeros per row, 1.5e9 < 2^31 - 1 (int32 indices and pointers)
        ((500_000_000,), 4),
        # 8D, 1.28e8 sites: 17 nonzeros per row, 2.2e9 > 2^31 - 1 (int64 indices and pointers)
        ((2, 2, 2, 2, 2, 2, 2, 1_000_000), 8),
    ],
)
def test_matrix_estimate_uses_the_index_width_of_the_model(size, index_bytes):
    config = _config(size)
    model = build_model(config.model)
    # The model's own column indices, from one row (the matrix itself is never built here).
    assert model.row_block(0, 1).indices.dtype.itemsize == index_bytes
    expected = _csr_bytes(model.nnz_count(), model.n_states, index_bytes, index_bytes)
    estimate = _bytes(estimate_resources(model, config)["matrix (CSR)"])
    assert estimate == pytest.approx(expected, rel=0.05)


def test_method_shown_is_the_one_solve_uses_on_tiny_problems():
    # 4 states, 3 modes: Arnoldi returns at most n - 2 = 2, so solve runs dense.
    config = _config((4,), method="shift-invert", modes=3)
    model = build_model(config.model)
    operator = ScipyBackend().assemble(model)
    modes = ScipyBackend().slowest_modes(operator, 3, method="shift-invert")
    assert "dense" in modes.method
    assert estimate_resources(model, config)["method"] == "dense"

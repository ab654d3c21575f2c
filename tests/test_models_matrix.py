"""User-supplied generators: both file formats and conventions, validation messages."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.io
import scipy.linalg
import scipy.sparse as sp

from pipeline.config import load_config
from pipeline.models import build_model

from .conftest import write_config
from .model_helpers import available_backends, check_error, dense_W, rightmost, solve

BACKENDS = available_backends()


def random_generator(n: int, seed: int = 5) -> np.ndarray:
    """A random sparse conserving generator W[i, j] = rate j -> i (columns sum to 0)."""
    rng = np.random.default_rng(seed)
    rates = rng.uniform(0.1, 2.0, (n, n)) * (rng.random((n, n)) < 0.3)
    np.fill_diagonal(rates, 0.0)
    rates[(np.arange(n) + 1) % n, np.arange(n)] += 0.5  # a cycle: irreducible
    return rates - np.diag(rates.sum(axis=0))


def matrix_model(tmp_path, file, extra=""):
    path = write_config(tmp_path, "m", f'[model]\ntype = "matrix"\nfile = "{file}"\n{extra}')
    return build_model(load_config(path).model)


@pytest.mark.parametrize("backend_name", BACKENDS)
def test_matrix_market_and_npz_give_the_generator(tmp_path, backend_name):
    W = random_generator(40)
    scipy.io.mmwrite(tmp_path / "w.mtx", sp.coo_matrix(W))
    sp.save_npz(tmp_path / "w.npz", sp.csr_matrix(W))
    sp.save_npz(tmp_path / "rows.npz", sp.csr_matrix(W.T))
    for file, extra in (("w.mtx", ""), ("w.npz", ""), ("rows.npz", 'convention = "rows"\n')):
        model = matrix_model(tmp_path, file, extra)
        np.testing.assert_allclose(dense_W(model, [7, 30]), W, atol=1e-15, err_msg=file)
    modes, stationary, _ = solve(backend_name, model, 5, method="shift-invert")
    # Against LAPACK on the same matrix (numpy.linalg.eigvals) and a dense null vector.
    np.testing.assert_allclose(np.sort_complex(modes.values), np.sort_complex(rightmost(W, 5)),
                               atol=1e-9)
    null = scipy.linalg.null_space(W)[:, 0]
    np.testing.assert_allclose(stationary.distribution, null / null.sum(), atol=1e-12)


def test_diagonal_from_rates(tmp_path):
    W = random_generator(12)
    rates = W - np.diag(np.diag(W)) + np.diag(np.full(12, 99.0))  # a wrong diagonal
    scipy.io.mmwrite(tmp_path / "r.mtx", sp.coo_matrix(rates))
    model = matrix_model(tmp_path, "r.mtx", 'diagonal = "from-rates"\n')
    np.testing.assert_allclose(dense_W(model), W, atol=1e-14)


def test_sub_generator_allowed_when_declared(tmp_path):
    W = random_generator(10)
    W[0, 0] -= 0.3  # state 0 also leaks
    scipy.io.mmwrite(tmp_path / "s.mtx", sp.coo_matrix(W))
    model = matrix_model(tmp_path, "s.mtx", "conserving = false\n")
    assert not model.conserving


@pytest.mark.parametrize("edit,extra,fragment", [
    ("negative", "", "entry (3, 2) = -0.5 is off the diagonal and negative"),
    ("column", "", "column 4 sums to"),
    ("row", 'convention = "rows"\n', "(convention = 'rows': each row"),
    ("nonsquare", "", "is 4 x 5"),
    ("garbage", "", "not a readable Matrix Market"),
    ("nan", "", "rates must be finite"),
])
def test_bad_matrix_is_one_line(tmp_path, capsys, edit, extra, fragment):
    W = random_generator(6)
    if edit == "negative":
        W[2, 1] = -0.5
    if edit == "column":
        W[0, 3] += 1.0
    path = tmp_path / "bad.mtx"
    if edit == "nonsquare":
        scipy.io.mmwrite(path, sp.coo_matrix(np.ones((4, 5))))
    elif edit == "garbage":
        path.write_text("this is not a matrix\n")
    elif edit == "nan":
        W[1, 0] = np.nan
        scipy.io.mmwrite(path, sp.coo_matrix(W))
    else:
        scipy.io.mmwrite(path, sp.coo_matrix(W))
    config = write_config(tmp_path, "bad", f'[model]\ntype = "matrix"\nfile = "bad.mtx"\n{extra}')
    check_error(capsys, config, "model.file", fragment)

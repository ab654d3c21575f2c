"""Dense block helpers of the PETSc backend (pipeline/backends/petsc_tools.py) against numpy
(the reference), and the residuals of Ritz pairs from their subspace's residual block
(pipeline/backends/subspace_residuals.py) against residuals computed vector by vector with
the same sparse matrix in scipy."""

from __future__ import annotations

import numpy as np
import pytest
import scipy.sparse as sp

from pipeline.parallel import World

petsc_tools = pytest.importorskip("pipeline.backends.petsc_tools")
slepc_backend = pytest.importorskip("pipeline.backends.slepc_")
pytestmark = pytest.mark.skipif(slepc_backend.SlepcBackend.unavailable_reason() is not None,
                                reason=str(slepc_backend.SlepcBackend.unavailable_reason()))

RNG = np.random.default_rng(20261202)


def _columns(rows: int, k: int, complex_: bool = False) -> np.ndarray:
    block = RNG.standard_normal((rows, k))
    if complex_:
        block = block + 1j * RNG.standard_normal((rows, k))
    return np.asfortranarray(block)


@pytest.mark.parametrize("columns_complex, coefficients_complex",
                         [(False, False), (False, True), (True, False), (True, True)])
def test_combine_and_in_place_updates_match_numpy(columns_complex, coefficients_complex):
    columns = _columns(300, 7, columns_complex)
    coefficients = RNG.standard_normal((7, 5))
    if coefficients_complex:
        coefficients = coefficients + 1j * RNG.standard_normal((7, 5))
    combined = petsc_tools.combine(columns, coefficients)
    np.testing.assert_allclose(combined, columns @ coefficients, rtol=1e-13, atol=1e-13)
    assert combined.flags.f_contiguous
    # in place: target += factor * columns @ coefficients (same type as the columns)
    if columns_complex or not coefficients_complex:
        target = _columns(300, 5, columns_complex)
        expected = target - columns @ coefficients
        result = petsc_tools.subtract_combination(target, columns, coefficients)
        assert result is target
        np.testing.assert_allclose(target, expected, rtol=1e-13, atol=1e-12)
        expected = target + 2.5 * (columns @ coefficients)
        petsc_tools.add_combination(target, columns, coefficients, 2.5)
        np.testing.assert_allclose(target, expected, rtol=1e-13, atol=1e-12)


def test_in_place_cholqr_step_and_gram_match_numpy():
    block = _columns(400, 6)
    products = block.T @ block
    factor = np.linalg.cholesky(products)
    expected = block @ np.linalg.inv(factor).T
    result = petsc_tools.right_solve_lower_transposed(block, factor)
    assert result is block  # (the columns were overwritten)
    np.testing.assert_allclose(result, expected, rtol=1e-12, atol=1e-12)
    np.testing.assert_allclose(result.T @ result, np.eye(6), atol=1e-12)
    left, right = _columns(400, 4, True), _columns(400, 3, True)
    np.testing.assert_allclose(petsc_tools.gram(World(), left, right), left.conj().T @ right,
                               rtol=1e-12, atol=1e-11)
    columns = _columns(400, 5)
    basis = petsc_tools.orthonormalize(World(), columns)
    np.testing.assert_allclose(basis.T @ basis, np.eye(5), atol=1e-12)
    np.testing.assert_allclose(basis @ (basis.T @ columns), columns, atol=1e-10)  # same span


def _petsc_matrix(matrix: sp.csr_matrix):
    PETSc = petsc_tools.petsc()
    matrix = matrix.tocsr()
    matrix.sort_indices()
    handle = PETSc.Mat().createAIJ(size=matrix.shape, csr=(
        matrix.indptr.astype(PETSc.IntType), matrix.indices.astype(PETSc.IntType),
        matrix.data), comm=PETSc.COMM_SELF)
    handle.assemble()
    return handle


def _random_generator(n: int) -> sp.csr_matrix:
    """A random irreducible Markov generator (columns sum to zero; ring plus random jumps)."""
    i = np.arange(n)
    rows = np.concatenate([(i + 1) % n, (i - 1) % n, RNG.integers(0, n, 3 * n)])
    cols = np.concatenate([i, i, RNG.integers(0, n, 3 * n)])
    keep = rows != cols
    rates = RNG.uniform(0.2, 1.5, keep.sum())
    W = sp.csr_matrix((rates, (rows[keep], cols[keep])), shape=(n, n))
    return (W - sp.diags(np.asarray(W.sum(axis=0)).ravel())).tocsr()


@pytest.mark.parametrize("k", [1, 5, 9])
def test_products_with_complex_blocks_match_scipy(k):
    W = _random_generator(250)
    handle = _petsc_matrix(W)
    block = _columns(250, k, True)  # more columns than one chunk of the complex path
    np.testing.assert_allclose(petsc_tools.apply(handle, block), W @ block, rtol=1e-12,
                               atol=1e-12)
    np.testing.assert_allclose(petsc_tools.apply_transpose(handle, block), W.T @ block,
                               rtol=1e-12, atol=1e-12)
    real = _columns(250, k)
    np.testing.assert_allclose(petsc_tools.apply(handle, real), W @ real, rtol=1e-12,
                               atol=1e-12)


def test_subspace_residuals_match_residuals_vector_by_vector():
    """Ritz pairs of a non-normal balanced generator on a random subspace: their residuals
    (balanced, left, and in W's coordinates) from the k x k Gram matrices equal the norms of
    the residual vectors formed one by one (the identities in subspace_residuals.py; common
    practice)."""
    from pipeline.backends.subspace_residuals import subspace_residuals

    n, k = 250, 6
    W = _random_generator(n)
    scaling = RNG.uniform(0.5, 2.0, n)  # any positive D (not the stationary one)
    Wb = sp.diags(1 / scaling) @ W @ sp.diags(scaling)
    Q, _ = np.linalg.qr(RNG.standard_normal((n, k)))
    Q = np.asfortranarray(Q)
    data = subspace_residuals(World(), _petsc_matrix(W), Q, scaling)
    np.testing.assert_allclose(data.T, Q.T @ (Wb @ Q), rtol=1e-12, atol=1e-12)
    values, coefficients = np.linalg.eig(data.T)
    x = Q @ coefficients
    x /= np.linalg.norm(x, axis=0)
    v = scaling[:, None] * (Q @ coefficients)
    v /= np.linalg.norm(v, axis=0)
    balanced = np.linalg.norm(Wb @ x - x * values, axis=0)
    left = np.linalg.norm(Wb.T @ x - x * values.conj(), axis=0)
    in_w = np.linalg.norm(W @ v - v * values, axis=0)
    np.testing.assert_allclose(data.balanced_residuals(values, coefficients), balanced,
                               rtol=1e-9)
    np.testing.assert_allclose(data.left_residuals(values, coefficients), left, rtol=1e-9)
    np.testing.assert_allclose(data.residuals(values, coefficients), in_w, rtol=1e-9)
    R = Wb @ Q - Q @ data.T
    assert data.right_norm == pytest.approx(np.linalg.norm(R), rel=1e-12)
    np.testing.assert_allclose(data.vector_gram(coefficients), x.conj().T @ x, atol=1e-12)


def test_page_policy_respects_the_users_numpy_setting(monkeypatch):
    """numpy's own NUMPY_MADVISE_HUGEPAGE variable decides when set (numpy documentation,
    reference/global_state.html); otherwise the advice is turned off."""
    from pipeline.backends import page_policy

    calls = []
    monkeypatch.setattr(np._core.multiarray, "_set_madvise_hugepage",
                        lambda enabled: calls.append(enabled) or True)
    monkeypatch.setenv("NUMPY_MADVISE_HUGEPAGE", "1")
    assert page_policy.prefer_small_pages() is False and calls == []
    monkeypatch.setenv("NUMPY_MADVISE_HUGEPAGE", "0")
    assert page_policy.prefer_small_pages() is True and calls == []
    monkeypatch.delenv("NUMPY_MADVISE_HUGEPAGE")
    assert page_policy.prefer_small_pages() is True and calls == [False]


def test_page_policy_is_recorded_in_the_provenance():
    from pipeline.models.lattice import LatticeWalk

    backend = slepc_backend.SlepcBackend()
    operator = backend.assemble(LatticeWalk((12,), ("periodic",), (1.0,), (0.5,)))
    modes = backend.slowest_modes(operator, 3, method="shift-invert")
    assert modes.info["numpy_huge_pages"] == ("off" if backend.small_pages
                                              else "numpy's default")

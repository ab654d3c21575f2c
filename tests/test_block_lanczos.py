"""Shift-and-invert block Lanczos (pipeline/backends/block_lanczos.py) against dense LAPACK
(numpy.linalg.eigh, the reference) on small symmetric matrices: the largest eigenvalues with
multiplicity, deflation, and a space small enough to be spanned completely."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.backends.block_lanczos import shift_invert_lanczos, start_block
from pipeline.parallel import World


def _run(A: np.ndarray, wanted: int, width: int, deflation: np.ndarray | None = None,
         tolerance: float = 1e-11, max_columns: int = 400):
    n = A.shape[0]
    deflation = np.zeros((n, 0)) if deflation is None else deflation
    spectrum = np.linalg.eigvalsh(A)
    scale = np.abs(spectrum).max()
    shift = spectrum.max() + 1e-3 * scale  # just above the spectrum, as the backend does
    inverse = np.linalg.inv(shift * np.eye(n) - A)
    return shift_invert_lanczos(World(), lambda X: inverse @ X, lambda X: A @ X,
                                start_block(0, n, width), deflation, np.full(wanted, tolerance),
                                scale, max_columns=max_columns, dimension=n)


def _laplacian_2d(size: int) -> np.ndarray:
    """Periodic 2D lattice Laplacian (eigenvalues -2(2 - cos a - cos b) with multiplicity 4
    for the generic mode; common practice)."""
    ring = -2.0 * np.eye(size) + np.roll(np.eye(size), 1, axis=0) + np.roll(np.eye(size), -1,
                                                                            axis=0)
    return np.kron(ring, np.eye(size)) + np.kron(np.eye(size), ring)


def test_largest_with_multiplicity_match_lapack():
    A = _laplacian_2d(20)  # 400 states; top: 0, then groups of 4
    exact = np.sort(np.linalg.eigvalsh(A))[::-1][:13]
    result = _run(A, 13, 4)
    assert result.converged
    np.testing.assert_allclose(result.values, exact, atol=1e-10)
    # the Ritz vectors are orthonormal and the residuals are those asked for
    np.testing.assert_allclose(result.vectors.T @ result.vectors, np.eye(13), atol=1e-10)
    assert result.residuals.max() <= 1e-11
    assert result.columns % 4 == 0 and result.steps * 4 == result.columns


def test_width_one_misses_copies_of_a_multiple_eigenvalue():
    """A single vector sees one copy of a degenerate eigenvalue (exact arithmetic: the Krylov
    space lies in span(start) + the other eigenspaces; rounding lets further copies in
    slowly, through the shifted inverse's amplification); a block of 4 sees all 4."""
    A = _laplacian_2d(12)
    exact = np.sort(np.linalg.eigvalsh(A))[::-1]
    second = exact[1]  # a 4-fold eigenvalue (the modes (±1, 0), (0, ±1))
    single = _run(A, 5, 1, max_columns=20)
    assert np.sum(np.abs(single.values - second) < 1e-8) < 4
    block = _run(A, 5, 4)
    assert np.sum(np.abs(block.values - second) < 1e-8) == 4


def test_deflation_space_is_kept_out():
    A = _laplacian_2d(16)
    values, vectors = np.linalg.eigh(A)
    order = np.argsort(values)[::-1]
    top = vectors[:, order[:5]]  # the null vector and the first 4-fold group
    result = _run(A, 6, 4, deflation=top)
    np.testing.assert_allclose(result.values, values[order[5:11]], atol=1e-10)
    assert np.abs(top.T @ result.vectors).max() < 1e-10


@pytest.mark.parametrize("width", [1, 3, 4])
def test_small_space_is_spanned_exactly(width):
    """n = 10: the basis fills the whole space; every eigenvalue comes out exact."""
    rng = np.random.default_rng(3)
    B = rng.standard_normal((10, 10))
    A = B + B.T
    result = _run(A, 6, width)
    np.testing.assert_allclose(result.values, np.sort(np.linalg.eigvalsh(A))[::-1][:6],
                               atol=1e-10)


def test_residual_estimate_from_the_krylov_relation_matches_the_residual():
    """On a block Krylov basis of (sigma I - A)^-1, ||A x - mu x|| of each Ritz pair follows
    from u = A V_0 alone (A maps the space into itself plus span(u)); checked against the
    residual computed from the Ritz vectors (the definition)."""
    from pipeline.backends.block_lanczos import _residual_estimate

    A = _laplacian_2d(10)
    n = A.shape[0]
    shift = 1e-3
    inverse = np.linalg.inv(shift * np.eye(n) - A)
    null = np.full((n, 1), 1 / np.sqrt(n))
    block = start_block(0, n, 4)
    block -= null @ (null.T @ block)
    basis = [np.linalg.qr(block)[0]]
    for _ in range(3):  # three more blocks, fully reorthogonalized
        V = np.column_stack([null] + basis)
        nxt = inverse @ basis[-1]
        for _ in range(2):
            nxt -= V @ (V.T @ nxt)
        basis.append(np.linalg.qr(nxt)[0])
    V = np.column_stack(basis)
    u = A @ basis[0]
    values, Y = np.linalg.eigh(V.T @ A @ V)
    order = np.argsort(values)[::-1][:6]
    mu, Y = values[order], Y[:, order]
    estimate = _residual_estimate(u.T @ u - (null.T @ u).T @ (null.T @ u), V.T @ u,
                                  V.T @ (A @ u), mu, Y)
    X = V @ Y
    exact = np.linalg.norm(A @ X - X * mu, axis=0)
    np.testing.assert_allclose(estimate, exact, rtol=1e-6, atol=1e-12)


def test_checking_every_step_finds_the_same_pairs_as_the_estimate():
    """``estimate=False`` (residuals computed after every step) and the Krylov-relation
    estimate stop on the same converged pairs, against LAPACK."""
    A = _laplacian_2d(16)
    n = A.shape[0]
    exact = np.sort(np.linalg.eigvalsh(A))[::-1][:9]
    spectrum = np.linalg.eigvalsh(A)
    shift = spectrum.max() + 1e-3 * np.abs(spectrum).max()
    inverse = np.linalg.inv(shift * np.eye(n) - A)
    results = [shift_invert_lanczos(World(), lambda X: inverse @ X, lambda X: A @ X,
                                    start_block(0, n, 4), np.zeros((n, 0)), np.full(9, 1e-11),
                                    8.0, max_columns=400, dimension=n, estimate=estimate)
               for estimate in (True, False)]
    for result in results:
        assert result.converged
        np.testing.assert_allclose(result.values, exact, atol=1e-10)
        assert result.residuals.max() <= 1e-11
    assert results[1].steps <= results[0].steps  # checked every step: never later

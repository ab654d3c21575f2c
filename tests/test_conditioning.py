"""Eigenvalue condition numbers against the textbook formula, and defective eigenvalues."""

from __future__ import annotations

import numpy as np
import scipy.linalg

from pipeline.backends.conditioning import eigenvalue_conditions
from pipeline.backends.scipy_ import ScipyBackend
from pipeline.models.lattice import LatticeWalk


def test_simple_eigenvalues_match_the_textbook_condition_number():
    # Wilkinson 1965, The Algebraic Eigenvalue Problem, ch. 2: the condition of a simple
    # eigenvalue is ||l|| ||r|| / |l^H r|, l and r its left and right eigenvectors.
    rng = np.random.default_rng(7)
    A = np.triu(rng.standard_normal((12, 12)), k=0) + 0.3 * rng.standard_normal((12, 12))
    values, left, right = scipy.linalg.eig(A, left=True, right=True)
    expected = np.array([
        np.linalg.norm(left[:, i]) * np.linalg.norm(right[:, i])
        / abs(np.vdot(left[:, i], right[:, i]))
        for i in range(values.size)
    ])
    chosen = np.arange(values.size)
    computed = eigenvalue_conditions(values, right, values, left, 1e-10, chosen)
    np.testing.assert_allclose(computed, expected, rtol=1e-8)


def test_normal_matrix_has_condition_one_even_for_degenerate_eigenvalues():
    # A symmetric 2D torus generator is normal: every eigenvalue (and every cluster of equal
    # ones: groups of 4 on the torus) has condition 1 (common practice: unitary eigenbasis).
    model = LatticeWalk((6, 6), ("periodic", "periodic"), (0.7, 0.7), (0.7, 0.7))
    backend = ScipyBackend()
    modes = backend.slowest_modes(backend.assemble(model), 9, method="dense")
    np.testing.assert_allclose(modes.condition, 1.0, rtol=1e-8)


def test_defective_eigenvalue_is_reported_unbounded():
    # One-way hopping on a reflecting chain gives a triangular W with a Jordan block at
    # -(forward rate) (common practice): its condition is unbounded, so the error estimate
    # must be inf however small the residual, and verify must not accept it.
    model = LatticeWalk((12,), ("reflecting",), (0.8,), (0.0,))
    backend = ScipyBackend()
    modes = backend.slowest_modes(backend.assemble(model), 4, method="dense")
    assert np.isfinite(modes.condition[0])  # the stationary mode is simple
    assert np.all(np.isinf(modes.condition[1:]))
    assert np.all(np.isinf(modes.error_estimates[1:]))


def test_cluster_cut_by_the_requested_count_is_taken_whole():
    # Jordan-free double eigenvalue: diag(1, 1, 3) in a non-orthogonal basis. Asking for one
    # member of the double pair must still use the whole pair (the spectral projector of the
    # pair; Stewart and Sun 1990, Matrix Perturbation Theory, ch. V, from memory).
    basis = np.array([[1.0, 0.9, 0.0], [0.0, 0.4, 0.2], [0.0, 0.0, 1.0]])
    A = basis @ np.diag([1.0, 1.0, 3.0]) @ np.linalg.inv(basis)
    values, left, right = scipy.linalg.eig(A, left=True, right=True)
    pair = np.flatnonzero(np.isclose(values, 1.0))
    condition = eigenvalue_conditions(values, right, values, left, 1e-8, pair[:1])
    # Projector onto the pair along the third eigenvector: P = X diag(1,1,0) X^{-1}.
    projector = basis @ np.diag([1.0, 1.0, 0.0]) @ np.linalg.inv(basis)
    np.testing.assert_allclose(condition[0], np.linalg.norm(projector, 2), rtol=1e-6)


def test_gram_version_equals_the_vector_version():
    """The MPI form (inner products only) gives the same conditions as the one-process form
    on a random non-normal matrix with a forced cluster (dense LAPACK eigenvectors)."""
    from pipeline.backends.conditioning import conditions_from_products

    rng = np.random.default_rng(3)
    matrix = rng.standard_normal((30, 30))
    values, left, right = scipy.linalg.eig(matrix, left=True, right=True)
    right = right * rng.uniform(1, 3, 30)  # unnormalized columns must not matter
    chosen = np.arange(10)
    direct = eigenvalue_conditions(values, right, values, left, 1e-8, chosen)
    from_products = conditions_from_products(values, values, right.conj().T @ right,
                                             left.conj().T @ left, left.conj().T @ right,
                                             1e-8, chosen)
    np.testing.assert_allclose(from_products, direct, rtol=1e-10)

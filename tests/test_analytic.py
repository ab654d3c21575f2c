"""Exact spectra and stationary laws (pipeline.analytic) against dense eigensolvers."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg

from pipeline.analytic import LatticeExact, chain_spectrum, chain_stationary
from pipeline.models.lattice import Disorder, LatticeWalk

from .conftest import (
    chain_matrix,
    dense_generator,
    multiset_distance,
    norm1,
    published_chain_spectrum,
    slowest_first,
    tolerance_for,
)

# Ring: circulant eigenvalues -(u+v) + u e^{-iq} + v e^{iq}, q = 2 pi k / L
# (Gray 2006, Toeplitz and Circulant Matrices: A Review, eq. 3.7).
RINGS = [(5, 1.3, 0.4), (12, 1.0, 1.0), (33, 0.5, 2.0), (2, 1.3, 0.4), (9, 1.0, 0.0)]
# Reflecting chain: 0 and -(u+v) + 2 sqrt(uv) cos(pi k / L), k = 1..L-1 (birth-death chain
# with constant rates; from memory). Bias kept moderate: the eigenvector basis has condition
# about (u/v)^((L-1)/2) (common practice), here below 1e3.
REFLECTING = [(6, 1.2, 0.8), (15, 1.0, 1.0), (25, 0.7, 1.0), (2, 1.5, 0.5), (12, 2.0, 1.0)]
# Absorbing chain: tridiagonal Toeplitz, -(u+v) + 2 sqrt(uv) cos(pi k / (L+1)), k = 1..L
# (from memory, e.g. Smith 1985, Numerical Solution of Partial Differential Equations).
ABSORBING = [(6, 1.2, 0.8), (15, 1.0, 1.0), (25, 0.7, 1.0), (2, 1.5, 0.5), (12, 2.0, 1.0)]


def _cases():
    for boundary, cases in (("periodic", RINGS), ("reflecting", REFLECTING),
                            ("absorbing", ABSORBING)):
        for size, u, v in cases:
            yield pytest.param(boundary, size, u, v, id=f"{boundary}-{size}-{u}-{v}")


@pytest.mark.parametrize(("boundary", "size", "u", "v"), list(_cases()))
def test_chain_spectrum_against_dense_eigenvalues(boundary, size, u, v):
    exact = chain_spectrum(size, boundary, u, v)
    assert exact.shape == (size,)
    assert exact.dtype == np.complex128
    W_hand = chain_matrix(size, boundary, u, v)
    model = LatticeWalk((size,), (boundary,), (u,), (v,))
    W_model = dense_generator(model)
    np.testing.assert_allclose(W_model, W_hand, atol=1e-15)
    dense = np.linalg.eigvals(W_hand)
    scale = norm1(W_hand)
    assert multiset_distance(exact, dense) <= 1e-10 * scale
    assert multiset_distance(exact, published_chain_spectrum(size, boundary, u, v)) <= 1e-14 * scale


@pytest.mark.parametrize(
    ("shape", "boundary", "forward", "backward", "count"),
    [
        ((300,), ("periodic",), (1.3,), (0.4,), 12),
        ((40,), ("reflecting",), (1.2,), (0.8,), 8),
        ((40,), ("absorbing",), (1.2,), (0.8,), 8),
        ((6, 5), ("periodic", "reflecting"), (1.0, 1.1), (0.6, 0.9), 10),
        ((24, 24), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8), 13),
        ((5, 6), ("absorbing", "absorbing"), (1.0, 0.5), (1.0, 0.7), 9),
        ((6, 5, 4), ("periodic", "reflecting", "absorbing"), (1.0, 1.2, 0.9), (0.7, 0.8, 1.1),
         10),
        ((4, 4, 4), ("periodic", "periodic", "periodic"), (1.0, 1.0, 1.0), (1.0, 1.0, 1.0),
         8),
        ((2, 3, 5), ("periodic", "reflecting", "periodic"), (1.0, 0.4, 0.9), (0.5, 0.6, 0.9),
         15),
    ],
)
def test_slowest_eigenvalues_against_dense(shape, boundary, forward, backward, count):
    model = LatticeWalk(shape, boundary, forward, backward)
    W = dense_generator(model)
    tol = tolerance_for(W)
    truth = slowest_first(np.linalg.eigvals(W), tol)
    exact = LatticeExact(model).slowest_eigenvalues(count)
    assert exact.size >= count
    # The returned list is the slowest set, extended to finish the last group of equal real
    # parts: every eigenvalue at least as slow as its last member is in it, and nothing else.
    last = exact[-1].real
    assert (truth.real >= last - tol).sum() == exact.size
    assert multiset_distance(exact, truth[: exact.size]) <= 1e-9 * norm1(W)
    # Ordered slowest first, by the published rule (decreasing real, then increasing imag).
    np.testing.assert_allclose(exact, slowest_first(exact, tol), atol=tol)
    # The exact scale is ||W||_1 (twice the largest exit rate of the ordered lattice).
    assert LatticeExact(model).scale == pytest.approx(norm1(W), rel=1e-14)


def test_last_group_is_extended_symmetric_torus():
    # Symmetric 2D torus: the eigenvalues (k0, k1) = (+-1, 0), (0, +-1) share one real part,
    # and so do the four (+-1, +-1): groups of 4 after the stationary mode.
    model = LatticeWalk((6, 6), ("periodic", "periodic"), (1.0, 1.0), (1.0, 1.0))
    W = dense_generator(model)
    tol = tolerance_for(W)
    truth = slowest_first(np.linalg.eigvals(W), tol)
    exact = LatticeExact(model)
    for count, expected_size in ((1, 1), (2, 5), (5, 5), (6, 9), (9, 9)):
        values = exact.slowest_eigenvalues(count)
        assert values.size == expected_size, count
        # Dense check of the group size.
        assert (truth.real >= values[-1].real - tol).sum() == expected_size
        assert multiset_distance(values, truth[:expected_size]) <= 1e-12 * norm1(W)


def test_count_beyond_the_number_of_states():
    model = LatticeWalk((3, 2), ("reflecting", "periodic"), (1.0, 0.5), (0.7, 0.5))
    values = LatticeExact(model).slowest_eigenvalues(50)
    W = dense_generator(model)
    assert values.size == 6
    assert multiset_distance(values, np.linalg.eigvals(W)) <= 1e-12


def _null_vector(W):
    null = scipy.linalg.null_space(W, rcond=1e-10)
    assert null.shape[1] == 1, "the stationary law must be unique"
    return null[:, 0] / null[:, 0].sum()


@pytest.mark.parametrize(
    ("shape", "boundary", "forward", "backward"),
    [
        ((20,), ("periodic",), (1.3,), (0.4,)),
        ((15,), ("reflecting",), (1.3,), (0.7,)),
        ((15,), ("reflecting",), (0.6,), (1.0,)),
        ((5, 7), ("periodic", "reflecting"), (1.3, 0.9), (0.4, 1.2)),
        ((4, 3, 5), ("reflecting", "periodic", "reflecting"), (1.1, 0.5, 0.8), (0.9, 0.3, 1.0)),
    ],
)
def test_stationary_law_against_null_space(shape, boundary, forward, backward):
    model = LatticeWalk(shape, boundary, forward, backward)
    p = _null_vector(dense_generator(model))
    exact = LatticeExact(model)
    assert exact.has_stationary
    n = model.n_states
    np.testing.assert_allclose(exact.stationary(0, n), p, rtol=1e-9, atol=1e-15)
    # Uniform along rings, geometric (u/v)^x along reflecting axes (detailed balance; Kelly
    # 1979, Reversibility and Stochastic Networks, ch. 1; from memory), product over axes.
    x = np.stack(np.unravel_index(np.arange(n), shape), axis=1)
    weight = np.ones(n)
    for axis, kind in enumerate(boundary):
        if kind == "reflecting":
            weight *= (forward[axis] / backward[axis]) ** x[:, axis]
    np.testing.assert_allclose(p, weight / weight.sum(), rtol=1e-9)
    # Pieces agree with the whole.
    np.testing.assert_allclose(exact.stationary(3, 11), exact.stationary(0, n)[3:11], rtol=1e-15)


@pytest.mark.parametrize("boundary", ["periodic", "reflecting"])
def test_chain_stationary_against_null_space(boundary):
    for size, u, v in ((10, 1.3, 0.4), (7, 0.5, 2.0), (2, 1.0, 3.0), (6, 1.0, 0.0),
                       (6, 0.0, 1.0)):
        p = _null_vector(chain_matrix(size, boundary, u, v))
        np.testing.assert_allclose(chain_stationary(size, boundary, u, v), p, rtol=1e-9)
        assert chain_stationary(size, boundary, u, v).sum() == pytest.approx(1.0, abs=1e-15)


def test_trap_stationary_law_against_null_space():
    disorder = Disorder("sites", "lognormal", 0.5, 1.5, 0.8, 2026)
    model = LatticeWalk((6, 5), ("periodic", "reflecting"), (1.0, 1.3), (1.0, 0.7), disorder)
    exact = LatticeExact.for_model(model)
    assert exact is not None and exact.has_stationary and not exact.has_spectrum
    assert exact.slowest_eigenvalues(5) is None
    p = _null_vector(dense_generator(model))
    np.testing.assert_allclose(exact.stationary(0, model.n_states), p, rtol=1e-9)


def test_no_exact_results_when_unknown():
    # Absorbing: no stationary law; bond disorder on a driven ring: no closed form.
    absorbing = LatticeExact(LatticeWalk((5,), ("absorbing",), (1.0,), (0.5,)))
    assert not absorbing.has_stationary and absorbing.stationary(0, 5) is None
    driven = LatticeWalk((8,), ("periodic",), (1.0,), (0.5,),
                         Disorder("bonds", "uniform", 0.5, 1.5, 0.5, 0))
    assert LatticeExact.for_model(driven) is None
    # With disorder the ring law is not uniform any more, so claiming it would be wrong.
    p = _null_vector(dense_generator(driven))
    assert np.ptp(p) > 1e-3
    assert math.isclose(p.sum(), 1.0)

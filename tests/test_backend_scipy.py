"""The scipy backend against dense numpy eigensolvers: a contract for both methods, the
shift-and-invert pitfall on a driven torus, the completeness certificate, stationary laws."""

from __future__ import annotations

import functools
import math

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse.linalg as spla

from pipeline.backends.scipy_ import ScipyBackend
from pipeline.errors import SolverError
from pipeline.models.lattice import Disorder, LatticeWalk

from .conftest import (
    assert_slowest_first,
    matched_errors,
    multiset_distance,
    norm1,
    published_lattice_spectrum,
    reference_generator,
    slowest_first,
    slowest_set,
    tolerance_for,
    whole_group_count,
)

# name: (shape, boundary, forward, backward, at least this many modes)
CASES = {
    "ring-300": ((300,), ("periodic",), (1.3,), (0.4,), 12),
    # Moderate bias: eigenvector condition about (u/v)^((L-1)/2) = 1.86^14.5 ~ 8e3 (common
    # practice); LAPACK reaches ~1e-13 here (checked in test_dense_reference_is_accurate).
    "reflecting-30": ((30,), ("reflecting",), (1.3,), (0.7,), 8),
    "absorbing-40": ((40,), ("absorbing",), (1.2,), (0.8,), 8),
    "3d-mixed": ((6, 5, 4), ("periodic", "reflecting", "absorbing"), (1.0, 1.2, 0.9),
                 (0.7, 0.8, 1.1), 10),
    "driven-torus": ((24, 24), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8), 13),
}
METHODS = ["dense", "shift-invert"]
EIGENVALUE_TOLERANCE = 1e-9  # relative to ||W||_1: the project's default verify.tolerance
RESIDUAL_TOLERANCE = 1e-10  # relative to ||W||_1; solve.tolerance asks for 1e-12


def model_for(name: str, disorder=None) -> LatticeWalk:
    shape, boundary, forward, backward, _ = CASES[name]
    return LatticeWalk(shape, boundary, forward, backward, disorder)


@functools.cache
def reference(name: str):
    """Dense W from the slow reference construction and all its eigenvalues (LAPACK geev via
    numpy.linalg.eigvals), ordered slowest first."""
    shape, boundary, forward, backward, at_least = CASES[name]
    W = reference_generator(shape, boundary, forward, backward)
    tol = tolerance_for(W)
    values = slowest_first(np.linalg.eigvals(W), tol)
    count = whole_group_count(values, at_least, tol)
    return W, values, count


ARPACK_SEED = 20261201


def _seeded(eigs):
    """ARPACK starts from a random vector; give every call the same seed (fixed seeds)."""

    @functools.wraps(eigs)
    def wrapper(*args, **kwargs):
        if kwargs.get("v0") is None and kwargs.get("rng") is None:
            kwargs["rng"] = np.random.default_rng(ARPACK_SEED)
        return eigs(*args, **kwargs)

    wrapper.seeded = True
    return wrapper


@pytest.fixture(autouse=True)
def seeded_arpack(monkeypatch, quiet):
    if not getattr(spla.eigs, "seeded", False):
        monkeypatch.setattr(spla, "eigs", _seeded(spla.eigs))


@pytest.fixture(params=METHODS)
def method(request):
    return request.param


@pytest.fixture
def backend():
    return ScipyBackend()


@functools.cache
def solved(name: str, method: str):
    """Slowest modes (with vectors) of a case by a method; cached: each solve runs once."""
    _, _, count = reference(name)
    backend = ScipyBackend()
    operator = backend.assemble(model_for(name))
    return backend.slowest_modes(operator, count, method=method, vectors=True)


@pytest.mark.parametrize("name", sorted(CASES))
def test_dense_reference_is_accurate(name):
    # The exact spectrum (pipeline.analytic, itself checked in test_analytic.py) and LAPACK
    # agree far below the tolerance used in the contract: the problems are well-conditioned.
    from pipeline.analytic import LatticeExact

    W, values, count = reference(name)
    exact = LatticeExact(model_for(name)).slowest_eigenvalues(count)
    assert multiset_distance(exact[:count], values[:count]) <= 1e-12 * norm1(W)


@pytest.mark.parametrize("name", sorted(CASES))
class TestSlowestModesContract:
    """What every method must deliver (DEVELOPERS.md: 'backend contract')."""

    def solve(self, backend, name, method):
        W, values, count = reference(name)
        return W, values, count, solved(name, method)

    def test_operator_is_the_reference_matrix(self, backend, name, method):
        W, _, _ = reference(name)
        operator = backend.assemble(model_for(name))
        np.testing.assert_allclose(operator.handle["W"].toarray(), W, atol=1e-15)
        assert operator.check.norm1 == pytest.approx(norm1(W), rel=1e-14)
        assert operator.nnz == np.count_nonzero(W - np.diag(np.diag(W))) + W.shape[0]

    def test_slowest_modes_equal_dense_eigenvalues(self, backend, name, method):
        W, values, count, modes = self.solve(backend, name, method)
        assert modes.values.shape == (count,)
        assert modes.values.dtype == np.complex128
        truth = slowest_set(values, count, tolerance_for(W))
        distance = multiset_distance(modes.values, truth)
        assert distance <= EIGENVALUE_TOLERANCE * norm1(W), f"{method}: off by {distance:.2e}"
        assert_slowest_first(modes.values, tolerance_for(W))

    def test_residuals_small_and_honest(self, backend, name, method):
        W, _, count, modes = self.solve(backend, name, method)
        assert modes.residuals.shape == (count,)
        assert (modes.residuals <= RESIDUAL_TOLERANCE).all(), modes.residuals.max()
        # Recomputed here: ||W v - lambda v||_2 / ||W||_1 for unit v.
        vectors = modes.vectors
        own = np.linalg.norm(W @ vectors - vectors * modes.values, axis=0) / norm1(W)
        np.testing.assert_allclose(modes.residuals, own, rtol=1e-6, atol=1e-15)

    def test_condition_and_error_estimates(self, backend, name, method):
        # Condition numbers ||l|| ||r|| / |l^H r| >= 1 (Cauchy-Schwarz), = 1 for a normal W
        # (rings and tori are circulant or Kronecker sums of circulants: normal); the first
        # order error bound condition x backward error (Wilkinson 1965, The Algebraic
        # Eigenvalue Problem, ch. 2) must cover the true error, with a factor 10 for the
        # neglected higher orders and rounding.
        W, _, count, modes = self.solve(backend, name, method)
        shape, boundary, forward, backward, _ = CASES[name]
        assert modes.condition.shape == (count,)
        assert (modes.condition >= 1 - 1e-9).all()
        if set(boundary) == {"periodic"}:
            assert (modes.condition <= 1 + 1e-6).all(), modes.condition
        exact = published_lattice_spectrum(shape, boundary, forward, backward)
        errors = matched_errors(modes.values, exact)
        allowed = 10 * modes.error_estimates + 1e-13 * norm1(W)
        assert (errors <= allowed).all(), (errors, modes.error_estimates)

    def test_certified(self, backend, name, method):
        _, _, _, modes = self.solve(backend, name, method)
        assert modes.certified is True
        assert modes.group_complete is True

    def test_eigenvectors(self, backend, name, method):
        W, _, count, modes = self.solve(backend, name, method)
        vectors = modes.vectors
        assert vectors.shape == (W.shape[0], count)
        np.testing.assert_allclose(np.linalg.norm(vectors, axis=0), 1.0, rtol=1e-12)
        # W v = lambda v, to the residual tolerance.
        error = np.linalg.norm(W @ vectors - vectors * modes.values[None, :], axis=0)
        assert (error <= RESIDUAL_TOLERANCE * norm1(W)).all()
        # A largest-modulus entry is real and positive (base.py: normalization of vectors;
        # with ties in modulus, as for Fourier modes, any of them may be the one).
        modulus = np.abs(vectors)
        largest = modulus >= modulus.max(axis=0) * (1 - 1e-9)
        real_positive = (vectors.real > 0) & (np.abs(vectors.imag) <= 1e-12)
        assert (largest & real_positive).any(axis=0).all()
        # Distinct eigenvalues have independent vectors.
        assert np.linalg.matrix_rank(vectors, tol=1e-8) == count


def test_shift_invert_small_problem(backend):
    # A ring of 30 states and 11 modes: the first search asks ARPACK for n - 2 = 28 modes.
    # ARPACK (scipy.sparse.linalg.eigs) needs k + 1 < ncv <= n; the answer must still be the
    # dense one (or the backend must fall back to dense).
    model = LatticeWalk((30,), ("periodic",), (1.3,), (0.4,))
    W = reference_generator((30,), ("periodic",), (1.3,), (0.4,))
    tol = tolerance_for(W)
    values = slowest_first(np.linalg.eigvals(W), tol)
    count = whole_group_count(values, 11, tol)
    modes = backend.slowest_modes(backend.assemble(model), count, method="shift-invert")
    assert multiset_distance(modes.values, slowest_set(values, count, tol)) <= 1e-9 * norm1(W)


# ---------------------------------------------------------------------------------------
# The pitfall: shift-and-invert ranks by distance to the shift, not by real part.


def _plain_shift_invert(W_sparse, count):
    """What a naive user does: ARPACK shift-invert around a small positive shift, keep the
    returned set (Lehoucq, Sorensen and Yang 1998, ARPACK Users' Guide, 4.2 shift-invert)."""
    values = spla.eigs(W_sparse.tocsc(), k=count, sigma=1e-9, which="LM",
                       return_eigenvectors=False, v0=np.ones(W_sparse.shape[0]))
    return values


def test_plain_shift_invert_misses_slow_modes_on_driven_torus(backend):
    W, values, count = reference("driven-torus")
    assert count == 13  # 0, (+-1, 0), (0, +-1), (+-1, +-1), (+-2, 0), (0, +-2): whole groups
    tol = tolerance_for(W)
    truth = slowest_set(values, count, tol)
    operator = backend.assemble(model_for("driven-torus"))
    plain = _plain_shift_invert(operator.handle["W"], count)
    # The plain set is the 13 eigenvalues nearest 0: it swaps the slow pair (+-2, 0), whose
    # imaginary parts are large, for faster modes with smaller imaginary parts.
    assert multiset_distance(plain, truth) > 1e-2
    missed = [z for z in truth if np.abs(plain - z).min() > 1e-6]
    assert missed and all(abs(z.imag) > abs(z.real) * 0.5 for z in missed)
    slowest_by_real = np.sort(plain.real)[::-1]
    assert np.abs(slowest_by_real - np.sort(truth.real)[::-1]).max() > 1e-2
    # gapline's shift-invert widens the search until certified, and gets the dense answer.
    modes = backend.slowest_modes(operator, count, method="shift-invert")
    assert modes.certified
    assert multiset_distance(modes.values, truth) <= EIGENVALUE_TOLERANCE * norm1(W)


def test_small_max_search_is_not_certified_when_wrong(backend):
    W, values, count = reference("driven-torus")
    truth = slowest_set(values, count, tolerance_for(W))
    operator = backend.assemble(model_for("driven-torus"))
    modes = backend.slowest_modes(operator, count, method="shift-invert", max_search=count)
    correct = multiset_distance(modes.values, truth) <= EIGENVALUE_TOLERANCE * norm1(W)
    # Never certified while wrong. With max_search = modes the search is the plain one above,
    # which is wrong here, so the result must say so.
    assert correct or not modes.certified
    assert not correct
    assert not modes.certified
    assert "NOT CERTIFIED" in modes.certificate["note"]


@pytest.mark.parametrize("name", ["driven-torus", "3d-mixed", "ring-300", "reflecting-30"])
def test_certificate_radii_are_true(backend, name):
    # The certificate claims: (1) every eigenvalue in the disk |z - shift| < radius was found;
    # (2) every eigenvalue with Re >= threshold lies within required_radius. Both checked
    # against all dense eigenvalues.
    W, values, count = reference(name)
    operator = backend.assemble(model_for(name))
    modes = backend.slowest_modes(operator, count, method="shift-invert")
    certificate = modes.certificate
    shift, radius = certificate["shift"], certificate["radius"]
    threshold = modes.values[-1].real
    slow = values[values.real >= threshold - tolerance_for(W)]
    assert np.abs(slow - shift).max() <= certificate["required_radius"] * (1 + 1e-6)
    if modes.certified:
        assert certificate["required_radius"] < radius
    # Bendixson: |Im lambda| <= the bound used by the enclosure.
    assert np.abs(values.imag).max() <= certificate["imag_bound"] * (1 + 1e-9) + 1e-12


# ---------------------------------------------------------------------------------------
# Stationary distribution


def _check_stationary(result, W, expected):
    p = result.distribution
    assert p.shape == (W.shape[0],)
    assert p.sum() == pytest.approx(1.0, abs=1e-13)
    assert (p >= 0).all()
    own_residual = np.abs(W @ p).sum() / norm1(W)
    assert own_residual <= 1e-12
    assert result.residual <= 1e-12
    assert np.abs(p - expected).sum() <= 1e-10


def _geometric(shape, boundary, forward, backward):
    """Uniform along rings, ∝ (u/v)^x along reflecting axes (detailed balance; Kelly 1979,
    Reversibility and Stochastic Networks, ch. 1; from memory); product over axes."""
    n = math.prod(shape)
    x = np.stack(np.unravel_index(np.arange(n), shape), axis=1)
    weight = np.ones(n)
    for axis, kind in enumerate(boundary):
        if kind == "reflecting":
            weight *= (forward[axis] / backward[axis]) ** x[:, axis]
    return weight / weight.sum()


STATIONARY_CASES = {
    "ring-300": ((300,), ("periodic",), (1.3,), (0.4,)),
    "reflecting-2d": ((8, 6), ("reflecting", "reflecting"), (1.2, 0.7), (0.8, 0.9)),
    "mixed-2d": ((12, 9), ("periodic", "reflecting"), (1.0, 1.1), (0.5, 0.8)),
    # Above the default dense limit (1024 states): inverse iteration.
    "reflecting-1200": ((40, 30), ("reflecting", "periodic"), (1.1, 0.9), (0.9, 0.5)),
    # One-way: every walker ends at x = 0 (a closed class of one state).
    "reflecting-one-way": ((9,), ("reflecting",), (0.0,), (0.8,)),
}


@pytest.mark.parametrize("dense_limit", [1024, 0])
@pytest.mark.parametrize("name", sorted(STATIONARY_CASES))
def test_stationary(backend, name, dense_limit):
    shape, boundary, forward, backward = STATIONARY_CASES[name]
    model = LatticeWalk(shape, boundary, forward, backward)
    operator = backend.assemble(model)
    W = reference_generator(shape, boundary, forward, backward)
    result = backend.stationary(operator, dense_limit=dense_limit)
    expected = _geometric(shape, boundary, forward, backward)
    _check_stationary(result, W, expected)
    path = "dense" if model.n_states <= dense_limit else "inverse iteration"
    assert path in result.method
    if model.n_states <= 400:
        null = scipy.linalg.null_space(W, rcond=1e-10)
        assert null.shape[1] == 1
        np.testing.assert_allclose(result.distribution, null[:, 0] / null[:, 0].sum(),
                                   rtol=1e-8, atol=1e-15)


def test_stationary_after_shift_invert_uses_the_lu(backend):
    shape, boundary, forward, backward = STATIONARY_CASES["mixed-2d"]
    model = LatticeWalk(shape, boundary, forward, backward)
    operator = backend.assemble(model)
    backend.slowest_modes(operator, 6, method="shift-invert")
    result = backend.stationary(operator)
    assert "inverse iteration" in result.method
    _check_stationary(result, reference_generator(shape, boundary, forward, backward),
                      _geometric(shape, boundary, forward, backward))


@pytest.mark.parametrize("dense_limit", [1024, 0])
def test_stationary_random_traps(backend, dense_limit):
    # W = W0 diag(tau), so p ∝ p0 / tau (common practice); p0 uniform on the torus.
    disorder = Disorder("sites", "lognormal", 0.5, 1.5, 0.8, 2026)
    model = LatticeWalk((12, 10), ("periodic", "periodic"), (1.0, 1.0), (1.0, 1.0), disorder)
    operator = backend.assemble(model)
    W = reference_generator(model.shape, model.boundary, model.forward, model.backward, disorder)
    tau = disorder.factors(model.dims, np.arange(model.n_states))
    result = backend.stationary(operator, dense_limit=dense_limit)
    _check_stationary(result, W, (1 / tau) / (1 / tau).sum())


def test_stationary_of_sub_generator_raises(backend):
    model = LatticeWalk((6, 5), ("periodic", "absorbing"), (1.0, 0.5), (0.3, 0.5))
    with pytest.raises(SolverError, match="sub-generator"):
        backend.stationary(backend.assemble(model))


# ---------------------------------------------------------------------------------------
# Small problems near ARPACK's limit k <= n - 2, and the smallest searches.


@pytest.mark.parametrize(
    ("shape", "boundary", "count", "max_search"),
    [
        ((3,), "periodic", 1, 400),  # n - 2 = 1 = count: ARPACK would be asked for k = 0
        ((3,), "reflecting", 1, 400),
        ((4,), "periodic", 2, 400),  # search = count: one of a conjugate pair at the cut
        ((5,), "reflecting", 3, 400),
        ((60,), "periodic", 1, 1),  # max_search = modes = 1 on a conserving chain
        ((60,), "absorbing", 1, 1),
    ],
)
def test_shift_invert_smallest_searches(backend, shape, boundary, count, max_search):
    # Mild bias off the ring: a chain of 60 with walls and u/v = 1.3/0.4 has an eigenvector
    # condition near 1e15 (module CASES), far beyond what this test is about.
    rates = ((1.3,), (0.4,)) if boundary == "periodic" else ((1.0,), (0.8,))
    model = LatticeWalk(shape, (boundary,), *rates)
    W = reference_generator(shape, (boundary,), *rates)
    tol = tolerance_for(W)
    values = slowest_first(np.linalg.eigvals(W), tol)  # LAPACK, ordered by the README rule
    modes = backend.slowest_modes(backend.assemble(model), count, method="shift-invert",
                                  max_search=max_search)
    assert modes.values.size == count
    # Ordered slowest first, the first member of a cut conjugate pair included.
    np.testing.assert_allclose(modes.values, values[:count], atol=1e-9 * norm1(W))
    assert modes.certified or max_search == count


# ---------------------------------------------------------------------------------------
# Stationary inverse iteration on a slow chain (gap of the order of the shift).


def _slow_trap_ring(size=150_000):
    # Random traps on a symmetric ring: W = W0 diag(tau), so p ∝ 1/tau (p0 uniform; common
    # practice). The gap, about (2 pi / L)^2 / <1/tau> ~ 1.6e-9 here, is below the shift
    # 1e-9 x (largest exit rate 3), so inverse iteration contracts by only ~0.65 per step,
    # while the residual ||W p|| is blind to errors along the slow modes (it is tiny at once).
    disorder = Disorder("sites", "uniform", 0.5, 1.5, 0.5, 3)
    model = LatticeWalk((size,), ("periodic",), (1.0,), (1.0,), disorder)
    tau = disorder.factors(model.dims, np.arange(size))
    return model, (1 / tau) / (1 / tau).sum()


def test_stationary_inverse_iteration_converges_on_a_slow_chain(backend):
    model, expected = _slow_trap_ring()
    result = backend.stationary(backend.assemble(model), dense_limit=0)
    assert "inverse iteration" in result.method
    assert np.abs(result.distribution - expected).sum() <= 1e-9  # verify.tolerance default
    assert result.info["error_estimate"] <= 1e-9


def test_stationary_error_estimate_is_honest_when_steps_run_out(backend, monkeypatch):
    import pipeline.backends.inverse_iteration as iteration

    monkeypatch.setattr(iteration, "STATIONARY_MAX_STEPS", 6)
    model, expected = _slow_trap_ring()
    result = backend.stationary(backend.assemble(model), dense_limit=0)
    error = np.abs(result.distribution - expected).sum()
    assert error > 1e-6  # six steps are not enough here
    assert result.info["error_estimate"] >= error

"""The PETSc/SLEPc backend on one process: published spectra, agreement with the scipy
backend and dense LAPACK, the inertia certificate (including sets it must reject), the
iterative inner solve, PETSc options, and the assembled matrix against the reference."""

from __future__ import annotations

import numpy as np
import pytest

from pipeline.backends.scipy_ import ScipyBackend
from pipeline.errors import ConfigError, ModelError
from pipeline.models.base import Model, RowBlock
from pipeline.models.lattice import LatticeWalk

from .conftest import (
    matched_errors,
    multiset_distance,
    published_lattice_spectrum,
    reference_generator,
    slowest_set,
)

slepc_backend = pytest.importorskip("pipeline.backends.slepc_")
SlepcBackend = slepc_backend.SlepcBackend
pytestmark = pytest.mark.skipif(SlepcBackend.unavailable_reason() is not None,
                                reason=str(SlepcBackend.unavailable_reason()))

# name: (shape, boundary, forward, backward, modes)
CASES = {
    # Ring: lambda_q = -(u+v) + u e^{-iq} + v e^{iq} (circulant; Gray 2006, eq. 3.7).
    "ring-400": ((400,), ("periodic",), (1.3,), (0.4,), 9),
    # Reflecting chain: 0 and -(u+v) + 2 sqrt(uv) cos(pi k/L) (birth-death chain; from memory).
    # Mild bias: the eigenvector condition ~ (u/v)^(L/2) = 1.083^100 ~ 3e3 (common practice)
    # keeps rounding of the unbalanced problem far below the 1e-9 comparison.
    "reflecting-200": ((200,), ("reflecting",), (1.04,), (0.96,), 8),
    # Driven torus: Kronecker sum of two circulant spectra (Horn and Johnson 1991, Topics in
    # Matrix Analysis, 4.4): groups of 4 equal real parts, complex pairs with large Im.
    "driven-torus-48": ((48, 48), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8), 13),
}


@pytest.fixture(scope="module")
def solved():
    """Each case solved once by both backends (sparse methods)."""
    results = {}
    for name, (shape, boundary, forward, backward, modes) in CASES.items():
        model = LatticeWalk(shape, boundary, forward, backward)
        slepc = SlepcBackend()
        operator = slepc.assemble(model)
        ours = slepc.slowest_modes(operator, modes, method="shift-invert", tolerance=1e-12,
                                   vectors=True)
        stationary = slepc.stationary(operator)
        scipy_backend = ScipyBackend()
        scipy_operator = scipy_backend.assemble(model)
        reference = scipy_backend.slowest_modes(scipy_operator, modes, method="shift-invert")
        results[name] = (model, operator, ours, stationary, reference)
    return results


@pytest.mark.parametrize("name", list(CASES))
def test_matches_the_published_spectrum(solved, name):
    model, operator, modes, _, _ = solved[name]
    shape, boundary, forward, backward, count = CASES[name]
    exact = published_lattice_spectrum(shape, boundary, forward, backward)
    tol = 1e-9 * operator.check.norm1
    # The computed set is the exact slowest set with multiplicity (complete by value).
    expected = slowest_set(exact, count, tol)
    assert multiset_distance(modes.values, expected) <= 1e-9 * operator.check.norm1
    assert modes.certified, modes.certificate
    assert modes.residuals.max() <= 1e-9


@pytest.mark.parametrize("name", list(CASES))
def test_agrees_with_the_scipy_backend(solved, name):
    _, operator, modes, _, reference = solved[name]
    assert multiset_distance(modes.values, reference.values) <= 1e-9 * operator.check.norm1


@pytest.mark.parametrize("name", list(CASES))
def test_vectors_are_eigenvectors(solved, name):
    model, operator, modes, _, _ = solved[name]
    W = reference_generator(*CASES[name][:4])
    assert modes.vectors.shape == (model.n_states, modes.values.size)
    assert modes.vector_rows == (0, model.n_states)
    residual = W @ modes.vectors - modes.vectors * modes.values[None, :]
    assert np.abs(residual).max() <= 1e-8
    np.testing.assert_allclose(np.linalg.norm(modes.vectors, axis=0), 1.0, atol=1e-12)


@pytest.mark.parametrize("name", ["ring-400", "reflecting-200", "driven-torus-48"])
def test_stationary_law(solved, name):
    model, _, _, stationary, _ = solved[name]
    exact = model.exact().stationary(0, model.n_states)
    # Uniform on a ring/torus (doubly stochastic, common practice); reflecting chain:
    # p(x) ~ (u/v)^x (detailed balance; from memory).
    assert np.abs(stationary.distribution - exact).sum() <= 1e-10
    assert stationary.residual <= 1e-12
    assert stationary.rows == (0, model.n_states)


@pytest.mark.parametrize("name", list(CASES))
def test_normal_balanced_generators_take_the_symmetric_part_path(solved, name):
    """Rings, reversible chains and driven tori are normal after balancing by the stationary
    law (circulants and symmetric matrices are normal; Horn and Johnson 2013, 2.5)."""
    _, _, modes, _, _ = solved[name]
    assert modes.info["search"] == "symmetric part"


def test_reflecting_stationary_law_needs_a_real_solve(solved):
    _, _, _, stationary, _ = solved["reflecting-200"]
    assert "inverse iteration" in stationary.method  # W 1 != 0: not the uniform shortcut


def test_assembled_matrix_equals_the_reference():
    shape, boundary, forward, backward = (9, 7), ("periodic", "absorbing"), (1.2, 0.5), (0.3, 0.9)
    operator = SlepcBackend().assemble(LatticeWalk(shape, boundary, forward, backward))
    indptr, indices, data = operator.handle["W"].getValuesCSR()
    import scipy.sparse as sp

    W = sp.csr_matrix((data, indices, indptr), shape=(63, 63)).toarray()
    np.testing.assert_allclose(W, reference_generator(shape, boundary, forward, backward),
                               atol=1e-15)
    assert operator.check.conserving is False and operator.check.leak_rate_max > 0


def test_dense_method_matches_lapack():
    model = LatticeWalk((30,), ("reflecting",), (1.3,), (0.7,))
    W = reference_generator((30,), ("reflecting",), (1.3,), (0.7,))
    backend = SlepcBackend()
    modes = backend.slowest_modes(backend.assemble(model), 6, method="dense")
    exact = np.linalg.eigvals(W)  # numpy LAPACK reference
    assert matched_errors(modes.values, exact).max() <= 1e-12
    assert modes.certified


def test_certificate_rejects_a_set_with_a_missing_copy():
    """Drop one copy of a 4-fold group: the inertia count must see the missing direction
    (Haynsworth 1968 inertia additivity; the test is the claim of the certificate)."""
    from pipeline.backends.inertia_certificate import certify_by_inertia

    model = LatticeWalk((32, 32), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8))
    backend = SlepcBackend()
    operator = backend.assemble(model)
    modes = backend.slowest_modes(operator, 13, method="shift-invert", vectors=True)
    assert modes.certified
    values, vectors = modes.values, modes.vectors
    certificate = modes.certificate
    scaling = np.ones(model.n_states)  # the uniform law balances: D ~ I
    real_copy = int(np.flatnonzero((np.abs(values.imag) < 1e-12) & (values.real < -1e-9))[0])
    keep = np.arange(values.size) != real_copy
    rejected = certify_by_inertia(backend.world, operator.handle["W"], scaling, values[keep],
                                  vectors[:, keep], certificate["shift"])
    assert not rejected.certified
    assert rejected.missing == 1
    # One copy of a complex pair dropped: its conjugate still spans it, but the value list
    # is short of a copy, which must not pass either.
    complex_copy = int(np.flatnonzero(np.abs(values.imag) > 1e-9)[0])
    keep = np.arange(values.size) != complex_copy
    short = certify_by_inertia(backend.world, operator.handle["W"], scaling, values[keep],
                               vectors[:, keep], certificate["shift"])
    assert not short.certified and "conjugation" in short.note
    accepted = certify_by_inertia(backend.world, operator.handle["W"], scaling, values,
                                  vectors, certificate["shift"])
    assert accepted.certified and accepted.missing == 0


def test_certificate_rejects_a_nearest_first_set():
    """The 13 modes nearest 0 of a driven torus (what a plain shift-and-invert returns)
    are not the 13 slowest: the certificate must refuse them."""
    from pipeline.backends.inertia_certificate import certify_by_inertia

    size = 32  # still a torus where the 13 nearest 0 are not the 13 slowest (from memory:
    # the (+-2, 0) pair has |Im| = 0.4 sin(pi/8) and loses to (0, +-2) by modulus)
    model = LatticeWalk((size, size), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8))
    W = reference_generator((size, size), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8))
    values, vectors = np.linalg.eig(W)  # dense LAPACK reference
    nearest = np.argsort(np.abs(values))[:13]
    backend = SlepcBackend()
    operator = backend.assemble(model)
    shift = float(values[nearest].real.min()) * 1.01
    result = certify_by_inertia(backend.world, operator.handle["W"], np.ones(size * size),
                                values[nearest], vectors[:, nearest], shift)
    assert not result.certified and result.missing > 0


def test_iterative_inner_solve_finds_the_modes_but_does_not_certify():
    model = LatticeWalk((300,), ("periodic",), (1.3,), (0.4,))
    backend = SlepcBackend()
    backend.inner, backend.preconditioner = "iterative", "bjacobi"
    modes = backend.slowest_modes(backend.assemble(model), 5, method="shift-invert",
                                  tolerance=1e-10)
    exact = published_lattice_spectrum((300,), ("periodic",), (1.3,), (0.4,))
    assert matched_errors(modes.values, exact).max() <= 1e-8
    assert modes.certified is False
    assert "factorization" in modes.certificate["note"]
    assert modes.info["inner_solver"] == "iterative" and modes.info["pc_type"] == "bjacobi"


def test_petsc_options_reach_the_solver():
    from pipeline.config import SolveConfig

    backend = SlepcBackend()
    backend.configure(SolveConfig(petsc={"eps_ncv": 70}))
    # An absorbing chain (a sub-generator): the general Krylov–Schur path on W.
    modes = backend.slowest_modes(backend.assemble(LatticeWalk((500,), ("absorbing",), (1.0,),
                                                              (0.9,))),
                                  5, method="shift-invert")
    assert modes.info["search"] == "general"
    assert modes.info["rounds"][0]["ncv"] == 70
    assert modes.info["petsc_options"] == {"eps_ncv": "70"}


@pytest.mark.parametrize("text, field", [
    ('[solve.petsc]\n"-eps_ncv" = 3\n', "solve.petsc.-eps_ncv"),
    ("[solve.petsc]\neps_ncv = [1, 2]\n", "solve.petsc.eps_ncv"),
    ('[solve]\ninner = "gmres"\n', "solve.inner"),
    ('[solve]\npreconditioner = "ilu0"\n', "solve.preconditioner"),
])
def test_bad_solver_settings_name_the_field(text, field):
    import tomllib

    from pipeline.config import parse_config

    base = '[run]\nname = "t"\n[model]\ntype = "lattice"\nsize = 10\n'
    with pytest.raises(ConfigError) as error:
        parse_config(tomllib.loads(base + text), source="test.toml")
    message = str(error.value)
    assert message.startswith(field) and "\n" not in message


class _BrokenModel(Model):
    """A ring whose last row has a wrong entry (its column no longer sums to 0)."""

    def __init__(self):
        self.inner = LatticeWalk((64,), ("periodic",), (1.0,), (1.0,))

    @property
    def n_states(self):
        return 64

    @property
    def conserving(self):
        return True

    def row_block(self, start, stop):
        block = self.inner.row_block(start, stop)
        data = block.data.copy()
        if stop == 64:
            data[-2] = -1.0
        return RowBlock(block.start, block.stop, block.indptr, block.indices, data)

    def nnz_upper_bound(self, start, stop):
        return self.inner.nnz_upper_bound(start, stop)

    def state_labels(self, start, stop):
        return self.inner.state_labels(start, stop)

    def describe(self):
        return {"type": "broken"}


def test_bad_rows_give_a_model_error():
    with pytest.raises(ModelError):
        SlepcBackend().assemble(_BrokenModel())


def test_reducible_generator_is_searched_unbalanced():
    """Two closed classes and transient states (the stationary law is not unique and
    vanishes on the transient states): with ``irreducible = False`` the search keeps
    ``D = I`` and finds the slowest eigenvalues of the dense LAPACK spectrum (numpy.linalg
    .eigvals, the reference), the double 0 included; balancing by the noise of ``p`` on the
    transient states returned a spurious value here."""
    import scipy.sparse as sp

    from pipeline.models.matrix import UserMatrix

    from .test_mpi_classes import generator

    W, _ = generator()
    exact = sorted(np.linalg.eigvals(W), key=lambda z: (-z.real, z.imag))[:4]
    backend = SlepcBackend()
    operator = backend.assemble(UserMatrix(sp.csr_matrix(W)))
    operator.irreducible = False
    modes = backend.slowest_modes(operator, 4, method="shift-invert", tolerance=1e-10)
    np.testing.assert_allclose(np.sort_complex(modes.values), np.sort_complex(exact),
                               atol=1e-8)
    assert modes.residuals.max() <= 1e-8

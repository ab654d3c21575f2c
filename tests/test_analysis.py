"""Backend analysis operations against published formulas and dense numpy references.

Every check runs for each usable backend (names in ``pipeline.backends.BACKENDS`` whose
``unavailable_reason()`` is None), so a new backend inherits the whole contract.
"""

from __future__ import annotations

import itertools
import math

import networkx as nx
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
from scipy.special import ive

from pipeline.backends import BACKENDS, select_backend
from pipeline.errors import BackendError
from pipeline.models.lattice import Disorder, LatticeWalk
from pipeline.models.matrix import UserMatrix

from .conftest import dense_generator, reference_generator


def _usable_backends() -> list[str]:
    names = []
    for name in BACKENDS:
        try:
            select_backend(name)
        except BackendError:
            continue
        names.append(name)
    return names


@pytest.fixture(params=_usable_backends())
def backend(request, quiet):
    return select_backend(request.param)


def ring(size, u, v):
    return LatticeWalk((size,), ("periodic",), (u,), (v,))


def chain(size, boundary, u, v):
    return LatticeWalk((size,), (boundary,), (u,), (v,))


def dense_model(W: np.ndarray, conserving: bool = True) -> UserMatrix:
    """The matrix model on a dense test generator (``W[i, j]`` = rate j -> i)."""
    return UserMatrix(sp.csr_matrix(W), "test generator", conserving=conserving)


# ---------------------------------------------------------------------------------------
# Time evolution


@pytest.mark.parametrize("grid", [True, False])
def test_biased_ring_evolution_matches_bessel_solution(backend, grid):
    # Biased walk without wrap-around: p(r, t) = e^{-(u+v)t} (u/v)^{r/2} I_r(2t sqrt(uv))
    # (Feller 1971, An Introduction to Probability Theory, vol. 1 and vol. 2 II.7; classic),
    # with ive(r, z) = I_r(z) e^{-z} for numerical range.
    u, v, size, origin = 1.3, 0.7, 400, 200
    operator = backend.assemble(ring(size, u, v))
    times = np.array([0.0, 5.0, 10.0, 15.0, 20.0]) if grid else np.array([0.5, 3.0, 20.0])
    start = np.zeros(size)
    start[origin] = 1.0
    laws = backend.evolve(operator, start, times)
    r = np.arange(size) - origin
    for row, t in enumerate(times):
        z = 2 * t * math.sqrt(u * v)
        exact = ive(np.abs(r), z) * np.exp(z - (u + v) * t) * (u / v) ** (r / 2.0)
        if t == 0:
            exact = start
        np.testing.assert_allclose(laws[row], exact, atol=1e-13, rtol=0)


def test_biased_ring_evolution_reaches_the_gaussian_limit(backend):
    # Long times: mean (u - v) t and variance 2 D t with D = (u + v)/2 (exact for all t;
    # classic random-walk moments, Feller vol. 1), and a Gaussian density to O(1/sqrt(t))
    # (central limit theorem).
    u, v, size, origin, t = 1.3, 0.7, 600, 100, 150.0
    operator = backend.assemble(ring(size, u, v))
    start = np.zeros(size)
    start[origin] = 1.0
    p = backend.evolve(operator, start, np.array([t]))[0]
    r = np.arange(size) - origin
    mean = p @ r
    variance = p @ (r * r) - mean**2
    assert mean == pytest.approx((u - v) * t, rel=1e-10)
    assert variance == pytest.approx((u + v) * t, rel=1e-10)
    gauss = np.exp(-((r - (u - v) * t) ** 2) / (2 * (u + v) * t)) / math.sqrt(
        2 * math.pi * (u + v) * t)
    assert np.abs(p - gauss).max() < 0.05 * gauss.max()


# ---------------------------------------------------------------------------------------
# Currents and entropy production


def test_entropy_production_of_biased_ring(backend):
    # Uniform stationary law, net current (u - v)/L per bond: sigma = (u - v) ln(u/v)
    # (Schnakenberg 1976, Rev. Mod. Phys. 48, 571, eq. 7.6 on one cycle).
    u, v, size = 1.7, 0.4, 50
    operator = backend.assemble(ring(size, u, v))
    flows = backend.currents(operator, np.full(size, 1.0 / size))
    assert flows.entropy_production == pytest.approx((u - v) * math.log(u / v), rel=1e-12)
    np.testing.assert_allclose(flows.channel_current, [u - v, -(u - v)], rtol=1e-12)
    np.testing.assert_allclose(flows.channel_flux, [u, v], rtol=1e-12)
    assert flows.balance_defect == pytest.approx((u - v) / u, rel=1e-12)


def test_reflecting_chain_is_in_detailed_balance(backend):
    # A birth-death chain is reversible: zero currents and zero entropy production
    # (Kolmogorov's criterion; Kelly 1979, Reversibility and Stochastic Networks, 1.5).
    operator = backend.assemble(LatticeWalk((9, 7), ("reflecting", "reflecting"),
                                            (1.4, 0.5), (0.6, 0.9)))
    p = backend.stationary(operator).distribution
    flows = backend.currents(operator, p)
    assert flows.balance_defect < 1e-12
    assert abs(flows.entropy_production) < 1e-14
    np.testing.assert_allclose(flows.channel_current, 0.0, atol=1e-14)


def test_currents_match_a_dense_reference_with_disorder(backend):
    # J_ij = W_ij p_j - W_ji p_i summed per hop direction, from a dense matrix built by
    # loops in conftest, and the entropy production summed pair by pair (Schnakenberg 1976).
    disorder = Disorder("bonds", "uniform", 0.3, 2.0, 0.5, 7)
    shape, boundary = (5, 4), ("periodic", "reflecting")
    forward, backward = (1.2, 0.8), (0.5, 1.1)
    model = LatticeWalk(shape, boundary, forward, backward, disorder)
    W = reference_generator(shape, boundary, forward, backward, disorder)
    p = np.abs(np.random.default_rng(3).standard_normal(W.shape[0])) + 0.1
    p /= p.sum()
    flows = backend.currents(backend.assemble(model), p)
    F = W * p[None, :]
    np.fill_diagonal(F, 0.0)
    J = F - F.T
    coords = np.array(list(itertools.product(*map(range, shape))))
    expected = np.zeros(4)
    for i, j in zip(*np.nonzero(F), strict=True):
        axis = int(np.flatnonzero(coords[i] != coords[j])[0])
        step = (coords[i, axis] - coords[j, axis]) % shape[axis]
        expected[2 * axis + (0 if step == 1 else 1)] += J[i, j]
    np.testing.assert_allclose(flows.channel_current, expected, atol=1e-14)
    mask = F > 0
    sigma = 0.5 * np.sum(J[mask] * np.log(F[mask] / F.T[mask]))
    assert flows.entropy_production == pytest.approx(sigma, rel=1e-12)


# ---------------------------------------------------------------------------------------
# Reducibility


def two_closed_classes() -> np.ndarray:
    """Seven states: closed classes {0, 1, 2} (a biased cycle) and {3, 4}; 5 and 6 transient
    (6 -> 5 -> both classes). Built entry by entry: W[target, source] = rate."""
    rates = {(1, 0): 2.0, (2, 1): 1.5, (0, 2): 0.7, (0, 1): 0.3, (4, 3): 1.0, (3, 4): 2.5,
             (0, 5): 0.4, (3, 5): 0.9, (5, 6): 1.1, (4, 6): 0.2, (6, 5): 0.6}
    W = np.zeros((7, 7))
    for (target, source), rate in rates.items():
        W[target, source] += rate
        W[source, source] -= rate
    return W


def test_communicating_classes_match_networkx(backend):
    # Strongly connected components and closed (attracting) ones from networkx.
    W = two_closed_classes()
    classes = backend.communicating_classes(backend.assemble(dense_model(W)))
    graph = nx.DiGraph([(j, i) for i, j in zip(*np.nonzero(W), strict=True) if i != j])
    expected = {frozenset(c) for c in nx.strongly_connected_components(graph)}
    found = {frozenset(np.flatnonzero(classes.labels == k).tolist())
             for k in range(classes.count)}
    assert found == expected
    closed = {frozenset(np.flatnonzero(classes.labels == k).tolist())
              for k in np.flatnonzero(classes.closed)}
    attracting = {frozenset(c) for c in nx.attracting_components(graph)}
    assert closed == attracting == {frozenset({0, 1, 2}), frozenset({3, 4})}


def test_class_stationary_laws_match_dense_null_space(backend):
    # Each closed class has one stationary law: the element of the null space of W (numpy
    # SVD) that vanishes outside the class (common practice: null space of the generator).
    W = two_closed_classes()
    operator = backend.assemble(dense_model(W))
    classes = backend.communicating_classes(operator)
    _, singular, vh = np.linalg.svd(W)
    null = vh[singular < 1e-12 * singular.max()].T
    assert null.shape[1] == 2
    for label in np.flatnonzero(classes.closed):
        states = np.flatnonzero(classes.labels == label)
        result = backend.class_stationary(operator, states)
        outside = np.setdiff1d(np.arange(7), states)
        _, _, vh_out = np.linalg.svd(null[outside])
        exact = null @ vh_out[-1]
        exact /= exact.sum()
        np.testing.assert_allclose(result.distribution, exact[states], atol=1e-13)
        np.testing.assert_allclose(exact[outside], 0.0, atol=1e-13)
        assert result.residual < 1e-14


# ---------------------------------------------------------------------------------------
# Absorption


def test_mean_absorption_time_is_gamblers_ruin(backend):
    # Symmetric walk on sites 1..L, absorbed at 0 and L+1: from site x the expected number
    # of jumps is x (L + 1 - x) (Feller 1968, vol. 1, XIV.3, eq. 3.4 with p = q), each jump
    # taking 1/(u + v) on average, so E T_x = x (L + 1 - x) / (u + v).
    size, rate = 31, 0.8
    model = chain(size, "absorbing", rate, rate)
    operator = backend.assemble(model)
    tau, residual = backend.solve_transposed(operator, -np.ones(size))
    x = np.arange(1, size + 1)
    np.testing.assert_allclose(tau, x * (size + 1 - x) / (2 * rate), rtol=1e-11)
    assert tau[size // 2] == pytest.approx(16 * 16 / 1.6, rel=1e-12)
    assert residual[0] < 1e-14


def test_splitting_probabilities_are_the_ruin_probabilities(backend):
    # Biased walk, p = u/(u+v), q = v/(u+v): the chance to leave at the high end (L + 1)
    # before the low end (0) from site x is ((q/p)^x - 1) / ((q/p)^(L+1) - 1)
    # (Feller 1968, vol. 1, XIV.2, eq. 2.4).
    size, u, v = 20, 0.9, 0.6
    model = chain(size, "absorbing", u, v)
    operator = backend.assemble(model)
    exits = model.exit_rates(0, size)
    assert model.exit_names() == ("axis0-low", "axis0-high")
    splitting, residual = backend.solve_transposed(operator, -exits)
    ratio, x = v / u, np.arange(1, size + 1)
    high = (ratio**x - 1) / (ratio ** (size + 1) - 1)
    np.testing.assert_allclose(splitting[:, 1], high, rtol=1e-11)
    np.testing.assert_allclose(splitting.sum(axis=1), 1.0, rtol=1e-12)
    assert residual.max() < 1e-14


@pytest.mark.parametrize("kind", ["bonds", "sites"])
def test_exit_rates_add_up_to_the_leak(kind):
    # The leak of state j is -sum_i W[i, j] of the loop-built reference matrix (conftest).
    disorder = Disorder(kind, "lognormal", 0.5, 1.5, 0.6, 11)
    shape, boundary = (4, 5, 3), ("absorbing", "periodic", "absorbing")
    forward, backward = (1.0, 0.4, 0.7), (0.3, 1.2, 0.9)
    model = LatticeWalk(shape, boundary, forward, backward, disorder)
    W = reference_generator(shape, boundary, forward, backward, disorder)
    rates = np.vstack([model.exit_rates(a, b) for a, b in ((0, 17), (17, 60))])
    np.testing.assert_allclose(rates.sum(axis=1), -W.sum(axis=0), atol=1e-13)
    assert rates.shape[1] == 4


def test_solve_transposed_refuses_a_closed_class(backend):
    W = two_closed_classes()
    from pipeline.errors import SolverError

    with pytest.raises(SolverError, match="singular"):
        backend.solve_transposed(backend.assemble(dense_model(W)), -np.ones(7))


# ---------------------------------------------------------------------------------------
# Symmetrized solve of reversible chains


@pytest.mark.parametrize("dense_limit", [4096, 0])
def test_symmetrized_modes_match_general_path_and_dense(backend, dense_limit):
    # Reversible 2D chain: the spectrum of D^-1/2 W D^1/2 equals that of W (a similarity),
    # real; against numpy.linalg.eigvals of the dense W and the general solver path.
    model = LatticeWalk((14, 9), ("reflecting", "reflecting"), (1.3, 0.6), (0.7, 0.8))
    operator = backend.assemble(model)
    modes = backend.symmetric_slowest_modes(operator, 8, vectors=True,
                                            dense_limit=dense_limit)
    W = reference_generator((14, 9), ("reflecting", "reflecting"), (1.3, 0.6), (0.7, 0.8))
    dense = np.linalg.eigvals(W)
    dense = np.sort(dense.real)[::-1][:8]
    np.testing.assert_allclose(modes.values.real, dense, atol=1e-10)
    assert np.all(modes.values.imag == 0)
    general = backend.slowest_modes(operator, 8, method="shift-invert")
    np.testing.assert_allclose(modes.values.real, general.values.real, atol=1e-10)
    assert modes.residuals.max() < 1e-12
    assert modes.certified is (dense_limit > 0)
    residual = np.abs(W @ modes.vectors - modes.vectors * modes.values).max()
    assert residual < 1e-12


def test_inertia_certificate_counts_eigenvalues_above_threshold(backend):
    # Sylvester: eigenvalues of S above theta = positive pivots of S - theta I; compared with
    # scipy.linalg.eigvalsh of the dense symmetrized matrix, built with the birth-death law
    # p ∝ (u/v)^x (Kelly 1979, Reversibility and Stochastic Networks, 1.3).
    model = chain(40, "reflecting", 1.1, 0.6)
    operator = backend.assemble(model)
    p = (1.1 / 0.6) ** np.arange(40.0)
    modes = backend.symmetric_slowest_modes(operator, 5)
    threshold = modes.certificate["threshold"]
    root = np.sqrt(p)
    S = dense_generator(model) * root[None, :] / root[:, None]
    assert np.abs(S - S.T).max() < 1e-12
    assert int(np.sum(scipy.linalg.eigvalsh((S + S.T) / 2) > threshold)) == 5
    assert modes.certificate["count_above"] == 5 and modes.certified


# ---------------------------------------------------------------------------------------
# Model hook


def test_lattice_channels_from_coordinates():
    # Channel 2a for a hop toward +1 along axis a, 2a + 1 toward -1: against coordinates
    # compared entry by entry (size-3 ring: the wrap hops too).
    model = LatticeWalk((3, 4), ("periodic", "reflecting"), (1.0, 2.0), (0.5, 0.25))
    block = model.row_block(2, 11)
    channels = model.transition_channels(block)
    rows = np.repeat(np.arange(2, 11), np.diff(block.indptr))
    for row, column, channel in zip(rows, block.indices, channels, strict=True):
        if row == column:
            assert channel == -1
            continue
        target, source = np.unravel_index(row, (3, 4)), np.unravel_index(column, (3, 4))
        axis = int(np.flatnonzero(np.array(target) != np.array(source))[0])
        up = (target[axis] - source[axis]) % model.shape[axis] == 1
        assert channel == 2 * axis + (0 if up else 1)


def test_symmetrized_solve_of_a_strongly_biased_chain_is_accurate(backend):
    # p ∝ (u/v)^x spans 1e20 here, so a stationary vector accurate only in absolute terms
    # would ruin D^-1/2 W D^1/2; the spectrum against the published reflecting-chain values
    # 0 and -(u+v) + 2 sqrt(uv) cos(pi k / L) (Feller 1968, vol. 1, XVI.3; classic).
    size, u, v = 40, 1.3, 0.4
    operator = backend.assemble(chain(size, "reflecting", u, v))
    modes = backend.symmetric_slowest_modes(operator, 6)
    k = np.arange(1, 6)
    exact = np.concatenate([[0.0], -(u + v) + 2 * math.sqrt(u * v) * np.cos(np.pi * k / size)])
    np.testing.assert_allclose(modes.values.real, exact, atol=1e-13)
    assert modes.error_estimates.max() < 1e-12
    assert modes.info["skew_bound"] < 1e-13


@pytest.mark.parametrize("dense_limit", [4096, 0])
def test_mode_expansion_matches_krylov_and_dense_expm(backend, dense_limit):
    # p(t) = sum_k e^{lambda_k t} r_k (l_k . p0): with every mode (dense) it is exp(tW) p0
    # (scipy.linalg.expm of the dense W, Higham 2005 scaling and squaring); with the slowest
    # few it converges at long times, the error decaying like e^{Re lambda_count t}.
    model = LatticeWalk((12, 5), ("periodic", "reflecting"), (1.2, 0.7), (0.5, 0.9))
    operator = backend.assemble(model)
    n = model.n_states
    start = np.zeros(n)
    start[7] = 1.0
    times = np.array([0.0, 0.4, 3.0])
    dense = np.array([scipy.linalg.expm(t * dense_generator(model)) @ start
                      for t in times])
    krylov = backend.evolve(operator, start, times)
    np.testing.assert_allclose(krylov, dense, atol=1e-12)
    if dense_limit:
        full, _ = backend.mode_expansion(operator, n, start, times, dense_limit=dense_limit)
        np.testing.assert_allclose(full, dense, atol=1e-9)
    late = np.array([200.0])
    few, used = backend.mode_expansion(operator, 6, start, late, dense_limit=dense_limit)
    exact = scipy.linalg.expm(late[0] * dense_generator(model)) @ start
    bound = 10 * math.exp(used[-1].real * late[0])
    assert np.abs(few[0] - exact).sum() < max(bound, 1e-9)


def test_absorption_solve_reuses_the_eigensolver_lu(backend):
    # After a shift-invert solve the transposed solves refine with the LU of W - sigma I;
    # the result must still be the gambler's-ruin time x (L + 1 - x) / (u + v)
    # (Feller 1968, vol. 1, XIV.3).
    size, rate = 301, 0.5
    operator = backend.assemble(chain(size, "absorbing", rate, rate))
    backend.slowest_modes(operator, 3, method="shift-invert")
    tau, residual = backend.solve_transposed(operator, -np.ones(size))
    x = np.arange(1, size + 1)
    np.testing.assert_allclose(tau, x * (size + 1 - x) / (2 * rate), rtol=1e-10)
    assert residual[0] < 1e-13

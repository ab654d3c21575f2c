"""Exclusion process: ranking, row blocks against a hand-built generator, published results."""

from __future__ import annotations

import itertools
import math

import numpy as np
import pytest

from pipeline.analytic.exclusion import open_tasep_current
from pipeline.models.base import validate_block
from pipeline.models.exclusion import (
    ExclusionProcess,
    binomial_table,
    rank_patterns,
    unrank_patterns,
)
from pipeline.observables import stationary_expectations

from .conftest import write_config
from .model_helpers import available_backends, check_error, dense_W, rightmost, solve

BACKENDS = available_backends()


def ring_reference(L: int, N: int, p: float, q: float):
    """Ring generator by plain loops over configurations (listed in colex order by sorting
    on the sum of C(position, k)), with a dict of states: only for small tests."""
    configurations = [c for c in itertools.product((0, 1), repeat=L) if sum(c) == N]

    def colex(c):
        return sum(math.comb(x, k + 1) for k, x in enumerate(i for i in range(L) if c[i]))

    configurations.sort(key=colex)
    index = {c: i for i, c in enumerate(configurations)}
    W = np.zeros((len(configurations),) * 2)
    for c in configurations:
        for site in range(L):
            following = (site + 1) % L
            for a, b, rate in ((site, following, p), (following, site, q)):
                if c[a] == 1 and c[b] == 0:
                    d = list(c)
                    d[a], d[b] = 0, 1
                    W[index[tuple(d)], index[c]] += rate
                    W[index[c], index[c]] -= rate
    return W, configurations


def open_reference(L, p, q, alpha, beta, gamma, delta):
    """Open segment generator by loops over the 2^L patterns (bit c = site c)."""
    n = 2**L
    W = np.zeros((n, n))

    def jump(source, target, rate):
        W[target, source] += rate
        W[source, source] -= rate

    for s in range(n):
        def bit(c, s=s):
            return (s >> c) & 1

        for c in range(L - 1):
            if bit(c) and not bit(c + 1):
                jump(s, s ^ (3 << c), p)
            if not bit(c) and bit(c + 1):
                jump(s, s ^ (3 << c), q)
        jump(s, s ^ 1, gamma if bit(0) else alpha)
        jump(s, s ^ (1 << (L - 1)), beta if bit(L - 1) else delta)
    return W


@pytest.mark.parametrize("L,N", [(2, 1), (3, 1), (5, 2), (6, 3), (7, 4), (8, 0), (8, 8)])
def test_ring_rows_equal_the_hand_built_generator(L, N):
    model = ExclusionProcess(L, "periodic", 1.3, 0.4, particles=N)
    W_ref, configurations = ring_reference(L, N, 1.3, 0.4)
    n = model.n_states
    cuts = sorted({1, n // 3, n // 2} - {0, n}) if n > 2 else []
    W = dense_W(model, cuts)
    np.testing.assert_allclose(W, W_ref, atol=1e-14)
    assert model.row_block(0, model.n_states).nnz == model.nnz_count()  # stored entries
    assert model.nnz_count() <= model.nnz_upper_bound(0, n)
    patterns = model.patterns(0, n)
    expected = [sum(bit << c for c, bit in enumerate(conf)) for conf in configurations]
    assert patterns.tolist() == expected


def test_rank_unrank_round_trip_at_the_target_size():
    # C(26, 13) states; rank(unrank(r)) = r on a spread of ranks, and the patterns hold 13
    # bits below bit 26 (Knuth 2011, TAOCP 4A, 7.2.1.3: the combinatorial number system is a
    # bijection onto 0..C(n, k) - 1).
    table = binomial_table(26)
    ranks = np.unique(np.random.default_rng(3).integers(0, math.comb(26, 13), 200_000))
    ranks = np.concatenate([[0, math.comb(26, 13) - 1], ranks])
    patterns = unrank_patterns(ranks, 13, table)
    assert (np.bitwise_count(patterns) == 13).all() and (patterns < 2**26).all()
    np.testing.assert_array_equal(rank_patterns(patterns, 26, table), ranks)
    assert (np.diff(patterns[2:].astype(np.int64)) > 0).all()  # colex order = numeric order


@pytest.mark.parametrize("L", [2, 3, 6])
def test_open_rows_equal_the_hand_built_generator(L):
    rates = dict(alpha=0.7, beta=0.5, gamma=0.2, delta=0.1)
    model = ExclusionProcess(L, "open", 1.0, 0.3, **rates)
    W = dense_W(model, [1, 2**L // 2 + 1])
    np.testing.assert_allclose(W, open_reference(L, 1.0, 0.3, 0.7, 0.5, 0.2, 0.1), atol=1e-14)
    assert model.row_block(0, model.n_states).nnz == model.nnz_count()  # stored entries


def test_blocks_are_valid_and_independent_of_cuts():
    model = ExclusionProcess(10, "periodic", 1.0, 0.5, particles=4)
    whole = dense_W(model)
    validate_block(model.row_block(0, model.n_states), model.n_states)
    np.testing.assert_array_equal(dense_W(model, [7, 8, 100, 150]), whole)


@pytest.mark.parametrize("backend_name", BACKENDS)
@pytest.mark.parametrize("L,N", [(10, 5), (9, 3)])
def test_symmetric_ring_gap_and_uniform_law(backend_name, L, N):
    # Caputo, Liggett and Richthammer 2010, Proof of Aldous' spectral gap conjecture,
    # Thm 1.1: the gap of symmetric exclusion is the one-particle gap 2 p (1 - cos(2 pi / L)).
    # Liggett 1985, Interacting Particle Systems, ch. VIII: uniform law on C(L, N).
    p = 0.7
    model = ExclusionProcess(L, "periodic", p, p, particles=N)
    modes, stationary, _ = solve(backend_name, model, 4, method="shift-invert")
    gap = -modes.values[1].real
    assert gap == pytest.approx(2 * p * (1 - math.cos(2 * math.pi / L)), rel=1e-10)
    dense = rightmost(dense_W(model), 4)
    np.testing.assert_allclose(np.sort(modes.values.real), np.sort(dense.real), atol=1e-10)
    np.testing.assert_allclose(stationary.distribution, 1 / math.comb(L, N), atol=1e-13)


@pytest.mark.parametrize("backend_name", BACKENDS)
def test_tasep_ring_uniform_law_and_current(backend_name):
    # Totally asymmetric ring: uniform stationary law and current N (L - N) / (L (L - 1))
    # per bond (textbook result; e.g. Derrida 1998, Phys. Rep. 301, 65, sec. 2).
    L, N, p = 11, 4, 1.5
    model = ExclusionProcess(L, "periodic", p, 0.0, particles=N)
    _, stationary, _ = solve(backend_name, model, 2, method="dense", dense_limit=400)
    np.testing.assert_allclose(stationary.distribution, 1 / model.n_states, atol=1e-13)
    observed = stationary_expectations(model, stationary.distribution, block=37)
    np.testing.assert_allclose(observed["current"][1], p * N * (L - N) / (L * (L - 1)),
                               rtol=1e-12)
    np.testing.assert_allclose(observed["density"][1], N / L, rtol=1e-12)


def catalan(k: int) -> int:
    return math.comb(2 * k, k) // (k + 1)


@pytest.mark.parametrize("backend_name", BACKENDS)
@pytest.mark.parametrize("L", [4, 7, 9])
def test_open_tasep_catalan_current(backend_name, L):
    # Derrida, Evans, Hakim and Pasquier 1993, J. Phys. A 26, 1493: for alpha = beta = 1 the
    # current is J_L = C_L / C_{L+1} (Catalan numbers), the same on every bond.
    model = ExclusionProcess(L, "open", 1.0, 0.0, alpha=1.0, beta=1.0)
    _, stationary, _ = solve(backend_name, model, 2, method="shift-invert")
    current = stationary_expectations(model, stationary.distribution)["current"][1]
    np.testing.assert_allclose(current, catalan(L) / catalan(L + 1), rtol=1e-10)


@pytest.mark.parametrize("alpha,beta,p", [(0.3, 0.7, 1.0), (0.8, 0.2, 1.5), (0.5, 0.5, 1.0)])
def test_open_tasep_current_formula_against_dense_solves(alpha, beta, p):
    # Derrida, Evans, Hakim and Pasquier 1993, eq. (39) (from memory) against the dense
    # null vector of the hand-built generator (numpy.linalg.solve with a normalization row).
    L = 7
    W = open_reference(L, p, 0.0, alpha, beta, 0.0, 0.0)
    A = W.copy()
    A[-1] = 1.0
    rhs = np.zeros(len(A))
    rhs[-1] = 1.0
    law = np.linalg.solve(A, rhs)
    model = ExclusionProcess(L, "open", p, 0.0, alpha=alpha, beta=beta)
    current = stationary_expectations(model, law)["current"][1]
    np.testing.assert_allclose(current, open_tasep_current(L, p, alpha, beta), rtol=1e-10)
    np.testing.assert_allclose(current, current[0], rtol=1e-10)  # one current on every bond


def test_krylov_method_on_a_symmetric_ring_is_honest():
    # The Krylov method finds the gap (Caputo et al. 2010) but never claims completeness.
    L, N = 12, 6
    model = ExclusionProcess(L, "periodic", 1.0, 1.0, particles=N)
    modes, stationary, _ = solve("scipy", model, 4, method="krylov")
    assert not modes.certified and "NOT CERTIFIED" in modes.certificate["note"]
    assert -modes.values[1].real == pytest.approx(2 * (1 - math.cos(2 * math.pi / L)),
                                                  rel=1e-9)
    np.testing.assert_allclose(stationary.distribution, 1 / model.n_states, atol=1e-12)


def test_verify_stage_checks_gap_and_observables(tmp_path, quiet):
    from pipeline.config import load_config
    from pipeline.stages.runner import run_pipeline
    from pipeline.store import Store

    path = write_config(tmp_path, "ring", """
[model]
type = "exclusion"
sites = 9
particles = 4
right = 0.5
left = 0.5
[solve]
modes = 4
""")
    outcome = run_pipeline(load_config(path), store_path=str(tmp_path / "s.zarr"))
    assert outcome.verified
    store = Store(tmp_path / "s.zarr")
    checks = {c["name"]: c for c in store.group("ring", "verify").attrs["checks"]}
    assert {"spectrum.gap", "stationary.exact", "stationary.current",
            "stationary.density"} <= set(checks)
    stationary = store.group("ring", "stationary")
    np.testing.assert_allclose(stationary["density"][:], 4 / 9, rtol=1e-12)


@pytest.mark.parametrize("fields,fragment", [
    ("sites = 8\nparticles = 9", "model.particles"),
    ("sites = 8", "model.particles: missing"),
    ("sites = 8\nboundary = \"open\"\nparticles = 3", "model.particles: only for"),
    ("sites = 8\nparticles = 3\nalpha = 1.0", "model.alpha: only for"),
    ("sites = 8\nparticles = 3\nright = 0\nleft = 0", "model.right, model.left"),
    ("sites = 8\nparticles = 3\nright = -1", "model.right"),
    ("sites = 1\nparticles = 1", "model.sites"),
])
def test_bad_exclusion_input_is_one_line(tmp_path, capsys, fields, fragment):
    path = write_config(tmp_path, "bad", f"[model]\ntype = \"exclusion\"\n{fields}\n")
    check_error(capsys, path, fragment)


def test_krylov_method_on_a_driven_ring_matches_dense():
    # Nonsymmetric W: the Arnoldi variant (which='LR') against numpy.linalg.eigvals.
    model = ExclusionProcess(10, "periodic", 1.0, 0.3, particles=4)
    modes, stationary, _ = solve("scipy", model, 3, method="krylov")
    assert not modes.certified and modes.condition is None
    dense = rightmost(dense_W(model), 3)
    np.testing.assert_allclose(np.sort_complex(modes.values), np.sort_complex(dense), atol=1e-8)
    np.testing.assert_allclose(stationary.distribution, 1 / model.n_states, atol=1e-10)


def test_large_rings_warn_about_lu_fill_in():
    assert ExclusionProcess(26, "periodic", 1.0, 1.0, particles=13).warnings()
    assert not ExclusionProcess(10, "periodic", 1.0, 1.0, particles=5).warnings()

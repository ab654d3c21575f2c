"""LatticeWalk: row blocks against slow references, conservation, nnz, disorder."""

from __future__ import annotations

import math

import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp

from pipeline.errors import ModelError
from pipeline.models.base import RowBlock, validate_block
from pipeline.models.lattice import Disorder, LatticeWalk

from .conftest import dense_generator, kron_sum_generator, reference_generator, reference_rows

# (shape, boundary, forward, backward): every boundary kind, mixed boundaries, size-2 periodic
# axes, one-way rates (forward or backward 0).
CASES = {
    "ring": ((7,), ("periodic",), (1.3,), (0.4,)),
    "reflecting": ((7,), ("reflecting",), (1.3,), (0.4,)),
    "absorbing": ((7,), ("absorbing",), (0.9,), (1.1,)),
    "ring-2": ((2,), ("periodic",), (1.3,), (0.4,)),
    "reflecting-2": ((2,), ("reflecting",), (1.3,), (0.4,)),
    "ring-one-way": ((6,), ("periodic",), (1.0,), (0.0,)),
    "reflecting-one-way": ((6,), ("reflecting",), (0.0,), (0.7,)),
    "absorbing-one-way": ((6,), ("absorbing",), (1.2,), (0.0,)),
    "2d-torus": ((4, 5), ("periodic", "periodic"), (1.0, 0.8), (0.6, 0.8)),
    "2d-mixed": ((4, 5), ("periodic", "reflecting"), (1.1, 0.3), (0.5, 0.9)),
    "2d-ring2-absorbing": ((2, 3), ("periodic", "absorbing"), (1.5, 0.7), (0.5, 0.2)),
    "3d-mixed": ((3, 4, 5), ("periodic", "reflecting", "absorbing"), (1.0, 1.2, 0.9),
                 (0.7, 0.8, 1.1)),
    "3d-ring2-one-way": ((2, 2, 3), ("periodic", "periodic", "reflecting"), (1.0, 0.0, 0.4),
                         (0.3, 0.6, 0.0)),
    "3d-absorbing-one-way": ((4, 3, 2), ("absorbing", "reflecting", "periodic"),
                             (0.0, 0.5, 1.0), (0.8, 0.5, 0.0)),
}

DISORDERS = {
    "bonds-uniform": Disorder("bonds", "uniform", 0.5, 1.5, 0.5, 7),
    "bonds-lognormal": Disorder("bonds", "lognormal", 0.5, 1.5, 0.8, 7),
    "sites-uniform": Disorder("sites", "uniform", 0.2, 3.0, 0.5, 11),
    "sites-lognormal": Disorder("sites", "lognormal", 0.5, 1.5, 0.8, 11),
}


def model_for(case: str, disorder: Disorder | None = None) -> LatticeWalk:
    shape, boundary, forward, backward = CASES[case]
    return LatticeWalk(shape, boundary, forward, backward, disorder)


def partitions(n: int) -> list[list[int]]:
    """Cut points: one block, 1-row blocks, uneven blocks, a 1-row block at each end."""
    cuts = [[], list(range(1, n)), [1, n - 1] if n > 2 else [1]]
    uneven, position, step = [], 0, 1
    while position + step < n:
        position += step
        uneven.append(position)
        step = step % 5 + 2
    cuts.append(uneven)
    return [sorted(set(c)) for c in cuts]


@pytest.mark.parametrize("case", sorted(CASES))
def test_row_blocks_concatenate_to_the_whole_matrix(case):
    model = model_for(case)
    whole = dense_generator(model)
    for cuts in partitions(model.n_states):
        assert np.array_equal(dense_generator(model, cuts), whole), cuts


@pytest.mark.parametrize("case", sorted(CASES))
def test_matrix_equals_slow_reference(case):
    shape, boundary, forward, backward = CASES[case]
    model = model_for(case)
    W = dense_generator(model)
    loops = reference_generator(shape, boundary, forward, backward)
    np.testing.assert_allclose(W, loops, rtol=0, atol=1e-15)
    # Second, independent reference: Kronecker sum of hand-built 1D generators
    # (Horn and Johnson 1991, Topics in Matrix Analysis, 4.4).
    np.testing.assert_allclose(W, kron_sum_generator(shape, boundary, forward, backward),
                               rtol=0, atol=1e-15)


@pytest.mark.parametrize("case", sorted(CASES))
def test_column_sums(case):
    shape, boundary, forward, backward = CASES[case]
    model = model_for(case)
    W = dense_generator(model)
    sums = W.sum(axis=0)
    off = W - np.diag(np.diag(W))
    assert (off >= 0).all()
    assert model.conserving == ("absorbing" not in boundary)
    if model.conserving:
        # Columns of a conserving generator sum to zero (definition, common practice).
        np.testing.assert_allclose(sums, 0.0, atol=1e-14)
        return
    # With absorbing axes: column sum = -(rates of the hops off an absorbing edge).
    expected = np.zeros(model.n_states)
    for state in range(model.n_states):
        x = np.unravel_index(state, shape)
        for axis, kind in enumerate(boundary):
            if kind != "absorbing":
                continue
            if x[axis] == shape[axis] - 1:
                expected[state] -= forward[axis]
            if x[axis] == 0:
                expected[state] -= backward[axis]
    assert (sums <= 1e-14).all()
    np.testing.assert_allclose(sums, expected, atol=1e-14)


@pytest.mark.parametrize("case", sorted(CASES))
def test_nnz_count_is_the_stored_count(case):
    shape, boundary, forward, backward = CASES[case]
    model = model_for(case)
    stored = sum(model.row_block(start, min(start + 5, model.n_states)).nnz
                 for start in range(0, model.n_states, 5))
    block = model.row_block(0, model.n_states)
    assert model.nnz_count() == stored == block.nnz
    rows = np.repeat(np.arange(model.n_states), np.diff(block.indptr))
    off_diagonal = block.indices != rows
    assert (block.data[off_diagonal] != 0).all(), "zero rates are stored"
    # Against the reference: nonzero off-diagonals plus the always-stored diagonal.
    reference = reference_generator(shape, boundary, forward, backward)
    off = reference - np.diag(np.diag(reference))
    assert model.nnz_count() == np.count_nonzero(off) + model.n_states
    assert model.nnz_count() <= model.nnz_upper_bound(0, model.n_states)


@pytest.mark.parametrize("case", sorted(CASES))
def test_incoming_side_reference_agrees(case):
    # The two hand-written references (outgoing loop, incoming loop) agree with each other.
    shape, boundary, forward, backward = CASES[case]
    n = math.prod(shape)
    rows = reference_rows(shape, boundary, forward, backward, range(n)).toarray()
    np.testing.assert_allclose(rows, reference_generator(shape, boundary, forward, backward),
                               atol=1e-15)
    disorder = DISORDERS["bonds-lognormal"]
    rows = reference_rows(shape, boundary, forward, backward, range(n), disorder).toarray()
    np.testing.assert_allclose(
        rows, reference_generator(shape, boundary, forward, backward, disorder), rtol=1e-14,
        atol=1e-15)


BIG = {
    "3d-mixed": ((40, 30, 20), ("periodic", "reflecting", "absorbing"), (1.0, 1.2, 0.9),
                 (0.7, 0.8, 1.1)),
    "3d-one-way-ring2": ((30, 2, 25), ("reflecting", "periodic", "periodic"), (0.0, 1.0, 0.4),
                         (0.9, 0.0, 0.6)),
    "2d-reflecting": ((150, 160), ("reflecting", "reflecting"), (1.3, 0.5), (0.4, 0.0)),
}
WINDOWS = [(0, 1), (1, 700), (599, 1801), (1234, 2345), (5999, 6001), (23_999, 24_000)]


def _window_model(parameters, disorder):
    """(disorder law, model, state count) of a lattice used only through row windows."""
    law = None if disorder is None else DISORDERS[disorder]
    model = LatticeWalk(*parameters, law)
    return law, model, model.n_states


@pytest.mark.parametrize("disorder", [None, "bonds-uniform", "sites-lognormal"])
@pytest.mark.parametrize("case", sorted(BIG))
def test_blocks_of_a_large_lattice_against_reference_rows(case, disorder):
    # Blocks that start and stop inside runs of edge states, on lattices too large for a
    # dense reference: each block against the incoming-side reference of the same rows.
    shape, boundary, forward, backward = BIG[case]
    law, model, n = _window_model(BIG[case], disorder)
    for start, stop in WINDOWS:
        if start >= n:
            continue
        stop = min(stop, n)
        block = model.row_block(start, stop)
        got = sp.csr_matrix((block.data, block.indices, block.indptr), shape=(stop - start, n))
        expected = reference_rows(shape, boundary, forward, backward, range(start, stop), law)
        difference = abs(got - expected)
        assert difference.max() <= 1e-14 * max(1.0, abs(expected).max()), (start, stop)
        # Zero rates are not stored; the diagonal always is.
        coo = expected.tocoo()
        off_diagonal = (coo.col != coo.row + start) & (coo.data != 0)
        assert block.nnz == int(off_diagonal.sum()) + (stop - start)


HUGE = {
    # 2^31 + 5 sites: the column indices no longer fit int32 (2^31 - 1, common practice).
    "ring-2^31+5": ((2**31 + 5,), ("periodic",), (1.0,), (0.5,)),
    # 10^9 sites, 7 nonzeros per row: 7e9 > 2^31 - 1.
    "cube-1000": ((1000, 1000, 1000), ("periodic", "reflecting", "absorbing"), (1.0, 0.6, 0.9),
                  (0.5, 0.8, 1.1)),
}
HUGE_WINDOWS = [(0, 3), (1 << 20, (1 << 20) + 2), (2**31 - 2, 2**31 + 2), (-3, None)]


def _entries(matrix: sp.csr_matrix) -> dict[tuple[int, int], float]:
    # Entry by entry: sparse arithmetic on 10^9 columns would allocate per column.
    coo = matrix.tocoo()
    out: dict[tuple[int, int], float] = {}
    for row, col, value in zip(coo.row.tolist(), coo.col.tolist(), coo.data.tolist(),
                               strict=True):
        out[row, col] = out.get((row, col), 0.0) + value
    return out


@pytest.mark.parametrize("disorder", [None, "bonds-uniform", "sites-lognormal"])
@pytest.mark.parametrize("case", sorted(HUGE))
def test_windows_of_a_huge_lattice_use_64_bit_indices(case, disorder):
    # Rows of lattices far too large to assemble, against the incoming-side reference of the
    # same rows; the window across state 2^31 exercises indices past the int32 range.
    shape, boundary, forward, backward = HUGE[case]
    law, model, n = _window_model(HUGE[case], disorder)
    for start, stop in HUGE_WINDOWS:
        start, stop = (n + start, n) if stop is None else (start, min(stop, n))
        if start >= stop:
            continue
        block = model.row_block(start, stop)
        assert block.indices.dtype == np.int64
        got = sp.csr_matrix((block.data, block.indices, block.indptr), shape=(stop - start, n))
        expected = reference_rows(shape, boundary, forward, backward, range(start, stop), law)
        got, expected = _entries(got), _entries(expected)
        assert got.keys() == {key for key, value in expected.items()
                              if value != 0 or key[1] == key[0] + start}, (start, stop)
        for key, value in expected.items():
            assert got.get(key, 0.0) == pytest.approx(value, rel=1e-14, abs=0), (key, start)


def test_nnz_count_large_lattice_without_assembling_everything():
    model = LatticeWalk((30, 2, 17), ("absorbing", "periodic", "reflecting"), (1.0, 0.5, 0.0),
                        (0.2, 0.5, 0.9))
    n = model.n_states
    assert model.nnz_count() == sum(model.row_block(s, min(s + 97, n)).nnz
                                    for s in range(0, n, 97))


def test_state_numbering_is_c_order():
    model = LatticeWalk((3, 4, 5), ("periodic",) * 3, (1.0,) * 3, (1.0,) * 3)
    coordinates = model.coordinates(0, model.n_states)
    for state, x in enumerate(coordinates):
        assert state == x[0] * 20 + x[1] * 5 + x[2]


# ---------------------------------------------------------------------------------------
# Disorder


@pytest.mark.parametrize("kind", sorted(DISORDERS))
@pytest.mark.parametrize("case", ["3d-mixed", "2d-ring2-absorbing", "2d-torus", "ring-2"])
def test_disorder_matches_reference_and_block_partition(case, kind):
    shape, boundary, forward, backward = CASES[case]
    model = model_for(case, DISORDERS[kind])
    W = dense_generator(model)
    np.testing.assert_allclose(W, reference_generator(shape, boundary, forward, backward,
                                                      DISORDERS[kind]), rtol=1e-15, atol=0)
    for cuts in partitions(model.n_states):
        assert np.array_equal(dense_generator(model, cuts), W), cuts
    # A block asked alone equals the same rows of the whole matrix.
    n = model.n_states
    for start, stop in ((n // 3, n // 2 + 1), (n - 1, n), (0, 1)):
        part = dense_generator_rows(model, start, stop)
        assert np.array_equal(part, W[start:stop])
    if model.conserving:
        np.testing.assert_allclose(W.sum(axis=0), 0.0, atol=1e-13)
    else:
        assert (W.sum(axis=0) <= 1e-13).all()
    assert model.nnz_count() == model.row_block(0, n).nnz


def dense_generator_rows(model, start, stop):
    block = model.row_block(start, stop)
    rows = np.zeros((stop - start, model.n_states))
    for row in range(stop - start):
        for entry in range(block.indptr[row], block.indptr[row + 1]):
            rows[row, block.indices[entry]] += block.data[entry]
    return rows


@pytest.mark.parametrize("on", ["bonds", "sites"])
def test_disorder_independent_of_blocks_across_chunks(on):
    # 75 000 sites: more than one 65 536-site chunk of random factors. Rows near the chunk
    # border, asked in different blocks, must agree exactly.
    disorder = Disorder(on, "lognormal", 0.5, 1.5, 0.6, 3)
    model = LatticeWalk((300, 250), ("periodic", "absorbing"), (1.0, 0.7), (0.4, 0.9), disorder)
    wide = dense_generator_rows(model, 65000, 66100)
    for start, stop in ((65530, 65545), (65536, 65537), (65535, 65536), (66000, 66100)):
        assert np.array_equal(dense_generator_rows(model, start, stop),
                              wide[start - 65000 : stop - 65000])


@pytest.mark.parametrize("kind", sorted(DISORDERS))
def test_disorder_reproducible_and_seed_dependent(kind):
    base = DISORDERS[kind]
    shape, boundary, forward, backward = CASES["3d-mixed"]
    same = [LatticeWalk(shape, boundary, forward, backward, base) for _ in range(2)]
    blocks = [m.row_block(0, m.n_states) for m in same]
    assert np.array_equal(blocks[0].data, blocks[1].data)
    assert np.array_equal(blocks[0].indices, blocks[1].indices)
    other = Disorder(base.on, base.law, base.low, base.high, base.sigma, base.seed + 1)
    different = LatticeWalk(shape, boundary, forward, backward, other).row_block(0, 60)
    assert different.data.shape == blocks[0].data.shape
    assert not np.allclose(different.data, blocks[0].data)


def test_disorder_laws():
    sites = np.arange(200_000)
    uniform = Disorder("bonds", "uniform", 0.3, 2.0, 0.5, 5).factors(0, sites)
    assert uniform.min() >= 0.3 and uniform.max() <= 2.0
    # Uniform law on [a, b]: mean (a + b) / 2, variance (b - a)^2 / 12 (common practice).
    assert abs(uniform.mean() - 1.15) < 0.01
    assert abs(uniform.var() - 1.7**2 / 12) < 0.01
    lognormal = Disorder("sites", "lognormal", 0.5, 1.5, 0.8, 5).factors(0, sites)
    assert (lognormal > 0).all()
    # ln(factor) ~ N(0, sigma^2): median 1 (schema of model.disorder.sigma).
    assert abs(np.log(lognormal).mean()) < 0.01
    assert abs(np.log(lognormal).std() - 0.8) < 0.01
    # Different streams are different draws.
    assert not np.allclose(Disorder("bonds", "uniform", 0.3, 2.0, 0.5, 5).factors(1, sites),
                           uniform)


@pytest.mark.parametrize(
    ("shape", "boundary", "forward", "backward"),
    [
        ((6, 5), ("periodic", "periodic"), (1.0, 1.0), (1.0, 1.0)),
        ((5, 4), ("periodic", "reflecting"), (1.3, 0.9), (0.4, 0.6)),
        ((9,), ("reflecting",), (1.2,), (0.8,)),
    ],
)
@pytest.mark.parametrize("law", ["uniform", "lognormal"])
def test_random_traps_stationary_law(shape, boundary, forward, backward, law):
    # Random traps: every hop out of y is scaled by tau_y, so W = W0 diag(tau) and the
    # stationary law is p0 / tau, normalized (common practice).
    disorder = Disorder("sites", law, 0.2, 3.0, 0.9, 21)
    model = LatticeWalk(shape, boundary, forward, backward, disorder)
    W = dense_generator(model)
    W0 = kron_sum_generator(shape, boundary, forward, backward)
    tau = model.trap_factors(0, model.n_states)
    np.testing.assert_allclose(W, W0 @ np.diag(tau), rtol=1e-14, atol=1e-15)
    null = scipy.linalg.null_space(W, rcond=1e-10)
    assert null.shape[1] == 1
    p = null[:, 0] / null[:, 0].sum()
    # p0 from the ordered walk's own null space (Perron vector), written independently.
    null0 = scipy.linalg.null_space(W0, rcond=1e-10)
    p0 = null0[:, 0] / null0[:, 0].sum()
    expected = p0 / tau
    expected /= expected.sum()
    np.testing.assert_allclose(p, expected, rtol=1e-9, atol=1e-14)


@pytest.mark.parametrize("law", ["uniform", "lognormal"])
@pytest.mark.parametrize("shape", [(12,), (5, 6), (2, 7)])
def test_random_barriers_symmetric_ring_uniform_law(shape, law):
    # Random barriers with equal rates both ways: a bond's two hop rates are equal, so W is
    # symmetric; its rows then sum to zero like its columns and the uniform law is stationary
    # (common practice).
    dims = len(shape)
    disorder = Disorder("bonds", law, 0.3, 1.7, 0.9, 4)
    model = LatticeWalk(shape, ("periodic",) * dims, (0.8,) * dims, (0.8,) * dims, disorder)
    W = dense_generator(model)
    np.testing.assert_array_equal(W, W.T)
    assert np.ptp(np.diag(W)) > 0  # the disorder really varies the rates
    null = scipy.linalg.null_space(W, rcond=1e-10)
    assert null.shape[1] == 1
    p = null[:, 0] / null[:, 0].sum()
    np.testing.assert_allclose(p, 1.0 / math.prod(shape), rtol=1e-10)


def test_random_barriers_reflecting_keep_detailed_balance():
    # Along a reflecting axis, a bond's factor scales both directions: detailed balance
    # p(x) u f = p(x + 1) v f still holds with p ∝ (u/v)^x (Kelly 1979, Reversibility and
    # Stochastic Networks, ch. 1; from memory).
    disorder = Disorder("bonds", "lognormal", 0.5, 1.5, 1.0, 9)
    model = LatticeWalk((10,), ("reflecting",), (1.3,), (0.7,), disorder)
    W = dense_generator(model)
    null = scipy.linalg.null_space(W, rcond=1e-10)
    p = null[:, 0] / null[:, 0].sum()
    expected = (1.3 / 0.7) ** np.arange(10)
    np.testing.assert_allclose(p, expected / expected.sum(), rtol=1e-9)


# ---------------------------------------------------------------------------------------
# validate_block


def _block(data, indices, indptr, start=0):
    indptr = np.asarray(indptr, dtype=np.int64)
    return RowBlock(start, start + indptr.size - 1, indptr, np.asarray(indices, dtype=np.int64),
                    np.asarray(data, dtype=np.float64))


def test_validate_block_accepts_a_good_block():
    model = model_for("3d-mixed")
    block = model.row_block(10, 30)
    largest = validate_block(block, model.n_states)
    W = dense_generator(model)
    assert largest == pytest.approx(float(-np.diag(W)[10:30].min()), rel=1e-15)


def test_validate_block_rejects_negative_off_diagonal():
    # Rows 2..3 of a 4-state matrix; W[3, 1] = -0.5 is a negative off-diagonal rate.
    block = _block([0.5, -1.0, -0.5, -1.0], [1, 2, 1, 3], [0, 2, 4], start=2)
    with pytest.raises(ModelError, match=r"W\[3, 1\] = -0\.5: off-diagonal rates must be >= 0"):
        validate_block(block, 4)


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_validate_block_rejects_non_finite_rate(bad):
    block = _block([-1.0, 1.0, bad, -1.0], [0, 1, 0, 1], [0, 2, 4])
    with pytest.raises(ModelError, match=r"state 1: rate is not finite"):
        validate_block(block, 2)


def test_validate_block_rejects_out_of_range_column():
    block = _block([-1.0, 1.0], [0, 5], [0, 2])
    with pytest.raises(ModelError, match=r"column index out of range"):
        validate_block(block, 3)

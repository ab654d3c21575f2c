"""Several closed classes under a real ``mpiexec -n 2`` on the slepc backend: communicating
classes against networkx, one stationary law per closed class against a dense null space
(scipy.linalg) and the scipy backend on one process, each rank writing its state chunks of
``class_distributions [class, state]`` and ``class_of_state``, then per-class currents."""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
import scipy.linalg
import scipy.sparse as sp
import zarr

from pipeline.parallel import ownership_ranges, state_chunk

from .conftest import write_config
from .test_mpi_slepc import MPIEXEC, _run_with

pytestmark = [
    pytest.mark.skipif(MPIEXEC is None, reason="mpiexec is not installed (make installs "
                       "openmpi-bin)"),
    pytest.mark.slow,
]

AGREEMENT = 1e-9
N_STATES, CLASS_SIZES = 64, (14, 11)  # two closed classes, the other 39 states transient
# label: (backend, ranks, solve.dense_limit); 8 < class sizes: inverse iteration per class
# (the modes stay dense, solve.method = "dense": Krylov searches on a W with a null space of
# dimension 2 are not what this file tests)
RUNS = {"scipy": ("scipy", 1, 1024), "dense-2": ("slepc", 2, 1024),
        "iterative-2": ("slepc", 2, 8), "iterative-1": ("slepc", 1, 8)}


def generator() -> tuple[np.ndarray, list[np.ndarray]]:
    """A random conserving ``W`` (``W[i, j]`` = rate j -> i) whose closed classes are
    scattered over the states by a permutation, so both ranks hold part of each; the
    transient states form a chain with random back hops, each leaking into a class."""
    rng = np.random.default_rng(11)
    order = rng.permutation(N_STATES)
    a, b = CLASS_SIZES
    classes = [np.sort(order[:a]), np.sort(order[a:a + b])]
    transient = order[a + b:]
    rates = np.zeros((N_STATES, N_STATES))
    for members in classes:  # a loop over the two classes: a cycle plus random extra hops
        m = members.size  # every hop has a (different) reverse: finite entropy production
        pattern = rng.random((m, m)) < 0.25
        pattern[(np.arange(m) + 1) % m, np.arange(m)] = True
        pattern |= pattern.T
        rates[np.ix_(members, members)] += pattern * rng.uniform(0.1, 3.0, (m, m))
    t = transient.size
    rates[transient[1:], transient[:-1]] += rng.uniform(0.2, 1.0, t - 1)
    back = rng.random((t, t)) < 0.1
    rates[np.ix_(transient, transient)] += back * rng.uniform(0.1, 1.0, (t, t))
    target = np.where(rng.random(t) < 0.5, rng.choice(classes[0], t), rng.choice(classes[1], t))
    rates[target, transient] += rng.uniform(0.1, 1.0, t)
    np.fill_diagonal(rates, 0.0)
    return rates - np.diag(rates.sum(axis=0)), classes


@pytest.fixture(scope="module")
def runs(tmp_path_factory):
    """The full pipeline of every RUNS entry on the same matrix file: {label: run group}."""
    directory = tmp_path_factory.mktemp("mpi-classes")
    W, classes = generator()
    for members in classes:  # the test is about classes split over the ranks' rows
        assert all(np.any((members >= lo) & (members < hi))
                   for lo, hi in ownership_ranges(N_STATES, 2))
    sp.save_npz(directory / "w.npz", sp.csr_matrix(W))
    results = {}
    for label, (backend, ranks, dense_limit) in RUNS.items():
        config = write_config(directory, label, _config_text(directory, backend, dense_limit))
        store = directory / f"{label}.zarr"
        outcome = _run_with(config, store, ranks, [])
        assert outcome.returncode == 0, outcome.stderr[-3000:]
        results[label] = zarr.open_group(str(store / "classes"), mode="r")
    return results


def _config_text(directory, backend: str, dense_limit: int, closed: str = "per-class") -> str:
    return ('[run]\nname = "classes"\n[model]\ntype = "matrix"\n'
            f'file = "{directory / "w.npz"}"\n[solve]\nmodes = 3\nbackend = "{backend}"\n'
            f'closed_classes = "{closed}"\ndense_limit = {dense_limit}\nmethod = "dense"\n')


def _laws_by_support(group) -> dict[frozenset, np.ndarray]:
    laws = group["stationary/class_distributions"][:]
    return {frozenset(np.flatnonzero(row > 0).tolist()): row for row in laws}


@pytest.mark.parametrize("label", ["dense-2", "iterative-2", "iterative-1"])
def test_class_laws_span_the_null_space_of_each_sub_generator(runs, label):
    # Common practice: the stationary law of a closed class spans the null space of its
    # sub-generator W_c (scipy.linalg.null_space, SVD), zero outside the class.
    W, classes = generator()
    laws = _laws_by_support(runs[label])
    assert set(laws) == {frozenset(members.tolist()) for members in classes}
    for members in classes:  # a loop over the two classes
        null = scipy.linalg.null_space(W[np.ix_(members, members)])
        assert null.shape[1] == 1
        exact = null[:, 0] / null[:, 0].sum()
        law = laws[frozenset(members.tolist())]
        np.testing.assert_allclose(law[members], exact, atol=AGREEMENT, rtol=0)
        assert law.sum() == pytest.approx(1.0, abs=1e-14)
        assert np.abs(W @ law).sum() / np.abs(W).sum(axis=0).max() < 1e-13
    attrs = dict(runs[label]["stationary"].attrs)
    assert attrs["closed_classes"] == 2 and attrs["residual"] < 1e-13
    method = "dense" if label.startswith("dense") else "inverse iteration"
    assert method in attrs["method"], attrs["method"]


@pytest.mark.parametrize("label", ["dense-2", "iterative-2", "iterative-1"])
def test_class_laws_equal_the_one_process_scipy_result(runs, label):
    one, two = _laws_by_support(runs["scipy"]), _laws_by_support(runs[label])
    assert set(one) == set(two)
    worst = max(float(np.abs(two[key] - one[key]).max()) for key in one)
    assert worst <= AGREEMENT


def test_classes_on_two_ranks_match_networkx_and_csgraph(runs):
    # Strongly connected components (networkx, and scipy.sparse.csgraph) and the closed
    # ones = networkx's attracting components, on the graph j -> i of W[i, j] > 0.
    W, classes = generator()
    analysis = runs["dense-2"]["analysis"]
    labels, closed = analysis["class_of_state"][:], analysis["class_closed"][:]
    found = {frozenset(np.flatnonzero(labels == k).tolist()) for k in range(closed.size)}
    graph = nx.DiGraph([(j, i) for i, j in zip(*np.nonzero(W), strict=True) if i != j])
    assert found == {frozenset(c) for c in nx.strongly_connected_components(graph)}
    count, reference = scipy.sparse.csgraph.connected_components(
        sp.csr_matrix(W - np.diag(np.diag(W))), directed=True, connection="strong")
    assert count == closed.size
    assert found == {frozenset(np.flatnonzero(reference == k).tolist()) for k in range(count)}
    closed_sets = {frozenset(np.flatnonzero(labels == k).tolist())
                   for k in np.flatnonzero(closed)}
    assert closed_sets == {frozenset(c) for c in nx.attracting_components(graph)}
    assert closed_sets == {frozenset(members.tolist()) for members in classes}
    attrs = dict(analysis.attrs)["classes"]
    assert attrs["transient_states"] == N_STATES - sum(CLASS_SIZES)
    assert attrs["count"] == closed.size and attrs["closed"] == 2


def test_each_rank_writes_its_state_chunks_of_the_class_arrays(runs):
    chunk = state_chunk(N_STATES, 2)
    group = runs["dense-2"]
    assert group["stationary/class_distributions"].chunks == (2, chunk)
    assert group["analysis/class_of_state"].chunks == (chunk,)
    assert dict(group["analysis"].attrs)["ranks"] == 2


def test_per_class_currents_on_two_ranks_equal_one_process(runs):
    two, one = runs["dense-2"]["analysis"], runs["scipy"]["analysis"]
    order = _class_order(runs["dense-2"], runs["scipy"])
    flux = float(np.abs(one["class_channel_flux"][:]).max())
    for array in ("class_channel_flux", "class_channel_current"):
        difference = two[array][:][order] - one[array][:]
        assert float(np.abs(difference).max()) <= AGREEMENT * flux
    a = dict(two.attrs)["currents"]["per_class"]
    b = dict(one.attrs)["currents"]["per_class"]
    for mine, theirs in zip((a[k] for k in order), b, strict=True):
        assert 0 < mine["entropy_production"] < np.inf  # every hop has its reverse
        assert mine["entropy_production"] == pytest.approx(theirs["entropy_production"],
                                                           rel=AGREEMENT)
        assert mine["detailed_balance"] is theirs["detailed_balance"]


def _class_order(two, one) -> list[int]:
    """Row of ``two``'s per-class arrays holding the class of each row of ``one``."""
    rows = {key: k for k, key in enumerate(_laws_by_support(two))}
    return [rows[key] for key in _laws_by_support(one)]


def test_single_law_refused_on_every_rank_in_one_line(tmp_path):
    W, _ = generator()
    sp.save_npz(tmp_path / "w.npz", sp.csr_matrix(W))
    config = write_config(tmp_path, "single", _config_text(tmp_path, "slepc", 1024, "single"))
    outcome = _run_with(config, tmp_path / "s.zarr", 2, [])
    assert outcome.returncode == 2, outcome.stderr[-2000:]
    errors = [line for line in outcome.stderr.splitlines() if line.startswith("gapline")]
    assert len(errors) == 1, errors
    assert errors[0].startswith("gapline: error: solve.closed_classes: W has 2 closed")

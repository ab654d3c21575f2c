"""Shared helpers: dense generators from row blocks, slow reference generators built by hand,
dense reference spectra, multiset comparison, config files and the command line.

Every reference here is written independently of the pipeline: loops over lattice sites,
Kronecker sums of hand-built 1D matrices, numpy/scipy dense eigensolvers.
"""

from __future__ import annotations

import itertools
import math
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pytest
import scipy.sparse as sp
from scipy.optimize import linear_sum_assignment

REPO = Path(__file__).resolve().parents[1]
CONFIGS = REPO / "configs"


# ---------------------------------------------------------------------------------------
# Generators


def dense_generator(model, cuts=None) -> np.ndarray:
    """Dense W assembled from the model's row blocks, cut at ``cuts`` (default: one block)."""
    n = model.n_states
    edges = [0, *(cuts or []), n]
    pieces = []
    for start, stop in itertools.pairwise(edges):
        block = model.row_block(start, stop)
        assert block.start == start and block.stop == stop
        assert block.indptr.shape == (stop - start + 1,)
        pieces.append(
            sp.csr_matrix((block.data, block.indices, block.indptr), shape=(stop - start, n))
            .toarray()
        )
    return np.vstack(pieces)


def chain_matrix(size: int, boundary: str, forward: float, backward: float) -> np.ndarray:
    """1D generator built by hand: W[target, source] += rate, W[source, source] -= rate.

    Periodic: ring; reflecting: no hop off an edge; absorbing: the hop off an edge leaves.
    """
    W = np.zeros((size, size))
    for x in range(size):
        for step, rate in ((+1, forward), (-1, backward)):
            y = x + step
            if 0 <= y < size:
                W[y, x] += rate
                W[x, x] -= rate
            elif boundary == "periodic":
                W[y % size, x] += rate
                W[x, x] -= rate
            elif boundary == "absorbing":
                W[x, x] -= rate
            else:
                assert boundary == "reflecting"
    return W


def kron_sum_generator(shape, boundary, forward, backward) -> np.ndarray:
    """W of independent axes as a Kronecker sum of 1D generators, C order (axis 0 slowest).

    Kronecker sum: W = sum_a I_(before a) (x) W_a (x) I_(after a)
    (Horn and Johnson 1991, Topics in Matrix Analysis, sec. 4.4).
    """
    total = math.prod(shape)
    W = sp.csr_matrix((total, total))
    for axis, size in enumerate(shape):
        before = math.prod(shape[:axis])
        after = math.prod(shape[axis + 1 :])
        W_axis = sp.csr_matrix(chain_matrix(size, boundary[axis], forward[axis], backward[axis]))
        W = W + sp.kron(sp.identity(before), sp.kron(W_axis, sp.identity(after)))
    return W.toarray()


def reference_generator(shape, boundary, forward, backward, disorder=None) -> np.ndarray:
    """Slow reference W: a plain loop over sites and hops, flat C-order state indices.

    ``disorder`` (optional) is the model's :class:`Disorder`; only its factor *values* are
    used (inputs), the matrix is built here. Conventions of the factors (module docstring of
    pipeline/models/lattice.py): 'sites': every hop out of site y is scaled by
    factor(stream d, y); 'bonds': the bond y -> y + e_a (wrapping, or the exit bond on the
    high edge of an absorbing axis) has factor(stream 2a, y); the exit bond off the low edge
    of an absorbing axis has factor(stream 2a+1, y); both hop directions of a bond share it.
    """
    shape = tuple(shape)
    dims = len(shape)
    n = math.prod(shape)
    states = np.arange(n)

    tables: dict[int, np.ndarray] = {}

    def factor(stream, site):
        if stream not in tables:
            tables[stream] = disorder.factors(stream, states)
        return float(tables[stream][site])

    W = np.zeros((n, n))
    for state in states:
        x = np.unravel_index(state, shape)
        for axis in range(dims):
            size = shape[axis]
            for step, rate in ((+1, forward[axis]), (-1, backward[axis])):
                y = list(x)
                y[axis] += step
                inside = 0 <= y[axis] < size
                if not inside and boundary[axis] == "reflecting":
                    continue
                y[axis] %= size
                target = int(np.ravel_multi_index(tuple(y), shape))
                scale = 1.0
                if disorder is not None and disorder.on == "sites":
                    scale = factor(dims, state)
                elif disorder is not None:
                    if step == +1:
                        scale = factor(2 * axis, state)  # bond state -> state + e_a
                    elif inside or boundary[axis] == "periodic":
                        scale = factor(2 * axis, target)  # bond target -> target + e_a
                    else:
                        scale = factor(2 * axis + 1, state)  # low-edge exit bond
                hop = rate * scale
                if hop == 0.0:
                    continue
                W[state, state] -= hop
                if inside or boundary[axis] == "periodic":
                    W[target, state] += hop
    return W


def reference_rows(shape, boundary, forward, backward, states, disorder=None) -> sp.csr_matrix:
    """Rows ``states`` of W built from the *incoming* side (a second, independent reading of
    the convention W[i, j] = rate j -> i): for each target site, its sources x - e_a (forward
    hop) and x + e_a (backward hop), and minus its exit rate on the diagonal. Sparse, so that
    single rows of large lattices can be checked. Disorder factors as in reference_generator.
    """
    shape = tuple(shape)
    dims = len(shape)
    n = math.prod(shape)
    tables: dict[int, np.ndarray] = {}

    def factor(stream, site):
        if disorder is None:
            return 1.0
        if n > 1 << 22:  # a huge lattice: look the site up alone, never all n of them
            return float(disorder.factors(stream, np.array([site]))[0])
        if stream not in tables:
            tables[stream] = disorder.factors(stream, np.arange(n))
        return float(tables[stream][site])

    def flat(x):
        return int(np.ravel_multi_index(tuple(x), shape))

    rows, cols, vals = [], [], []
    for row, state in enumerate(states):
        x = list(np.unravel_index(state, shape))
        exit_rate = 0.0
        for axis in range(dims):
            size, kind = shape[axis], boundary[axis]
            u, v = forward[axis], backward[axis]
            low, high = x[axis] == 0, x[axis] == size - 1
            below = x.copy()
            below[axis] = (x[axis] - 1) % size
            above = x.copy()
            above[axis] = (x[axis] + 1) % size
            sites = disorder is not None and disorder.on == "sites"
            bonds = disorder is not None and disorder.on == "bonds"
            # incoming forward hop from below, incoming backward hop from above
            if not low or kind == "periodic":
                source = flat(below)
                scale = factor(dims, source) if sites else (factor(2 * axis, source)
                                                            if bonds else 1.0)
                rows.append(row), cols.append(source), vals.append(u * scale)
            if not high or kind == "periodic":
                source = flat(above)
                scale = factor(dims, source) if sites else (factor(2 * axis, state)
                                                            if bonds else 1.0)
                rows.append(row), cols.append(source), vals.append(v * scale)
            # hops out of the state
            own = factor(dims, state) if sites else 1.0
            if not (high and kind == "reflecting"):
                exit_rate += u * own * (factor(2 * axis, state) if bonds else 1.0)
            if not (low and kind == "reflecting"):
                if bonds and low and kind == "absorbing":
                    scale = factor(2 * axis + 1, state)
                elif bonds:
                    scale = factor(2 * axis, flat(below))
                else:
                    scale = 1.0
                exit_rate += v * own * scale
        rows.append(row), cols.append(state), vals.append(-exit_rate)
    # Duplicates (both neighbours of a size-2 ring are one site) are summed by scipy.
    return sp.csr_matrix((vals, (rows, cols)), shape=(len(states), n))


# ---------------------------------------------------------------------------------------
# Spectra


def tolerance_for(W: np.ndarray) -> float:
    """Real parts closer than this count as equal: 1e-9 of ||W||_1 (common practice)."""
    return 1e-9 * float(np.abs(W).sum(axis=0).max())


def norm1(W: np.ndarray) -> float:
    """||W||_1: the largest column absolute sum."""
    return float(np.abs(W).sum(axis=0).max())


def slowest_first(values: np.ndarray, tol: float) -> np.ndarray:
    """Values ordered slowest first: decreasing real part, ties (within tol, chained) by
    increasing imaginary part. Written here with a plain loop, independent of pipeline."""
    values = np.asarray(values, dtype=complex)
    by_real = sorted(values.tolist(), key=lambda z: -z.real)
    groups: list[list[complex]] = []
    for z in by_real:
        if groups and groups[-1][-1].real - z.real <= tol:
            groups[-1].append(z)
        else:
            groups.append([z])
    return np.array([z for group in groups for z in sorted(group, key=lambda z: z.imag)])


def slowest_set(values: np.ndarray, count: int, tol: float) -> np.ndarray:
    """The ``count`` slowest values, asserting that the cut does not split a group of equal
    real parts (so the set is well defined)."""
    ordered = slowest_first(values, tol)
    if count < ordered.size:
        gap = ordered[count - 1].real - ordered[count].real
        assert gap > tol, f"count {count} cuts a group of equal real parts"
    return ordered[:count]


def whole_group_count(values: np.ndarray, at_least: int, tol: float) -> int:
    """Smallest count >= at_least that does not cut a group of equal real parts."""
    ordered = slowest_first(values, tol)
    count = at_least
    while count < ordered.size and ordered[count - 1].real - ordered[count].real <= tol:
        count += 1
    return count


def multiset_distance(a: np.ndarray, b: np.ndarray) -> float:
    """Largest distance of the best one-to-one matching of two equal-size multisets
    (assignment problem: Kuhn 1955; scipy.optimize.linear_sum_assignment)."""
    a = np.asarray(a, dtype=complex)
    b = np.asarray(b, dtype=complex)
    assert a.size == b.size, f"sizes differ: {a.size} vs {b.size}"
    if a.size == 0:
        return 0.0
    cost = np.abs(a[:, None] - b[None, :])
    rows, cols = linear_sum_assignment(cost)
    return float(cost[rows, cols].max())


def published_chain_spectrum(size: int, boundary: str, u: float, v: float) -> np.ndarray:
    """All eigenvalues of a 1D walk from the published formulas, written out here:

    * ring: -(u+v) + u e^{-iq} + v e^{iq}, q = 2 pi k / L (circulant; Gray 2006, Toeplitz and
      Circulant Matrices: A Review, eq. 3.7);
    * reflecting: 0 and -(u+v) + 2 sqrt(uv) cos(pi k / L), k = 1..L-1 (birth-death chain
      with constant rates; from memory);
    * absorbing: -(u+v) + 2 sqrt(uv) cos(pi k / (L+1)), k = 1..L (tridiagonal Toeplitz; from
      memory, e.g. Smith 1985, Numerical Solution of Partial Differential Equations).
    """
    if boundary == "periodic":
        q = 2 * np.pi * np.arange(size) / size
        return -(u + v) + u * np.exp(-1j * q) + v * np.exp(1j * q)
    if boundary == "reflecting":
        k = np.arange(1, size)
        rest = -(u + v) + 2 * np.sqrt(u * v) * np.cos(np.pi * k / size)
        return np.concatenate([[0.0], rest]).astype(complex)
    k = np.arange(1, size + 1)
    return (-(u + v) + 2 * np.sqrt(u * v) * np.cos(np.pi * k / (size + 1))).astype(complex)


def published_lattice_spectrum(shape, boundary, forward, backward) -> np.ndarray:
    """All eigenvalues of the lattice: every sum of one 1D eigenvalue per axis (Kronecker
    sum; Horn and Johnson 1991, Topics in Matrix Analysis, 4.4). Small lattices only."""
    values = np.zeros(1, dtype=complex)
    for axis, size in enumerate(shape):
        axis_values = published_chain_spectrum(size, boundary[axis], forward[axis],
                                               backward[axis])
        values = (values[:, None] + axis_values[None, :]).ravel()
    return values


def matched_errors(computed: np.ndarray, superset: np.ndarray) -> np.ndarray:
    """Per-value distances of the best one-to-one matching of ``computed`` into
    ``superset`` (scipy.optimize.linear_sum_assignment)."""
    computed = np.asarray(computed, dtype=complex)
    cost = np.abs(computed[:, None] - np.asarray(superset, dtype=complex)[None, :])
    rows, cols = linear_sum_assignment(cost)
    errors = np.empty(computed.size)
    errors[rows] = cost[rows, cols]
    return errors


def submultiset_distance(computed: np.ndarray, superset: np.ndarray) -> float:
    """Largest distance of the best one-to-one matching of ``computed`` into the (larger)
    ``superset`` (rectangular assignment problem, scipy.optimize.linear_sum_assignment)."""
    computed = np.asarray(computed, dtype=complex)
    superset = np.asarray(superset, dtype=complex)
    assert superset.size >= computed.size, f"{superset.size} < {computed.size}"
    if computed.size == 0:
        return 0.0
    cost = np.abs(computed[:, None] - superset[None, :])
    rows, cols = linear_sum_assignment(cost)
    return float(cost[rows, cols].max())


def assert_slowest_first(values: np.ndarray, tol: float) -> None:
    """The project's ordering rule: decreasing real part, then increasing imaginary part."""
    values = np.asarray(values, dtype=complex)
    for i in range(values.size - 1):
        a, b = values[i], values[i + 1]
        assert a.real >= b.real - tol, f"mode {i} ({a}) is faster than mode {i + 1} ({b})"
        if abs(a.real - b.real) <= tol:
            assert a.imag <= b.imag + tol, f"modes {i}, {i + 1}: {a} before {b}"


# ---------------------------------------------------------------------------------------
# Configs and the command line


def write_config(directory: Path, name: str, text: str) -> Path:
    path = Path(directory) / f"{name}.toml"
    path.write_text(text, encoding="utf-8")
    return path


RING_CONFIG = """\
[run]
name = "{name}"

[model]
type = "lattice"
size = [{size}]
boundary = ["periodic"]
forward = [1.3]
backward = [0.4]

[solve]
modes = {modes}
backend = "scipy"
"""


def ring_config(directory: Path, name: str = "ring", size: int = 40, modes: int = 5,
                extra: str = "") -> Path:
    """A small ring config (dense solve)."""
    text = RING_CONFIG.format(name=name, size=size, modes=modes) + extra
    return write_config(directory, name, text)


def run_cli(*args, cwd: Path, env_extra: dict[str, str] | None = None,
            timeout: float = 240) -> subprocess.CompletedProcess:
    """``python -m pipeline ARGS`` in a subprocess (progress off)."""
    env = dict(os.environ)
    for name in ("OMPI_COMM_WORLD_SIZE", "PMI_SIZE", "PMIX_SIZE", "MPI_LOCALNRANKS"):
        env.pop(name, None)
    env["GAPLINE_PROGRESS"] = "off"
    env.update(env_extra or {})
    return subprocess.run(
        [sys.executable, "-m", "pipeline", *map(str, args)],
        cwd=cwd, env=env, capture_output=True, text=True, timeout=timeout, check=False,
    )


def assert_one_line_user_error(result: subprocess.CompletedProcess) -> str:
    """Exit 2 with exactly one stderr line 'gapline: error: ...' and no traceback."""
    assert result.returncode == 2, (result.returncode, result.stderr)
    assert "Traceback" not in result.stderr
    lines = result.stderr.splitlines()
    assert len(lines) == 1, f"expected one line on stderr, got {len(lines)}:\n{result.stderr}"
    assert lines[0].startswith("gapline: error: "), lines[0]
    return lines[0]


@pytest.fixture
def quiet(monkeypatch):
    """Progress lines off for in-process pipeline runs."""
    monkeypatch.setenv("GAPLINE_PROGRESS", "off")
    for name in ("OMPI_COMM_WORLD_SIZE", "PMI_SIZE", "PMIX_SIZE", "MPI_LOCALNRANKS"):
        monkeypatch.delenv(name, raising=False)

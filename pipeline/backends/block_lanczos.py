"""Block Lanczos for the largest eigenvalues of a symmetric operator given by its action on
blocks of distributed vectors (local rows ``[row, k]``), with full reorthogonalization.

Used with the shifted inverse ``(sigma I - S)^-1`` of a symmetric part ``S``: one block of
``b`` columns per step goes through one multi-right-hand-side direct solve, several times
cheaper per column than single solves, and a block of width ``b`` keeps up to ``b`` copies of
a multiple eigenvalue in the Krylov space at once (single-vector Lanczos sees one copy at a
time; Golub and Underwood 1977, The block Lanczos method for computing eigenvalues, in
Mathematical Software III; Saad 2011, Numerical Methods for Large Eigenvalue Problems, 2nd
ed., sec. 6.7). Every new block is orthogonalized twice against the whole basis and the
deflation space, so the projected matrix is the block tridiagonal ``T`` of the recurrence
``Op V_j = V_{j-1} B_{j-1}^T + V_j A_j + V_{j+1} B_j`` up to rounding.

Convergence is decided on the caller's residuals (``residual_of``), computed from the Ritz
vectors themselves, not on the recurrence's estimate alone: the estimate only says when to
look.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from pipeline.backends.petsc_tools import global_norms, gram
from pipeline.parallel import World

__all__ = ["LanczosResult", "block_lanczos_largest", "start_block"]


@dataclass
class LanczosResult:
    """theta: ``[m]`` largest Ritz values, descending; vectors: their Ritz vectors (local rows
    ``[row, m]``, orthonormal); residuals: ``residual_of`` of each; converged: whether all met
    their tolerance; steps: block steps; columns: operator applications (solved columns)."""

    theta: np.ndarray
    vectors: np.ndarray
    residuals: np.ndarray
    converged: bool
    steps: int
    columns: int


def start_block(start: int, stop: int, width: int) -> np.ndarray:
    """Fixed pseudo-random start columns, functions of the global state index only (the same
    on any number of ranks, so runs repeat exactly)."""
    index = np.arange(start, stop, dtype=np.float64)[:, None]
    seeds = np.arange(1, width + 1, dtype=np.float64)[None, :]
    return np.sin(index * (12.9898 + 0.618 * seeds) + 78.233 * seeds) + 0.1 * np.cos(
        index * 0.7071 * seeds)


def block_lanczos_largest(
    world: World,
    apply_operator: Callable[[np.ndarray], np.ndarray],
    start: np.ndarray,
    deflation: np.ndarray,
    tolerances: np.ndarray,
    residual_of: Callable[[np.ndarray, np.ndarray], np.ndarray],
    estimate_scale: Callable[[np.ndarray], np.ndarray],
    max_columns: int,
    dimension: int,
) -> LanczosResult:
    """The ``m = len(tolerances)`` largest eigenvalues of the symmetric operator
    ``P Op P`` (``P`` the projector onto the orthogonal complement of ``deflation``).

    apply_operator: ``Op`` on local rows ``[row, b]`` (the block width is ``start``'s).
    deflation: orthonormal local rows ``[row, d]`` kept out of the search.
    tolerances: ``[m]``, the residual each Ritz pair must reach, in the units of
    ``residual_of(theta, vectors)`` (e.g. ``||S x - mu x|| / ||S||``).
    estimate_scale: maps Ritz values to the factor turning the recurrence's estimate
    ``||B_j y_last||`` into those units (so the exact residuals are computed only when the
    estimate says they may pass).
    max_columns: the largest basis (memory: ``max_columns`` vectors per rank).
    dimension: the global vector length (the basis can not exceed ``dimension - d``).
    """
    m = len(tolerances)
    room = dimension - deflation.shape[1]
    max_columns = max(min(max_columns, room), 1)
    local = start.shape[0]
    width = start.shape[1]
    # the basis, column-major so the filled part is one contiguous operand of every
    # projection; it grows by doubling (never reserving max_columns up front, which strict
    # overcommit settings on cluster nodes would refuse)
    basis = _Basis(local, min(max_columns + width, 16 * width + m))
    first = _orthonormal(world, _project(world, start, deflation, basis), None)
    basis.append(first)
    widths = [first.shape[1]]
    diagonal: list[np.ndarray] = []  # A_j
    coupling: list[np.ndarray] = []  # B_j
    columns = 0
    scale = 0.0
    previous = None
    while True:
        current = basis.last(widths[-1])
        product = apply_operator(current)
        columns += current.shape[1]
        A = gram(world, current, product)
        A = 0.5 * (A + A.T)
        diagonal.append(A)
        product = product - current @ A
        if coupling:
            product = product - previous @ coupling[-1].T
        product = _project(world, product, deflation, basis)
        scale = max(scale, float(np.abs(np.linalg.eigvalsh(A)).max(initial=0.0)))
        remaining = max_columns - basis.size
        full = remaining <= 0
        # the last block may be narrower: it then ends exactly at max_columns (when that is
        # the whole complement, the product has no more directions than fit)
        new, B = (None, None) if full else _next_block(world, product, deflation, basis,
                                                       scale, min(width, remaining))
        T = _block_tridiagonal(diagonal, coupling)
        values, vectors = np.linalg.eigh(T)
        order = np.argsort(values)[::-1][:m]
        theta, Y = values[order], vectors[:, order]
        tail = Y[-widths[-1]:, :]
        # Op x - theta x = V_{j+1} B_j y_last (exactly when the space is complete)
        if B is None:
            estimate = global_norms(world, product @ tail)
        else:
            estimate = np.linalg.norm(B @ tail, axis=0)
        ready = theta.size == m and bool(np.all(estimate * estimate_scale(theta)
                                                <= tolerances))
        if ready or full or new is None:
            ritz = basis.filled() @ Y
            residuals = residual_of(theta, ritz)
            converged = theta.size == m and bool(np.all(residuals <= tolerances))
            if converged or full or new is None:
                return LanczosResult(theta, ritz, residuals, converged, len(widths), columns)
        previous = current
        basis.append(new)
        widths.append(new.shape[1])
        coupling.append(B)


class _Basis:
    """Orthonormal columns ``[row, size]`` in a column-major array that doubles when full."""

    def __init__(self, rows: int, capacity: int) -> None:
        self.array = np.empty((rows, max(capacity, 1)), order="F")
        self.size = 0

    def append(self, block: np.ndarray) -> None:
        needed = self.size + block.shape[1]
        if needed > self.array.shape[1]:
            grown = np.empty((self.array.shape[0], max(needed, 2 * self.array.shape[1])),
                             order="F")
            grown[:, :self.size] = self.array[:, :self.size]
            self.array = grown
        self.array[:, self.size:needed] = block
        self.size = needed

    def filled(self) -> np.ndarray:
        return self.array[:, :self.size]

    def last(self, width: int) -> np.ndarray:
        return self.array[:, self.size - width:self.size]


def _project(world: World, block: np.ndarray, deflation: np.ndarray,
             basis: _Basis) -> np.ndarray:
    """``block`` orthogonalized against the deflation space and the basis by classical
    Gram–Schmidt, a second pass where the first cancelled most of a column (classical
    Gram–Schmidt twice is as good as modified; Giraud et al. 2005, Numer. Math. 101, 87;
    from memory)."""
    spaces = [space for space in (deflation, basis.filled()) if space.shape[1]]
    if not spaces:
        return block
    before = global_norms(world, block)
    for _ in range(2):
        for space in spaces:
            block = block - space @ gram(world, space, block)
        after = global_norms(world, block)
        # "twice is enough" (Kahan, in Parlett 1998, The Symmetric Eigenvalue Problem;
        # from memory): a second pass only where the first cancelled most of a column
        if np.all(after >= 0.7071 * before):
            break
        before = after
    return block


def _next_block(world: World, product: np.ndarray, deflation: np.ndarray,
                basis: _Basis, scale: float,
                limit: int) -> tuple[np.ndarray | None, np.ndarray | None]:
    """``product = V_{j+1} B_j`` with orthonormal ``V_{j+1}`` of at most ``limit`` columns
    (the strongest directions of ``product``); directions where the product vanishes (an
    invariant subspace was reached) are replaced by fresh directions orthogonal to
    everything, with zero coupling. ``None`` when no fresh direction is left."""
    width = product.shape[1]
    products = gram(world, product, product)
    values, rotation = np.linalg.eigh(0.5 * (products + products.T))
    values, rotation = np.maximum(values[::-1], 0.0), rotation[:, ::-1]  # strongest first
    alive = np.flatnonzero(np.sqrt(values) > 1e-12 * max(scale, np.finfo(float).tiny))
    alive = alive[:limit]
    directions = product @ (rotation[:, alive] / np.sqrt(values[alive]))
    coupling = np.zeros((limit, width))
    coupling[:alive.size] = np.sqrt(values[alive])[:, None] * rotation[:, alive].T
    dead = limit - alive.size
    if dead:  # the product is orthogonal to everything already; fresh ones are not
        start, stop = _rows(world, product.shape[0])
        fresh = start_block(start, stop, width + basis.size + 3)[:, -dead:]
        directions = np.column_stack([directions, _project(world, fresh, deflation, basis)])
    new = _orthonormal(world, directions, coupling)
    if new is None:
        return None, None
    vectors, correction = new
    return vectors, correction @ coupling


def _orthonormal(world: World, block: np.ndarray, coupling: np.ndarray | None):
    """CholQR2 of ``block`` (``block = V R``); with ``coupling`` given returns ``(V, R)``,
    else ``V``. ``None`` when the block is numerically rank deficient."""
    products = gram(world, block, block)
    try:
        factor = np.linalg.cholesky(0.5 * (products + products.T))
    except np.linalg.LinAlgError:
        return None
    vectors = block @ np.linalg.inv(factor).T  # block factor^-T (a small inverse: one gemm)
    products = gram(world, vectors, vectors)
    try:
        second = np.linalg.cholesky(0.5 * (products + products.T))
    except np.linalg.LinAlgError:
        return None
    vectors = vectors @ np.linalg.inv(second).T
    if coupling is None:
        return vectors
    return vectors, second.T @ factor.T


def _block_tridiagonal(diagonal: list[np.ndarray], coupling: list[np.ndarray]) -> np.ndarray:
    widths = [A.shape[0] for A in diagonal]
    offsets = np.concatenate([[0], np.cumsum(widths)])
    T = np.zeros((offsets[-1], offsets[-1]))
    for j, A in enumerate(diagonal):  # a loop over block steps
        T[offsets[j]:offsets[j + 1], offsets[j]:offsets[j + 1]] = A
        if j + 1 < len(diagonal):
            B = coupling[j]
            T[offsets[j + 1]:offsets[j + 2], offsets[j]:offsets[j + 1]] = B
            T[offsets[j]:offsets[j + 1], offsets[j + 1]:offsets[j + 2]] = B.T
    return T


def _rows(world: World, local: int) -> tuple[int, int]:
    """This rank's global row range from the local row counts."""
    counts = world.allgather(local)
    start = int(sum(counts[:world.rank]))
    return start, start + local

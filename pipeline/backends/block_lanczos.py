"""Shift-and-invert block Lanczos for the largest eigenvalues of a symmetric matrix ``S``
given by its action on blocks of distributed vectors (local rows ``[row, k]``), with full
reorthogonalization and Rayleigh–Ritz on ``S`` itself.

The basis is the block Krylov space of ``(sigma I - S)^-1`` (``sigma`` above the wanted
eigenvalues): one block of ``b`` columns per step goes through one multi-right-hand-side
direct solve, several times cheaper per column than single solves, and a block of width
``b`` keeps up to ``b`` copies of a multiple eigenvalue in the space at once (single-vector
Lanczos sees one copy at a time; Golub and Underwood 1977, The block Lanczos method for
computing eigenvalues, in Mathematical Software III; Saad 2011, Numerical Methods for Large
Eigenvalue Problems, 2nd ed., sec. 6.7). Every new block is orthogonalized twice against the
whole basis and the deflation space (classical Gram–Schmidt twice).

The Ritz pairs come from the projection ``V^T S V`` rather than from the block tridiagonal
matrix of the inverse: on the same space they converge in fewer steps for the eigenvalues
of ``S`` next to a cluster (measured on the symmetric part of a driven 1024² torus: 15
instead of 19 steps of 4 to the 13 slowest at residual 1e-10, benchmarks/README.md). The
residual of a Ritz pair is known without forming it: ``S`` maps the Krylov space ``K`` into
``K + span(S V_0)`` (``S = sigma I - T^-1`` and ``T^-1`` maps every block but the first back
into ``K``), so ``S V y - V (V^T S V) y = Z (Z^T S V) y`` with ``Z`` an orthonormal basis of
the part of ``S V_0`` outside ``K``. With ``u = S V_0``, ``a = V^T u`` and ``c = V^T S u``
(one block row each per step), ``Z^T S V y = (c - mu a)^T y`` up to the ``b x b`` metric
``u^T u - a^T a``: the estimate costs two ``b``-column products per step and no pass over
the basis. Convergence is then confirmed on residuals computed from the Ritz vectors
themselves (``S x - mu x``).
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from pipeline.backends.petsc_tools import (
    add_combination,
    combine,
    global_norms,
    gram,
    right_solve_lower_transposed,
    subtract_combination,
)
from pipeline.parallel import World

__all__ = ["LanczosResult", "shift_invert_lanczos", "start_block"]


@dataclass
class LanczosResult:
    """values: ``[m]`` largest Ritz values of ``S``, descending; vectors: their Ritz vectors
    (local rows ``[row, m]``, orthonormal); residuals: ``||S x - mu x|| / scale`` of each;
    tolerances: the one each had to meet; converged: whether all met theirs; steps: block
    steps; columns: solved columns."""

    values: np.ndarray
    vectors: np.ndarray
    residuals: np.ndarray
    tolerances: np.ndarray
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


def shift_invert_lanczos(
    world: World,
    solve: Callable[[np.ndarray], np.ndarray],
    apply_matrix: Callable[[np.ndarray], np.ndarray],
    start: np.ndarray,
    deflation: np.ndarray,
    tolerances: np.ndarray | tuple[int, Callable[[np.ndarray], np.ndarray]],
    scale: float,
    max_columns: int,
    dimension: int,
    estimate: bool = True,
) -> LanczosResult:
    """The ``m`` largest eigenvalues of ``S`` restricted to the orthogonal complement of
    ``deflation`` (an invariant subspace of ``S``, e.g. its known null vector).

    solve: ``(sigma I - S)^-1`` on local rows ``[row, b]`` (the block width is ``start``'s),
    ``sigma`` above every wanted eigenvalue. apply_matrix: ``S`` on local rows.
    deflation: orthonormal local rows ``[row, d]`` kept out of the search.
    tolerances: ``[m]``, the residual ``||S x - mu x|| / scale`` each Ritz pair must reach;
    or ``(m, rule)`` with ``rule(mu) -> [len(mu)]`` deciding from the current Ritz values
    (descending) which need a tight tolerance (e.g. all of a group of equal eigenvalues that
    the wanted count cuts, and only a loose one beyond it).
    scale: a norm of ``S`` (the residuals' unit).
    max_columns: the largest basis (memory: ``max_columns`` vectors per rank).
    dimension: the global vector length (the basis can not exceed ``dimension - d``).
    estimate: check the Ritz pairs only when their residual estimate (two extra products
    with ``S`` at the start) says they are ready; without it, on the computed residuals
    after every step (cheaper when one or two steps are expected, as from a good start).
    ``start`` is overwritten.
    """
    if isinstance(tolerances, tuple):
        m, tolerance_of = tolerances
    else:
        m, fixed = len(tolerances), np.asarray(tolerances, dtype=float)

        def tolerance_of(mu: np.ndarray) -> np.ndarray:
            return fixed[:mu.size]
    room = dimension - deflation.shape[1]
    max_columns = max(min(max_columns, room), 1)
    local, width = start.shape
    scale = max(scale, np.finfo(float).tiny)
    # the basis: a list of orthonormal column-major blocks (appending never copies, and no
    # capacity is reserved up front, which strict overcommit settings would refuse)
    basis = _Basis()
    first = _orthonormal(world, _project(world, start, deflation, basis))
    if first is None:
        raise ValueError("the start block has no direction outside the deflation space")
    basis.append(first)
    # projected matrix H = V^T S V (grown by one block row and column per step); the
    # residual estimate's u = S V_0 (outside the deflation space), S u, and their
    # projections a = V^T u, c = V^T S u
    u = apply_matrix(first)
    projected = gram(world, first, u)
    if estimate:
        s_u = apply_matrix(u)
        metric_u = gram(world, u, u)
        if deflation.shape[1]:
            in_deflation = gram(world, deflation, u)
            metric_u -= in_deflation.T @ in_deflation
        along = [projected.copy()]  # V_0^T u = V_0^T S V_0
        along_s = [gram(world, first, s_u)]
    else:
        del u
    columns = steps = 0
    newest = first
    while True:
        product = solve(newest)
        columns += newest.shape[1]
        steps += 1
        del newest
        # directions the projection cancels to this fraction of the product are dead (an
        # invariant subspace was reached)
        reference = float(global_norms(world, product).max(initial=0.0))
        product = _project(world, product, deflation, basis)
        remaining = max_columns - basis.size
        new = None if remaining <= 0 else _next_block(world, product, deflation, basis,
                                                      min(width, remaining), reference)
        del product
        if new is not None:
            s_new = apply_matrix(new)
            # H's new block column, from one pass over the basis
            coupling = basis.gram(world, s_new)
            corner = gram(world, new, s_new)
            del s_new
            projected = np.block([[projected, coupling], [coupling.T, corner]])
            basis.append(new)
            if estimate:
                along.append(gram(world, new, u))
                along_s.append(gram(world, new, s_u))
        symmetric = 0.5 * (projected + projected.T)
        values, rotations = np.linalg.eigh(symmetric)
        order = np.argsort(values)[::-1][:m]
        mu, Y = values[order], rotations[:, order]
        wanted = tolerance_of(mu)
        full = new is None
        ready = mu.size == m
        if ready and estimate:
            residual_estimate = _residual_estimate(metric_u, np.vstack(along),
                                                   np.vstack(along_s), mu, Y) / scale
            ready = bool(np.all(residual_estimate <= wanted))
        if ready or full:
            ritz = basis.combine(Y)
            difference = apply_matrix(ritz)
            subtract_combination(difference, ritz, np.diag(mu))
            residuals = global_norms(world, difference) / scale
            del difference
            converged = mu.size == m and bool(np.all(residuals <= wanted))
            if converged or full:
                return LanczosResult(mu, ritz, residuals, wanted, converged, steps, columns)
            del ritz
        newest = basis.blocks[-1]


class _Basis:
    """Orthonormal columns kept as a list of column-major blocks ``[row, b_i]``."""

    def __init__(self) -> None:
        self.blocks: list[np.ndarray] = []
        self.size = 0

    def append(self, block: np.ndarray) -> None:
        self.blocks.append(np.asfortranarray(block))
        self.size += block.shape[1]

    def gram(self, world: World, other: np.ndarray) -> np.ndarray:
        """``V^T other`` (``[size, k]``), one reduction for all blocks."""
        return _stacked_gram(world, self.blocks, other)

    def combine(self, coefficients: np.ndarray) -> np.ndarray:
        """``V @ coefficients`` (column-major), accumulated block by block in place."""
        out = None
        offset = 0
        for block in self.blocks:
            part = coefficients[offset:offset + block.shape[1]]
            if out is None:
                out = combine(block, part)
            else:
                add_combination(out, block, part)
            offset += block.shape[1]
        return out


def _stacked_gram(world: World, spaces: list[np.ndarray], block: np.ndarray) -> np.ndarray:
    """``[S_1 ... S_j]^T block`` for real column blocks ``S_i``, in one reduction."""
    if not spaces:
        return np.zeros((0, block.shape[1]))
    return world.sum(np.ascontiguousarray(np.vstack([space.T @ block for space in spaces])))


def _project(world: World, block: np.ndarray, deflation: np.ndarray,
             basis: _Basis) -> np.ndarray:
    """``block`` orthogonalized against the deflation space and the basis by classical
    Gram–Schmidt, a second pass where the first cancelled most of a column (classical
    Gram–Schmidt twice is as good as modified; Giraud et al. 2005, Numer. Math. 101, 87;
    from memory). ``block`` is the caller's own array: it is updated in place when it is
    column-major."""
    spaces = [space for space in (deflation, *basis.blocks) if space.shape[1]]
    if not spaces:
        return block
    block = np.asfortranarray(block)
    before = global_norms(world, block)
    for _ in range(2):
        # all coefficients from the same block, in one reduction, then one update per space
        coefficients = _stacked_gram(world, spaces, block)
        offset = 0
        for space in spaces:
            width = space.shape[1]
            subtract_combination(block, space, coefficients[offset:offset + width])
            offset += width
        after = global_norms(world, block)
        # "twice is enough" (Kahan, in Parlett 1998, The Symmetric Eigenvalue Problem;
        # from memory): a second pass only where the first cancelled most of a column
        if np.all(after >= 0.7071 * before):
            break
        before = after
    return block


def _residual_estimate(metric_u: np.ndarray, along: np.ndarray, along_s: np.ndarray,
                       mu: np.ndarray, Y: np.ndarray) -> np.ndarray:
    """``||S V y - mu V y||`` of the Ritz pairs ``(mu, y)`` from the Krylov relation: the
    residual lies in the span of ``u_perp = P u`` (``P`` the projector off the basis and the
    deflation space, ``u = S V_0``); with ``a = V^T u``, ``c = V^T S u`` and the metric
    ``M = u_perp^T u_perp = u^T u - a^T a`` (deflation included), ``u_perp^T r = (c - mu
    a)^T y`` and ``||r||^2 = (c - mu a)^T y`` weighted by ``M^+``. Exact in exact arithmetic
    for a Krylov basis; only a trigger for the explicit check."""
    metric = metric_u - along.T @ along
    values, vectors = np.linalg.eigh(0.5 * (metric + metric.T))
    keep = values > 1e-14 * max(float(np.abs(values).max(initial=0.0)), np.finfo(float).tiny)
    projections = np.stack([(along_s - m * along).T @ Y[:, j] for j, m in enumerate(mu)],
                           axis=1) if mu.size else np.zeros((along.shape[1], 0))
    weighted = vectors[:, keep].T @ projections / np.sqrt(values[keep])[:, None]
    return np.sqrt(np.sum(weighted ** 2, axis=0))


def _next_block(world: World, product: np.ndarray, deflation: np.ndarray,
                basis: _Basis, limit: int, reference: float) -> np.ndarray | None:
    """An orthonormal block of at most ``limit`` columns spanning the strongest directions of
    ``product`` (already orthogonal to everything); directions where the product vanishes
    (an invariant subspace was reached) are replaced by fresh directions orthogonal to
    everything (``reference``: the product's largest column norm before the projection).
    ``None`` when no fresh direction is left."""
    width = product.shape[1]
    products = gram(world, product, product)
    values, rotation = np.linalg.eigh(0.5 * (products + products.T))
    values, rotation = np.maximum(values[::-1], 0.0), rotation[:, ::-1]  # strongest first
    alive = np.flatnonzero(np.sqrt(values) > 1e-12 * max(reference, np.finfo(float).tiny))
    alive = alive[:limit]
    directions = combine(product, rotation[:, alive] / np.sqrt(values[alive]))
    dead = limit - alive.size
    if dead:  # the product is orthogonal to everything already; fresh ones are not
        start, stop = _rows(world, product.shape[0])
        fresh = start_block(start, stop, width + basis.size + 3)[:, -dead:]
        directions = np.asfortranarray(np.column_stack(
            [directions, _project(world, fresh, deflation, basis)]))
    return _orthonormal(world, directions)


def _orthonormal(world: World, block: np.ndarray):
    """CholQR2 of ``block``: orthonormal columns with its span. ``None`` when the block is
    numerically rank deficient."""
    for _ in range(2):
        products = gram(world, block, block)
        try:
            factor = np.linalg.cholesky(0.5 * (products + products.T))
        except np.linalg.LinAlgError:
            return None
        block = right_solve_lower_transposed(block, factor)  # block factor^-T, in place
    return block


def _rows(world: World, local: int) -> tuple[int, int]:
    """This rank's global row range from the local row counts."""
    counts = world.allgather(local)
    start = int(sum(counts[:world.rank]))
    return start, start + local

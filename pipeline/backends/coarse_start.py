"""Start vectors and eigenvalue estimates for the top eigenvalues of a large symmetric part
``S`` from an aggregated (coarse) copy of it, when the model groups its states into compact
aggregates (a lattice model: blocks of neighbouring sites, :meth:`Model.state_aggregates`).

The slow eigenvectors of a Markov generator vary little across strongly coupled states
(the idea behind aggregation–disaggregation; Simon and Ando 1961, Econometrica 29, 111;
Stewart 1994, Introduction to the Numerical Solution of Markov Chains, ch. 6). So:

1. the prolongation ``P`` (``n x n_c``, orthonormal columns) carries the known null vector
   ``v`` of ``S`` on each aggregate (``P[i, a] = v_i / ||v on a||``), so ``v`` lies in its
   range and the coarse matrix ``P^T S P`` (PETSc ``PtAP``) has the null vector ``P^T v``;
   an aggregate cut by a rank boundary is split there, so ``P`` needs no communication;
2. the coarse top eigenvectors (the same shift-and-invert block Lanczos, with a small
   factorization) are prolonged and smoothed by damped Jacobi steps ``x <- x + w D^-1 S x``
   (``D = |diag S|``, ``w = 2/3``; one product with the sparse ``I + w D^-1 S`` each),
   which remove the jumps at aggregate boundaries (common practice in aggregation
   multigrid; Vanek, Mandel and Brezina 1996, Computing 56, 179);
3. Rayleigh–Ritz with ``S`` on their span gives Ritz values that are lower bounds of the
   top eigenvalues of ``S`` one by one (Cauchy interlacing; Parlett 1998, The Symmetric
   Eigenvalue Problem, 10.1), and the start block of the fine search.

Nothing here is trusted: the fine search at a test shift placed from these estimates counts
the eigenvalues above it by inertia, and the certificate decides.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pipeline.backends.block_lanczos import shift_invert_lanczos, start_block
from pipeline.backends.petsc_tools import (
    apply,
    combine,
    gram,
    orthonormalize,
    petsc,
    subtract_combination,
)
from pipeline.backends.symmetric_factor import ShiftedSymmetricFactor
from pipeline.parallel import World

__all__ = ["CoarseStart", "coarse_start"]

SMOOTHING_STEPS = 8
JACOBI_WEIGHT = 2.0 / 3.0
COARSE_TOLERANCE = 1e-8  # residual of the coarse eigenpairs (they only start the search)


@dataclass
class CoarseStart:
    """vectors: orthonormal local rows ``[row, k]`` (orthogonal to the null vector);
    estimates: ``[k]`` their Rayleigh–Ritz values with ``S``, descending (each a lower bound
    of the matching eigenvalue of ``S`` after the null one); info: sizes and seconds."""

    vectors: np.ndarray
    estimates: np.ndarray
    info: dict[str, Any] = field(default_factory=dict)


def coarse_start(world: World, S: Any, null: np.ndarray, labels: np.ndarray, wanted: int,
                 shift: float) -> CoarseStart | None:
    """``wanted`` start vectors for the top eigenvalues of ``S`` after its null vector
    ``null`` (local rows, unit norm). ``labels``: the aggregate of each local row (any
    integers; rows with equal labels form one aggregate on this rank). ``shift``: a point
    just above the spectrum of ``S`` (the coarse search's). ``None`` when the coarse space
    is too small for ``wanted`` vectors or the coarse search does not converge."""
    started = time.perf_counter()
    PETSc = petsc()
    local = null.shape[0]
    n = S.getSize()[0]
    _, labels = np.unique(labels, return_inverse=True)
    own = int(labels.max(initial=-1)) + 1
    counts = world.allgather(own)
    coarse_n = int(sum(counts))
    if coarse_n < 4 * wanted + 8 or coarse_n * 2 > n:
        return None
    offset = int(sum(counts[:world.rank]))
    # P[i, a] = null_i / ||null on a||: orthonormal columns, null in the range
    weights = np.bincount(labels, weights=null * null, minlength=own)
    norms = np.sqrt(np.maximum(weights, np.finfo(float).tiny))
    P = PETSc.Mat().createAIJ(size=((local, n), (own, coarse_n)),
                              csr=(np.arange(local + 1, dtype=PETSc.IntType),
                                   (labels + offset).astype(PETSc.IntType),
                                   null / norms[labels]),
                              comm=S.getComm())
    P.assemble()
    coarse = S.ptap(P)
    coarse.setOption(PETSc.Mat.Option.SYMMETRIC, True)
    coarse_null = (weights / norms)[:, None]  # P^T null
    coarse_null = coarse_null / np.sqrt(world.sum(float(np.sum(coarse_null ** 2))))
    coarse_norm = float(coarse.norm(PETSc.NormType.NORM_1))
    factor = ShiftedSymmetricFactor(world, coarse, options_prefix="gapline_coarse_")
    factor.at(shift)
    work = coarse.createVecs()
    search = shift_invert_lanczos(
        world, factor.solve, lambda columns: apply(coarse, columns, work),
        start_block(offset, offset + own, 4), coarse_null, np.full(wanted, COARSE_TOLERANCE),
        coarse_norm, max_columns=max(200, 8 * wanted), dimension=coarse_n)
    factor.destroy()
    for vec in work:
        vec.destroy()
    coarse.destroy()
    if not search.converged:
        P.destroy()
        return None
    coarse_seconds = time.perf_counter() - started
    vectors = apply(P, search.vectors)  # prolonged
    P.destroy()
    fine_work = S.createVecs()
    # the Jacobi step as one sparse matrix J = I + w D^-1 S (S's pattern): one product per
    # step, between two blocks used in turn
    diagonal = np.abs(S.getDiagonal().getArray(readonly=True))
    smoother = S.copy()
    row_scaling = fine_work[1]
    row_scaling.getArray()[:] = JACOBI_WEIGHT / np.maximum(diagonal, np.finfo(float).tiny)
    smoother.diagonalScale(L=row_scaling)
    smoother.shift(1.0)
    other = np.empty_like(vectors, order="F")
    for _ in range(SMOOTHING_STEPS):  # a loop over smoothing steps
        apply(smoother, vectors, fine_work, out=other)
        vectors, other = other, vectors
    del other
    smoother.destroy()
    subtract_combination(vectors, null[:, None], world.sum(null @ vectors)[None, :])
    basis = orthonormalize(world, vectors, overwrite=True)
    del vectors
    products = apply(S, basis, fine_work)
    projected = gram(world, basis, products)
    del products
    for vec in fine_work:
        vec.destroy()
    estimates, rotation = np.linalg.eigh(0.5 * (projected + projected.T))
    order = np.argsort(estimates)[::-1]
    return CoarseStart(
        vectors=combine(basis, rotation[:, order]), estimates=estimates[order],
        info={"coarse_states": coarse_n, "states_per_aggregate": n / coarse_n,
              "coarse_steps": int(search.steps), "coarse_seconds": coarse_seconds,
              "smoothing_steps": SMOOTHING_STEPS,
              "seconds": time.perf_counter() - started})

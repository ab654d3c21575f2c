"""Distributed linear algebra helpers of the PETSc/SLEPc backend.

Vectors handled here are *local rows*: numpy arrays of the rows ``[start, stop)`` this rank
owns (``[row]`` or ``[row, column]``); every reduction goes through
:class:`pipeline.parallel.World`. Nothing here holds a whole state-space vector.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from pipeline.parallel import World

__all__ = [
    "apply",
    "apply_transpose",
    "global_norms",
    "gram",
    "normalize_columns",
    "orthonormalize",
    "start_vector",
]


def petsc():
    from petsc4py import PETSc

    return PETSc


def to_vec(template: Any, local: np.ndarray) -> Any:
    """A PETSc Vec with the layout of ``template`` holding ``local`` (copied)."""
    vec = template.duplicate()
    vec.getArray()[:] = local
    return vec


def apply(matrix: Any, local: np.ndarray, work: tuple[Any, Any] | None = None) -> np.ndarray:
    """``matrix @ x`` for local rows ``x`` (real or complex, ``[row]`` or ``[row, k]``)."""
    return _apply(matrix, local, transpose=False, work=work)


def apply_transpose(matrix: Any, local: np.ndarray,
                    work: tuple[Any, Any] | None = None) -> np.ndarray:
    """``matrix.T @ x`` for local rows ``x``."""
    return _apply(matrix, local, transpose=True, work=work)


def _apply(matrix: Any, local: np.ndarray, transpose: bool,
           work: tuple[Any, Any] | None) -> np.ndarray:
    source, target = work if work is not None else matrix.createVecs()
    columns = local.reshape(local.shape[0], -1)
    out = np.empty(columns.shape, dtype=np.result_type(columns.dtype, np.float64))
    for j in range(columns.shape[1]):  # a loop over vectors, not states
        parts = [columns[:, j].real, columns[:, j].imag] if np.iscomplexobj(columns) else [
            columns[:, j]]
        results = []
        for part in parts:
            source.getArray()[:] = part
            (matrix.multTranspose if transpose else matrix.mult)(source, target)
            results.append(target.getArray(readonly=True).copy())
        out[:, j] = results[0] + 1j * results[1] if len(results) == 2 else results[0]
    return out.reshape(local.shape)


def gram(world: World, left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """``left^H right`` summed over ranks (``[k, m]``). (A real ``left`` is not conjugated:
    ``conj`` of a real array is a full copy, which costs more than the product.)"""
    transposed = left.T.conj() if np.iscomplexobj(left) else left.T
    return world.sum(np.ascontiguousarray(transposed @ right))


def global_norms(world: World, columns: np.ndarray) -> np.ndarray:
    """2-norms of the columns of distributed ``[row, k]`` arrays."""
    if np.iscomplexobj(columns):
        local = np.einsum("ij,ij->j", columns.conj(), columns).real
    else:
        local = np.einsum("ij,ij->j", columns, columns)
    return np.sqrt(world.sum(np.ascontiguousarray(local)))


def orthonormalize(world: World, columns: np.ndarray) -> np.ndarray:
    """Orthonormal basis of the span of real ``columns`` (CholQR2; Fukaya et al. 2014,
    CholeskyQR2, a communication-avoiding QR; from memory)."""
    basis = np.array(columns, dtype=np.float64, copy=True)
    for _ in range(2):
        products = gram(world, basis, basis)
        products = 0.5 * (products + products.T)
        factor = np.linalg.cholesky(products)  # products = factor factor^T
        basis = basis @ np.linalg.inv(factor).T  # basis factor^-T (a small inverse: one gemm)
    return basis


def normalize_columns(world: World, columns: np.ndarray, offset: int) -> np.ndarray:
    """Unit 2-norm columns whose largest-modulus entry (the first such state across ranks)
    is real and positive, the convention of :class:`pipeline.backends.base.Modes`."""
    columns = np.asarray(columns, dtype=np.complex128)
    if columns.size == 0 and columns.shape[1] == 0:
        return columns
    k = columns.shape[1]
    if columns.shape[0]:
        rows = np.argmax(np.abs(columns), axis=0)
        local = [(float(np.abs(columns[rows[j], j])), -(offset + int(rows[j])),
                  complex(columns[rows[j], j])) for j in range(k)]
    else:
        local = [(-1.0, 0, 0j)] * k
    candidates = world.allgather(local)
    pivots = np.array([max(entry[j] for entry in candidates)[2] for j in range(k)])
    phase = np.where(np.abs(pivots) > 0, pivots / np.where(pivots == 0, 1, np.abs(pivots)), 1)
    columns = columns / phase[None, :]
    return columns / np.maximum(global_norms(world, columns), np.finfo(float).tiny)[None, :]


def start_vector(start: int, stop: int) -> np.ndarray:
    """A fixed pseudo-random start vector, a function of the global state index only (the
    same on any number of ranks, so runs repeat exactly)."""
    index = np.arange(start, stop, dtype=np.float64)
    return np.sin(index * 12.9898 + 78.233) * 0.5 + np.cos(index * 0.7071) + 1.5

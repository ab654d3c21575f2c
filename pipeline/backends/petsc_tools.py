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
    "combine",
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


def apply(matrix: Any, local: np.ndarray, work: tuple[Any, Any] | None = None,
          out: np.ndarray | None = None) -> np.ndarray:
    """``matrix @ x`` for local rows ``x`` (real or complex, ``[row]`` or ``[row, k]``);
    ``out``: a column-major real ``[row, k]`` array to write into (real ``x`` only)."""
    return _apply(matrix, local, transpose=False, work=work, out=out)


def apply_transpose(matrix: Any, local: np.ndarray,
                    work: tuple[Any, Any] | None = None) -> np.ndarray:
    """``matrix.T @ x`` for local rows ``x``."""
    return _apply(matrix, local, transpose=True, work=work)


def _apply(matrix: Any, local: np.ndarray, transpose: bool,
           work: tuple[Any, Any] | None, out: np.ndarray | None = None) -> np.ndarray:
    source, target = work if work is not None else matrix.createVecs()
    if transpose:
        source, target = target, source  # W^T maps the row layout to the column layout
    columns = local.reshape(local.shape[0], -1)
    complex_ = np.iscomplexobj(columns)
    # contiguous real columns in, contiguous columns out: no strided copies per column
    real = np.asfortranarray(np.hstack([columns.real, columns.imag]) if complex_ else columns,
                             dtype=np.float64)
    if out is None or complex_:
        out = np.empty((target.getLocalSize(), real.shape[1]), order="F")
    product = matrix.multTranspose if transpose else matrix.mult
    for j in range(real.shape[1]):  # a loop over vectors, not states
        source.placeArray(real[:, j])
        target.placeArray(out[:, j])
        product(source, target)
        source.resetArray()
        target.resetArray()
    if complex_:
        k = columns.shape[1]
        out = out[:, :k] + 1j * out[:, k:]
    return out.reshape(target.getLocalSize(), *local.shape[1:])


def combine(columns: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
    """``columns @ coefficients`` (local rows ``[row, k]`` times a small ``[k, m]``) as a
    column-major array, the layout PETSc vectors and direct solves take without a copy:
    computed as ``(coefficients^T columns^T)^T``, one gemm either way."""
    return (coefficients.T @ columns.T).T


def gram(world: World, left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """``left^H right`` summed over ranks (``[k, m]``). (A real ``left`` is not conjugated:
    ``conj`` of a real array is a full copy, which costs more than the product.)"""
    transposed = left.T.conj() if np.iscomplexobj(left) else left.T
    return world.sum(np.ascontiguousarray(transposed @ right))


def column_dots(world: World, left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """``sum_i conj(left[i, j]) right[i, j]`` over all ranks, per column (from the real and
    imaginary views: no conjugated copy)."""
    if not (np.iscomplexobj(left) or np.iscomplexobj(right)):
        return world.sum(np.ascontiguousarray(np.einsum("ij,ij->j", left, right)))
    lr, li = left.real, (left.imag if np.iscomplexobj(left) else np.zeros_like(left))
    rr, ri = right.real, (right.imag if np.iscomplexobj(right) else np.zeros_like(right))
    real = np.einsum("ij,ij->j", lr, rr) + np.einsum("ij,ij->j", li, ri)
    imag = np.einsum("ij,ij->j", lr, ri) - np.einsum("ij,ij->j", li, rr)
    return world.sum(np.ascontiguousarray(real + 1j * imag))


def global_norms(world: World, columns: np.ndarray) -> np.ndarray:
    """2-norms of the columns of distributed ``[row, k]`` arrays."""
    if np.iscomplexobj(columns):  # |z|^2 from the real and imaginary views, no conj copy
        local = (np.einsum("ij,ij->j", columns.real, columns.real)
                 + np.einsum("ij,ij->j", columns.imag, columns.imag))
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
        basis = combine(basis, np.linalg.inv(factor).T)  # basis factor^-T (one gemm)
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

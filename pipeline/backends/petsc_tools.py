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
    "add_combination",
    "apply",
    "combine",
    "right_solve_lower_transposed",
    "subtract_combination",
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


COMPLEX_CHUNK = 4  # complex columns per product (their real and imaginary parts side by side)


def _apply(matrix: Any, local: np.ndarray, transpose: bool,
           work: tuple[Any, Any] | None, out: np.ndarray | None = None) -> np.ndarray:
    source, target = work if work is not None else matrix.createVecs()
    if transpose:
        source, target = target, source  # W^T maps the row layout to the column layout
    columns = local.reshape(local.shape[0], -1)
    rows = target.getLocalSize()
    if not np.iscomplexobj(columns):
        # contiguous real columns in, contiguous columns out: no strided copies per column
        real = np.asfortranarray(columns, dtype=np.float64)
        if out is None:
            out = np.empty((rows, real.shape[1]), order="F")
        _real_product(matrix, real, out, transpose, source, target)
        return out.reshape(rows, *local.shape[1:])
    # a complex block: a few columns at a time as real and imaginary parts side by side,
    # through two small staging blocks (not full-size real copies of the whole block)
    k = columns.shape[1]
    result = np.empty((rows, k), dtype=np.complex128, order="F")
    chunk = max(1, min(k, COMPLEX_CHUNK))
    staging = np.empty((columns.shape[0], 2 * chunk), order="F")
    images = np.empty((rows, 2 * chunk), order="F")
    for first in range(0, k, chunk):  # a loop over column chunks, not states
        width = min(chunk, k - first)
        part = columns[:, first:first + width]
        staging[:, :width] = part.real
        staging[:, width:2 * width] = part.imag
        _real_product(matrix, staging[:, :2 * width], images[:, :2 * width], transpose,
                      source, target)
        view = result[:, first:first + width]
        view.real = images[:, :width]
        view.imag = images[:, width:2 * width]
    return result.reshape(rows, *local.shape[1:])


def _real_product(matrix: Any, real: np.ndarray, out: np.ndarray, transpose: bool,
                  source: Any, target: Any) -> None:
    """``out = matrix @ real`` (or ``matrix^T @ real``) for column-major real blocks."""
    if transpose or real.shape[1] == 1:
        product = matrix.multTranspose if transpose else matrix.mult
        for j in range(real.shape[1]):  # a loop over vectors, not states
            source.placeArray(real[:, j])
            target.placeArray(out[:, j])
            product(source, target)
            source.resetArray()
            target.resetArray()
    else:  # one sparse-times-dense product reads the matrix once for several columns
        _block_product(matrix, real, out)


def _block_product(matrix: Any, columns: np.ndarray, out: np.ndarray) -> None:
    """``out = matrix @ columns`` for column-major real local rows, as one PETSc
    sparse-times-dense product (``MatMatMult``) on dense matrices that wrap the arrays:
    about 2.4x faster than one product per column on a 5-point lattice (measured,
    benchmarks/README.md), since the matrix is read once per few columns, not per column."""
    PETSc = petsc()
    comm = matrix.getComm()
    rows, cols = matrix.getSizes()
    k = columns.shape[1]
    source = PETSc.Mat().createDense((cols, (None, k)), array=columns, comm=comm)
    target = PETSc.Mat().createDense((rows, (None, k)), array=out, comm=comm)
    matrix.matMult(source, target)
    source.destroy()
    target.destroy()


def _blas(name: str, *arrays: np.ndarray):
    """The BLAS routine ``name`` (``"gemm"``, ``"trsm"``) for ``arrays``' common type."""
    from scipy.linalg import blas

    return blas.get_blas_funcs(name, arrays)


def _fortran(array: np.ndarray) -> bool:
    return array.ndim == 2 and array.flags.f_contiguous


def combine(columns: np.ndarray, coefficients: np.ndarray,
            out: np.ndarray | None = None) -> np.ndarray:
    """``columns @ coefficients`` (local rows ``[row, k]`` times a small ``[k, m]``) as a
    column-major array, the layout PETSc vectors and direct solves take without a copy;
    ``out``: a column-major array of the result's shape and type to write into.

    One BLAS ``gemm`` straight into the result (no transposed copies). Real columns with
    complex coefficients take two real products (real and imaginary part), not a complex
    copy of the columns and a complex product at four times the cost."""
    coefficients = np.asarray(coefficients)
    complex_ = np.iscomplexobj(columns) or np.iscomplexobj(coefficients)
    shape = (columns.shape[0], coefficients.shape[1])
    if out is None:
        out = np.empty(shape, dtype=np.complex128 if complex_ else np.float64, order="F")
    if 0 in shape or columns.shape[1] == 0:
        out[...] = 0
        return out
    if not _fortran(columns):
        columns = np.asfortranarray(columns)
    if np.iscomplexobj(coefficients) and not np.iscomplexobj(columns):
        part = np.empty(shape, order="F")
        for name, values in (("real", coefficients.real), ("imag", coefficients.imag)):
            gemm = _blas("gemm", columns)
            gemm(1.0, columns, np.asfortranarray(values), c=part, overwrite_c=True)
            setattr(out, name, part)
        return out
    operand = coefficients.astype(out.dtype, copy=False)
    gemm = _blas("gemm", out)
    if not _fortran(out) or columns.dtype != out.dtype:
        out[...] = (operand.T @ columns.T).T
        return out
    result = gemm(1.0, columns, np.asfortranarray(operand), c=out, overwrite_c=True)
    if result is not out:  # (BLAS wrote into a copy: the layout did not fit)
        out[...] = result
    return out


def add_combination(target: np.ndarray, columns: np.ndarray, coefficients: np.ndarray,
                    factor: float = 1.0) -> np.ndarray:
    """``target += factor * columns @ coefficients`` in place (one ``gemm`` with
    ``beta = 1`` when ``target`` is column-major and of ``columns``' type: no temporary
    block)."""
    coefficients = np.asarray(coefficients)
    same = (_fortran(target) and _fortran(columns) and target.dtype == columns.dtype
            and target.dtype in (np.float64, np.complex128)
            and (np.iscomplexobj(target) or not np.iscomplexobj(coefficients)))
    if not same or 0 in target.shape or columns.shape[1] == 0:
        if columns.shape[1] and target.size:
            target += factor * combine(columns, coefficients)
        return target
    gemm = _blas("gemm", target)
    result = gemm(factor, columns, np.asfortranarray(coefficients, dtype=target.dtype),
                  beta=1.0, c=target, overwrite_c=True)
    if result is not target:
        target[...] = result
    return target


def subtract_combination(target: np.ndarray, columns: np.ndarray,
                         coefficients: np.ndarray) -> np.ndarray:
    """``target -= columns @ coefficients`` in place (:func:`add_combination`)."""
    return add_combination(target, columns, coefficients, -1.0)


def right_solve_lower_transposed(block: np.ndarray, factor: np.ndarray) -> np.ndarray:
    """``block @ factor^-T`` for a lower-triangular ``[k, k]`` ``factor``, in place when
    ``block`` is real and column-major (BLAS ``trsm``; the CholQR step)."""
    if not (_fortran(block) and block.dtype == np.float64) or 0 in block.shape:
        return combine(block, np.linalg.inv(factor).T)
    trsm = _blas("trsm", block)
    result = trsm(1.0, np.asfortranarray(factor), block, side=1, lower=1, trans_a=1,
                  overwrite_b=True)
    if result is not block:
        block[...] = result
    return block


def gram(world: World, left: np.ndarray, right: np.ndarray) -> np.ndarray:
    """``left^H right`` summed over ranks (``[k, m]``). Complex column-major blocks go to
    BLAS ``gemm`` with the conjugate transpose (no conjugated copy; a real ``left`` is not
    conjugated at all)."""
    if (np.iscomplexobj(left) and np.iscomplexobj(right) and _fortran(left)
            and _fortran(right) and left.dtype == right.dtype == np.complex128
            and left.shape[0] and left.shape[1] and right.shape[1]):
        gemm = _blas("gemm", left)
        return world.sum(np.ascontiguousarray(gemm(1.0, left, right, trans_a=2)))
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


def orthonormalize(world: World, columns: np.ndarray, overwrite: bool = False) -> np.ndarray:
    """Orthonormal basis of the span of real ``columns`` (CholQR2; Fukaya et al. 2014,
    CholeskyQR2, a communication-avoiding QR; from memory). ``overwrite``: the basis may be
    built in ``columns`` itself (when it is a column-major real array)."""
    if overwrite and _fortran(columns) and columns.dtype == np.float64:
        basis = columns  # the caller's array becomes the basis
    else:
        basis = np.array(columns, dtype=np.float64, order="F", copy=True)
    for _ in range(2):
        products = gram(world, basis, basis)
        products = 0.5 * (products + products.T)
        factor = np.linalg.cholesky(products)  # products = factor factor^T
        basis = right_solve_lower_transposed(basis, factor)  # basis factor^-T, in place
    return basis


def normalize_columns(world: World, columns: np.ndarray, offset: int,
                      overwrite: bool = False) -> np.ndarray:
    """Unit 2-norm columns whose largest-modulus entry (the first such state across ranks)
    is real and positive, the convention of :class:`pipeline.backends.base.Modes`.
    ``overwrite``: a complex ``columns`` may be normalized in place."""
    owned = overwrite and isinstance(columns, np.ndarray) and columns.dtype == np.complex128
    columns = np.asarray(columns, dtype=np.complex128)
    if columns.size == 0 and columns.shape[1] == 0:
        return columns
    k = columns.shape[1]
    if columns.shape[0]:
        # one column at a time: no full-size temporary of moduli
        rows = np.array([int(np.argmax(np.abs(columns[:, j]))) for j in range(k)], dtype=int)
        local = [(float(np.abs(columns[rows[j], j])), -(offset + int(rows[j])),
                  complex(columns[rows[j], j])) for j in range(k)]
    else:
        local = [(-1.0, 0, 0j)] * k
    candidates = world.allgather(local)
    pivots = np.array([max(entry[j] for entry in candidates)[2] for j in range(k)])
    phase = np.where(np.abs(pivots) > 0, pivots / np.where(pivots == 0, 1, np.abs(pivots)), 1)
    if owned:
        columns /= phase[None, :]
    else:
        columns = columns / phase[None, :]  # (a new array; the caller's is not changed)
    columns /= np.maximum(global_norms(world, columns), np.finfo(float).tiny)[None, :]
    return columns


def start_vector(start: int, stop: int) -> np.ndarray:
    """A fixed pseudo-random start vector, a function of the global state index only (the
    same on any number of ranks, so runs repeat exactly)."""
    index = np.arange(start, stop, dtype=np.float64)
    return np.sin(index * 12.9898 + 78.233) * 0.5 + np.cos(index * 0.7071) + 1.5

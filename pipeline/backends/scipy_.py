"""Backend ``scipy``: one process, scipy.sparse storage, SuperLU and ARPACK, LAPACK for small N.

Methods for the slowest modes:

* ``dense``: full LAPACK eigendecomposition (``numpy.linalg.eig``); every eigenvalue is
  computed, so the slowest set is complete by construction.
* ``shift-invert``: sparse LU of ``W - sigma I`` (SuperLU, COLAMD ordering) and ARPACK's
  implicitly restarted Arnoldi on ``(W - sigma I)^{-1}`` (Lehoucq, Sorensen and Yang 1998,
  ARPACK Users' Guide, ch. 4.2 shift-invert mode). ARPACK returns the eigenvalues nearest
  ``sigma``; the search is widened until :mod:`pipeline.backends.completeness` proves that no
  eigenvalue of larger real part lies outside the searched disk, or ``max_search`` is hit (then
  the result says it is not certified).

The shift is ``sigma = +1e-9 * max exit rate``: just right of the stationary eigenvalue 0, so
``W - sigma I`` is non-singular for conserving generators and the disk is centred on the
slow end of the spectrum.

Stationary distribution: inverse iteration with the same LU (each step shrinks every other
component by ``sigma / |lambda|``), or a dense solve with one equation replaced by the
normalization for small N.
"""

from __future__ import annotations

import os
import time
from typing import Any

import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.linalg as spla

from pipeline.backends.base import (
    Backend,
    Modes,
    Operator,
    Stationary,
    check_column_sums,
)
from pipeline.backends.completeness import SpectrumEnclosure, farthest_enclosed_distance
from pipeline.backends.conditioning import eigenvalue_conditions
from pipeline.backends.inverse_iteration import (
    STATIONARY_TARGET,
    inverse_iteration,
    normalized_null_vector,
)
from pipeline.backends.scipy_analysis import ScipyAnalysis
from pipeline.errors import BackendError, ModelError, SolverError
from pipeline.models.base import Model, validate_block
from pipeline.modes import grouping_tolerance, take_slowest
from pipeline.progress import Progress, log, warn

__all__ = ["ScipyBackend", "mpi_world_size"]

SHIFT_FACTOR = 1e-9
DENSE_MEMORY_LIMIT = 8 * 2**30  # bytes a dense solve may take before we refuse
RESIDUAL_CEILING = 1e-6  # above this a mode is not trusted for the certificate
BASIS_MEMORY_FRACTION = 0.25  # of physical memory, for the Arnoldi basis
CLUSTER_FACTOR = 1e-8  # eigenvalues closer than this times ||W||_1 are one cluster


def mpi_world_size() -> int:
    """Ranks of the MPI job this process belongs to (1 when not started by mpiexec/srun)."""
    for name in ("OMPI_COMM_WORLD_SIZE", "PMI_SIZE", "PMIX_SIZE", "MPI_LOCALNRANKS"):
        value = os.environ.get(name)
        if value and value.isdigit():
            return int(value)
    return 1


class ScipyBackend(ScipyAnalysis, Backend):
    name = "scipy"
    description = "one process: scipy.sparse, SuperLU, ARPACK; LAPACK for small problems"
    # Rows per block: small enough for a block's arrays to stay in cache and be reused by
    # the allocator, a multiple of the lattice's disorder chunk (65536 sites).
    block_rows = 1 << 16

    @classmethod
    def unavailable_reason(cls) -> str | None:
        ranks = mpi_world_size()
        if ranks > 1:
            return (f"solve.backend: 'scipy' runs on one process but {ranks} MPI ranks were "
                    "started; run without mpiexec or choose a distributed backend")
        return None

    # -- assembly ------------------------------------------------------------------------

    def assemble(self, model: Model) -> Operator:
        """Concatenate the model's row blocks into one CSR matrix (preallocated, no copies
        of the whole matrix) and check every block and the column sums."""
        reason = self.unavailable_reason()
        if reason:
            raise BackendError(reason)
        started = time.perf_counter()
        n = model.n_states
        bound = model.nnz_upper_bound(0, n)
        indptr: np.ndarray | None = None
        indices: np.ndarray | None = None
        data = np.empty(bound, dtype=np.float64)
        filled = 0
        with Progress(n, "assemble") as progress:
            for start in range(0, n, self.block_rows):
                stop = min(start + self.block_rows, n)
                block = model.row_block(start, stop)
                validate_block(block, n)
                if indices is None:
                    # indptr in the dtype of the indices when the bound allows: scipy keeps
                    # both then, instead of scanning and converting an int64 indptr.
                    indices = np.empty(bound, dtype=block.indices.dtype)
                    small = indices.dtype == np.int32 and max(bound, n) < 2**31 - 1
                    indptr = np.empty(n + 1, dtype=np.int32 if small else np.int64)
                    indptr[0] = 0
                count = block.nnz
                indices[filled : filled + count] = block.indices
                data[filled : filled + count] = block.data
                np.add(block.indptr[1:], filled, out=indptr[start + 1 : stop + 1])
                filled += count
                progress.advance(stop - start)
        if indices is None:  # no states
            indices, indptr = np.empty(0, dtype=np.int32), np.zeros(n + 1, dtype=np.int32)
        indices = indices[:filled]
        data = data[:filled]
        W = sp.csr_matrix((data, indices, indptr), shape=(n, n))
        # Column sums as W^T 1 (a transposed sparse product, no copy of W). Off-diagonals are
        # >= 0 (checked per block) and the diagonal <= 0 (checked here), so |column| sums =
        # sums - 2 diag. The vector of ones is then reused for the absolute sums (one
        # n-vector less of fresh memory to fault in).
        buffer = np.ones(n)
        column_sums = W.T @ buffer
        diagonal = W.diagonal()
        if n and diagonal.max() > 0:
            state = int(np.argmax(diagonal))
            raise ModelError(f"W[{state}, {state}] = {diagonal[state]}: the diagonal is minus "
                             "an exit rate and must be <= 0")
        column_abs = np.multiply(diagonal, -2.0, out=buffer)
        column_abs += column_sums
        check = check_column_sums(column_sums, diagonal, model.conserving,
                                  float(column_abs.max(initial=0.0)))
        seconds = time.perf_counter() - started
        info = {
            "index_dtype": str(W.indices.dtype),
            "matrix_bytes": int(W.data.nbytes + W.indices.nbytes + W.indptr.nbytes),
            "block_rows": self.block_rows,
        }
        operator = Operator(model, n, int(W.nnz), check, seconds, handle={"W": W}, info=info)
        operator.handle["column_abs"] = column_abs
        return operator

    # -- slowest modes -----------------------------------------------------------------

    def _unfactored_modes(self, operator: Operator, count: int, tolerance: float,
                          want_vectors: bool) -> Modes:
        from pipeline.backends.krylov import krylov_modes

        return krylov_modes(operator, count, tolerance, want_vectors)

    def _dense_modes(self, operator: Operator, count: int, want_vectors: bool) -> Modes:
        n = operator.n_states
        needed = 40 * n * n
        if needed > DENSE_MEMORY_LIMIT:
            raise SolverError(
                f"solve.method: 'dense' on {n} states needs about {needed / 2**30:.0f} GiB; "
                "use method = 'shift-invert'"
            )
        started = time.perf_counter()
        W = operator.handle["W"]
        all_values, left, right = scipy.linalg.eig(W.toarray(), left=True, right=True)
        scale = operator.check.norm1
        chosen, group_complete = take_slowest(all_values, count,
                                              grouping_tolerance(all_values, scale))
        values, vectors = all_values[chosen], _normalize_columns(right[:, chosen])
        residuals = _residuals(W, values, vectors, scale)
        condition = eigenvalue_conditions(all_values, right, all_values, left,
                                          CLUSTER_FACTOR * scale, chosen)
        certificate = {"kind": "dense", "note": f"all {n} eigenvalues computed (LAPACK geev)"}
        return Modes(
            values=values.astype(np.complex128),
            residuals=residuals,
            vectors=vectors if want_vectors else None,
            method="dense (scipy.linalg.eig, LAPACK geev)",
            certified=True,
            certificate=certificate,
            group_complete=group_complete,
            seconds=time.perf_counter() - started,
            condition=condition,
            error_estimates=_error_estimates(condition, residuals, scale),
            info={"searched": n},
        )

    def _factorize(self, operator: Operator) -> tuple[float, Any]:
        """LU of ``W - sigma I`` (cached on the operator)."""
        cached = operator.handle.get("lu")
        if cached is not None:
            return cached
        started = time.perf_counter()
        W = operator.handle["W"]
        shift = SHIFT_FACTOR * max(operator.check.max_exit_rate, np.finfo(float).tiny)
        shifted = (W - shift * sp.identity(operator.n_states, format="csr")).tocsc()
        try:
            lu = spla.splu(shifted, permc_spec="COLAMD")
        except MemoryError:
            raise SolverError(
                "solve: the sparse LU of W does not fit in memory; use fewer states or a "
                "distributed backend"
            ) from None
        fill = (lu.L.nnz + lu.U.nnz) / max(W.nnz, 1)
        log(f"solve: LU of W - {shift:.2e} I in {time.perf_counter() - started:.1f} s "
            f"(fill-in x{fill:.1f})")
        operator.handle["lu"] = (shift, lu)
        operator.info["lu_fill_ratio"] = float(fill)
        return shift, lu

    def _enclosure(self, operator: Operator) -> SpectrumEnclosure:
        """Gershgorin disks of ``W`` and the smaller of two Bendixson bounds: that of ``W``
        and, for a conserving generator, that of ``S = P^{-1/2} W P^{1/2}`` with ``P`` the
        stationary distribution (a similarity, so the same spectrum; ``S`` is symmetric
        exactly when detailed balance holds, and its bound is then ~0)."""
        W = operator.handle["W"]
        n = operator.n_states
        diagonal = W.diagonal()
        radii = operator.handle["column_abs"] - np.abs(diagonal)
        bounds = {"plain": _skew_bound(W)}
        if operator.check.conserving:
            p = self._stationary_vector(operator)[0]
            if p.min() > 1e-250:
                root = np.sqrt(p)
                S = sp.diags(1.0 / root) @ W @ sp.diags(root)
                norm = float((abs(S).T @ np.ones(n)).max(initial=0.0))
                # Margin for the rounding of the scaled entries (common practice).
                bounds["balanced"] = _skew_bound(S) + 1e-12 * norm
        operator.info["imag_bounds"] = bounds
        return SpectrumEnclosure(diagonal, np.clip(radii, 0, None), min(bounds.values())).compact()

    def _shift_invert_modes(
        self, operator: Operator, count: int, tolerance: float, want_vectors: bool,
        max_search: int,
    ) -> Modes:
        started = time.perf_counter()
        n = operator.n_states
        W = operator.handle["W"]
        scale = operator.check.norm1
        shift, lu = self._factorize(operator)
        solve_count = {"n": 0}
        # A conserving W has the exact left null vector 1 and the right one p (computed
        # first). The search runs on Q (W - sigma I)^{-1} with the spectral projector
        # Q = I - p 1^T, which removes the stationary mode: otherwise its eigenvalue 1/sigma
        # swamps the Krylov basis and costs the other modes ~eps/(sigma |theta|) of accuracy
        # when W is far from normal (Wielandt-type deflation; Saad 2011, Numerical Methods
        # for Large Eigenvalue Problems, 4.2).
        deflated = operator.check.conserving
        stationary = self._stationary_vector(operator)[0] if deflated else None

        def apply_inverse(x: np.ndarray) -> np.ndarray:
            solve_count["n"] += 1
            y = lu.solve(np.asarray(x, dtype=np.float64))
            if deflated:
                y -= stationary * y.sum()
            return y

        inverse = spla.LinearOperator((n, n), matvec=apply_inverse, dtype=np.float64)
        enclosure = self._enclosure(operator)
        cap = max(min(max_search, n - 2, _basis_capacity(n)), count)
        search = min(max(2 * count + 8, 24), cap)
        rounds = []
        while True:
            values, vectors, converged = _arpack_nearest(
                W, inverse, shift, search - int(deflated), tolerance, stationary
            )
            if deflated:
                vectors = np.column_stack([stationary.astype(complex), vectors])
            values = _rayleigh_quotients(W, vectors)
            vectors = _normalize_columns(vectors)
            residuals = _residuals(W, values, vectors, scale)
            radius = float(np.abs(values - shift).max(initial=0.0))
            chosen, group_complete = take_slowest(values, count,
                                                  grouping_tolerance(values, scale))
            threshold = float(values[chosen[-1]].real)
            required = farthest_enclosed_distance(enclosure, shift, threshold)
            trusted = converged and bool(residuals.max(initial=0.0) <= RESIDUAL_CEILING)
            certified = trusted and required < radius * (1 - 1e-9)
            rounds.append({"searched": int(values.size), "radius": radius,
                           "required_radius": required, "converged": bool(converged)})
            log(f"solve: searched the {values.size} eigenvalues nearest {shift:.2e}: disk "
                f"radius {radius:.3e}, certificate needs {required:.3e}")
            if certified or search >= cap or not converged:
                break
            search = min(2 * search, cap)
        if certified:
            note = ("every eigenvalue with real part >= the last mode lies inside the searched "
                    "disk (Gershgorin/Bendixson enclosure)")
        elif not converged:
            note = "ARPACK did not converge; the set may miss slower modes"
        else:
            note = (f"NOT CERTIFIED: the searched disk (radius {radius:.3e}) does not cover the "
                    f"spectrum enclosure up to real part {threshold:.3e} (needs {required:.3e}); "
                    "slower modes with large imaginary parts may be missing; raise "
                    "solve.max_search")
        certificate = {
            "kind": "shift-invert disk + Gershgorin/Bendixson enclosure",
            "shift": shift,
            "radius": radius,
            "required_radius": required,
            "imag_bound": enclosure.imag_bound,
            "rounds": rounds,
            "note": note,
        }
        left_values, left = self._left_modes(operator, rounds[-1]["searched"], tolerance)
        condition = eigenvalue_conditions(values, vectors, left_values, left,
                                          CLUSTER_FACTOR * scale, chosen)
        values, vectors, residuals = values[chosen], vectors[:, chosen], residuals[chosen]
        return Modes(
            values=values.astype(np.complex128),
            residuals=residuals,
            vectors=vectors if want_vectors else None,
            method="shift-invert Arnoldi (ARPACK) with SuperLU, widened until certified",
            certified=certified,
            certificate=certificate,
            group_complete=group_complete,
            seconds=time.perf_counter() - started,
            condition=condition,
            error_estimates=_error_estimates(condition, residuals, scale),
            info={"searched": rounds[-1]["searched"], "inner_solves": solve_count["n"],
                  "lu_fill_ratio": operator.info.get("lu_fill_ratio")},
        )

    def _left_modes(
        self, operator: Operator, count: int, tolerance: float
    ) -> tuple[np.ndarray, np.ndarray]:
        """The ``count`` left eigenpairs nearest the shift (``l^H W = mu l^H``), from ARPACK
        on ``W^T`` with transposed solves of the same LU."""
        n = operator.n_states
        W = operator.handle["W"]
        shift, lu = self._factorize(operator)
        deflated = operator.check.conserving
        stationary = self._stationary_vector(operator)[0] if deflated else None
        ones = np.ones(n)

        def apply_inverse_transpose(x: np.ndarray) -> np.ndarray:
            y = lu.solve(np.asarray(x, dtype=np.float64), trans="T")
            if deflated:  # Q^T = I - 1 p^T removes the left stationary vector 1
                y -= ones * (stationary @ y)
            return y

        inverse_transpose = spla.LinearOperator((n, n), matvec=apply_inverse_transpose,
                                                dtype=np.float64)
        values, vectors, _ = _arpack_nearest(W.T.tocsr(), inverse_transpose, shift,
                                             count - int(deflated), tolerance, None)
        if deflated:
            values = np.concatenate([[ones @ (W @ ones) / n], values])
            vectors = np.column_stack([ones.astype(complex), vectors])
        # W^T y = mu y  means  conj(y)^H W = mu conj(y)^H: the left vector is conj(y).
        return values, np.conj(vectors)

    # -- stationary distribution --------------------------------------------------------

    def stationary(self, operator: Operator, dense_limit: int = 1024) -> Stationary:
        if not operator.check.conserving:
            raise SolverError("solve.stationary: W is a sub-generator (probability leaks "
                              "out), so there is no stationary distribution; set it to false")
        started = time.perf_counter()
        p, method, steps = self._stationary_vector(operator, dense_limit)
        W = operator.handle["W"]
        negative_mass = float(-p[p < 0].sum()) + 0.0
        p = np.clip(p, 0.0, None)
        p /= p.sum()
        residual = _stationary_residual(W, p, operator.check.norm1)
        seconds = operator.info.get("stationary_seconds", 0.0) + time.perf_counter() - started
        info: dict[str, Any] = {"iterations": steps}
        if "stationary_error_estimate" in operator.info:
            info["error_estimate"] = operator.info["stationary_error_estimate"]
        return Stationary(p, residual, negative_mass, method, seconds, info=info)

    def _stationary_vector(
        self, operator: Operator, dense_limit: int = 1024
    ) -> tuple[np.ndarray, str, int]:
        """Null vector of ``W`` normalized to sum 1, before clipping (cached)."""
        cached = operator.handle.get("stationary")
        if cached is not None:
            return cached
        if "krylov_stationary" in operator.handle:  # left by method 'krylov' (no LU at all)
            operator.handle["stationary"] = operator.handle["krylov_stationary"]
            return operator.handle["stationary"]
        started = time.perf_counter()
        W = operator.handle["W"]
        n = operator.n_states
        if n <= dense_limit and "lu" not in operator.handle:
            # Replace the last balance equation by the normalization sum(p) = 1 (common practice).
            try:
                p = normalized_null_vector(W.toarray())
            except np.linalg.LinAlgError:
                raise SolverError("solve.stationary: the stationary distribution is not "
                                  "unique (W has several closed classes)") from None
            method, steps = "dense solve with the normalization row", 0
        else:
            shift, lu = self._factorize(operator)
            p, steps, estimate = _inverse_iteration(lu, n)
            method = f"inverse iteration with the LU of W - {shift:.2e} I"
            operator.info["stationary_error_estimate"] = estimate
            if not estimate <= STATIONARY_TARGET:
                warn(f"solve.stationary: inverse iteration stopped after {steps} steps with an "
                     f"estimated error of {estimate:.1e} (sum of |p - p_exact|): the gap is "
                     f"close to the shift {shift:.1e}")
        operator.handle["stationary"] = (p, method, steps)
        operator.info["stationary_seconds"] = time.perf_counter() - started
        return p, method, steps


def _inverse_iteration(lu: Any, n: int) -> tuple[np.ndarray, int, float]:
    """Stationary vector by inverse iteration with the LU of ``W - sigma I`` from the
    uniform law (see :mod:`pipeline.backends.inverse_iteration`)."""
    return inverse_iteration(lu.solve, np.full(n, 1.0 / n))


def _error_estimates(condition: np.ndarray, residuals: np.ndarray, scale: float) -> np.ndarray:
    """First-order error bounds ``condition * residual * ||W||_1`` (inf where the condition
    is unbounded, even for a zero residual)."""
    with np.errstate(invalid="ignore", over="ignore"):
        estimates = condition * residuals * scale
    return np.where(np.isfinite(condition), estimates, np.inf)


def _basis_capacity(n: int) -> int:
    """Most Arnoldi vectors of length ``n`` that fit in a share of physical memory (the
    basis holds about 2k + 1 real vectors plus k complex eigenvectors)."""
    try:
        memory = os.sysconf("SC_PAGE_SIZE") * os.sysconf("SC_PHYS_PAGES")
    except (ValueError, OSError, AttributeError):
        memory = 16 * 2**30
    return max(1, int(BASIS_MEMORY_FRACTION * memory / (n * 8 * 4)))


def _skew_bound(W: sp.spmatrix) -> float:
    """``||(W - W^T)/2||_1``, an upper bound of ``|Im lambda|`` (Bendixson)."""
    skew = (W - W.T).tocsr()
    return 0.5 * float((abs(skew).T @ np.ones(W.shape[0])).max(initial=0.0))


def _arpack_nearest(
    W: sp.csr_matrix, inverse: spla.LinearOperator, shift: float, count: int, tolerance: float,
    stationary: np.ndarray | None,
) -> tuple[np.ndarray, np.ndarray, bool]:
    """ARPACK shift-invert: the ``count`` eigenpairs nearest ``shift``; ``converged`` flag.

    The start vector is a fixed pseudo-random one (results repeat run to run), stripped of
    its stationary component when ``stationary`` is given.
    """
    n = W.shape[0]
    if count <= 0:  # nothing beyond the deflated stationary mode was asked for
        return np.zeros(0, dtype=complex), np.zeros((n, 0), dtype=complex), True
    ncv = min(n, max(2 * count + 1, count + 24))  # ARPACK needs count + 1 < ncv <= n
    start = np.random.default_rng(20261201).standard_normal(n)
    if stationary is not None:
        start -= stationary * start.sum()
    try:
        values, vectors = spla.eigs(W, k=count, sigma=shift, OPinv=inverse, which="LM",
                                    tol=tolerance, ncv=ncv, v0=start,
                                    maxiter=max(1000, 10 * n // ncv))
        return values, vectors, True
    except spla.ArpackNoConvergence as failure:
        return failure.eigenvalues, failure.eigenvectors, False


def _rayleigh_quotients(W: sp.csr_matrix, vectors: np.ndarray) -> np.ndarray:
    products = W @ vectors
    return np.einsum("ij,ij->j", vectors.conj(), products) / np.einsum(
        "ij,ij->j", vectors.conj(), vectors
    )


def _normalize_columns(vectors: np.ndarray) -> np.ndarray:
    """Unit 2-norm columns whose largest-modulus entry is real and positive."""
    vectors = np.asarray(vectors, dtype=np.complex128)
    if vectors.size == 0:
        return vectors
    pivot = vectors[np.argmax(np.abs(vectors), axis=0), np.arange(vectors.shape[1])]
    phase = pivot / np.abs(pivot)
    vectors = vectors / phase
    return vectors / np.linalg.norm(vectors, axis=0)


def _residuals(W: sp.spmatrix | np.ndarray, values: np.ndarray, vectors: np.ndarray,
               scale: float) -> np.ndarray:
    """``||W v - lambda v||_2 / ||W||_1`` for unit columns ``v``."""
    if vectors.size == 0:
        return np.zeros(0)
    difference = W @ vectors - vectors * values[None, :]
    return np.linalg.norm(difference, axis=0) / max(scale, np.finfo(float).tiny)


def _stationary_residual(W: sp.csr_matrix, p: np.ndarray, scale: float) -> float:
    """``||W p||_1 / (||W||_1 ||p||_1)``."""
    return float(np.abs(W @ p).sum() / (max(scale, np.finfo(float).tiny) * np.abs(p).sum()))



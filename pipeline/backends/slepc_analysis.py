"""Analysis operations of the ``slepc`` backend (mixed into :class:`SlepcBackend`), the same
code on one rank and under ``mpiexec -n P``.

Every state vector is *local rows* ``[start, stop)`` (``local_rows``); nothing gathers ``W``
or a whole vector except the mode expansion up to ``solve.dense_limit`` states.

- currents: the flux ``F = W diag(p)`` (a copy of ``W`` scaled by columns, read and freed)
  and the parallel transpose ``W^T`` scaled by rows with the rank's own ``p``, whose local
  rows hold the reverse flux ``F_ji`` of every local entry ``(i, j)`` (aligned by the key
  ``i n + j``); sums and maxima reduced over the ranks. At most one matrix besides ``W``.
- transposed solves: MUMPS LU of ``W``, ``KSPSolveTranspose``.
- ``exp(tW) p0``: SLEPc's MFN, Expokit (Sidje 1998, ACM Trans. Math. Softw. 24, 130: Krylov
  projection with time stepping) by default; ``[solve.petsc] mfn_type = "krylov"`` selects
  the restarted Krylov method.
- communicating classes and per-class stationary laws: :mod:`pipeline.backends.slepc_classes`.
- mode expansion: right vectors from ``slowest_modes``, left ones from Krylov–Schur with
  shift-and-invert on ``W^T`` (dense ``geev`` of the gathered ``W`` up to the dense limit).
"""

from __future__ import annotations

from typing import Any

import numpy as np

from pipeline.analysis.evolution import mode_sum
from pipeline.backends.base import Currents, Operator, flows_from_entries
from pipeline.backends.petsc_tools import apply_transpose, petsc
from pipeline.backends.slepc_classes import SlepcClasses
from pipeline.errors import SolverError
from pipeline.models.base import RowBlock

__all__ = ["SlepcAnalysis"]

BLOCK_ROWS = 1 << 16
MFN_TOLERANCE = 1e-14
#: a left eigenvalue of W^T pairs with a right one when they differ by at most this x ||W||_1
PAIRING_TOLERANCE = 1e-8


class SlepcAnalysis(SlepcClasses):
    """The analysis methods of the Backend interface on a distributed PETSc ``W`` (classes
    and class stationary laws from :class:`SlepcClasses`)."""

    world: Any
    name: str

    def local_rows(self, operator: Operator) -> tuple[int, int]:
        return operator.handle["rows"]

    # -- currents ------------------------------------------------------------------------

    def currents(self, operator: Operator, distribution: np.ndarray) -> Currents:
        W = operator.handle["W"]
        start, stop = operator.handle["rows"]
        n = operator.n_states
        p = np.asarray(distribution, dtype=np.float64)
        if p.shape != (stop - start,):
            raise ValueError(f"currents: expected the {stop - start} local rows of p, got "
                             f"shape {p.shape}")
        PETSc = petsc()
        weights = W.createVecRight()
        weights.getArray()[:] = p
        # At most one matrix beside W at a time: F = W diag(p), read and freed, then W^T.
        flux_matrix = W.copy()
        flux_matrix.diagonalScale(R=weights)  # F_ij = W_ij p_j, the pattern of W
        indptr, indices, flux = flux_matrix.getValuesCSR()
        flux = np.array(flux, dtype=np.float64)
        flux_matrix.destroy()
        transposed = W.transpose(PETSc.Mat())  # local row i holds W_ji
        own = transposed.createVecLeft()
        own.getArray()[:] = p
        transposed.diagonalScale(L=own)  # F_ji = W_ji p_i with this rank's own p_i
        backward = _sorted_entries(transposed, start, n)
        transposed.destroy()
        model = operator.model

        def local() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            pattern = W.getValuesCSR()  # the rates, for the model's channel hook
            if not np.array_equal(pattern[1], indices):
                raise RuntimeError("currents: the flux matrix lost the pattern of W")
            channels = _channels(model, start, stop, *pattern)
            rows = np.repeat(np.arange(start, stop, dtype=np.int64), np.diff(indptr))
            columns = indices.astype(np.int64)
            off = rows != columns
            wanted = rows[off] * n + columns[off]  # entry (i, j) of F^T is F_ji
            return flux[off], _lookup(*backward, wanted), channels[off]

        flux, reverse, channels = self.world.collective(local)
        return flows_from_entries(flux, reverse, channels, len(model.channel_names()),
                                  world=self.world)

    # -- transposed solves (absorption) ------------------------------------------------------

    def solve_transposed(self, operator: Operator,
                         rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        W = operator.handle["W"]
        rhs = np.asarray(rhs, dtype=np.float64)
        matrix = rhs if rhs.ndim == 2 else rhs[:, None]
        ksp = self._transposed_solver(operator)
        x, y = W.createVecs()
        solution = np.empty_like(matrix)
        for column in range(matrix.shape[1]):  # a loop over right-hand sides (1 + exits)
            x.getArray()[:] = matrix[:, column]
            ksp.solveTranspose(x, y)
            solution[:, column] = y.getArray(readonly=True)
        finite = self.world.min(float(np.isfinite(solution).all()))
        if not finite or ksp.getConvergedReason() < 0:
            raise SolverError("analyze: the absorption solve is not finite: W^T is singular "
                              "(a closed class inside a sub-generator)")
        misfit = np.abs(apply_transpose(W, solution) - matrix).max(axis=0, initial=0.0)
        largest = np.abs(solution).max(axis=0, initial=0.0)
        right = np.abs(matrix).max(axis=0, initial=0.0)
        misfit, largest, right = (np.array([self.world.max(float(v)) for v in column])
                                  for column in (misfit, largest, right))
        size = operator.check.norm1 * largest + right
        residual = misfit / np.maximum(size, np.finfo(float).tiny)
        return (solution, residual) if rhs.ndim == 2 else (solution[:, 0], residual)

    def _transposed_solver(self, operator: Operator) -> Any:
        """MUMPS LU of ``W`` (built once per operator; options prefix ``absorb_``)."""
        cached = operator.handle.get("transposed_solver")
        if cached is not None:
            return cached
        PETSc = petsc()
        W = operator.handle["W"]
        ksp = PETSc.KSP().create(comm=W.getComm())
        ksp.setOperators(W)
        ksp.setType("preonly")
        pc = ksp.getPC()
        pc.setType("lu")
        pc.setFactorSolverType("mumps")
        ksp.setOptionsPrefix("absorb_")
        self._apply_user_options()
        ksp.setFromOptions()
        pc.setFactorSetUpSolverType()
        factored = pc.getFactorMatrix()
        factored.setMumpsIcntl(24, 1)  # detect null pivots: a singular W^T is an error
        singular = SolverError("analyze: W^T is singular: some states never leave (a closed "
                               "class inside a sub-generator); absorption times are infinite "
                               "there")

        def factor() -> None:
            try:
                ksp.setUp()
            except PETSc.Error:
                raise singular from None
            if factored.getMumpsInfog(28) > 0:  # the number of null pivots (global)
                raise singular

        self.world.collective(factor)
        operator.handle["transposed_solver"] = ksp
        return ksp

    # -- time evolution --------------------------------------------------------------------

    def evolve_method(self, operator: Operator) -> str:
        kind = self._exponential(operator)[0].getType()
        detail = {"expokit": "Expokit, Krylov projection with time stepping (Sidje 1998)",
                  "krylov": "restarted Krylov projection"}.get(kind, kind)
        return (f"{self.name}: SLEPc MFN ({kind}): exp(tW) p0 by {detail}, tolerance "
                f"{MFN_TOLERANCE:g}, {self.world.size} ranks")

    def evolve(self, operator: Operator, start: np.ndarray, times: np.ndarray) -> np.ndarray:
        W = operator.handle["W"]
        mfn, function = self._exponential(operator)
        times = np.asarray(times, dtype=np.float64)
        current, image = W.createVecs()
        current.getArray()[:] = np.asarray(start, dtype=np.float64)
        result = np.empty((times.size, current.getLocalSize()))
        now = 0.0
        for index, moment in enumerate(times):  # a loop over requested times
            if moment > now:
                function.setScale(moment - now)
                mfn.solve(current, image)
                reason = mfn.getConvergedReason()
                if reason < 0:
                    raise SolverError(f"evolve.times: SLEPc MFN did not converge from t = "
                                      f"{now:g} to {moment:g} (reason {reason}); fix: add "
                                      "intermediate times to evolve.times")
                current, image = image, current
                now = moment
            result[index] = current.getArray(readonly=True)
        return result

    def _exponential(self, operator: Operator) -> tuple[Any, Any]:
        """SLEPc MFN for ``exp(s W) v`` (built once per operator; prefix ``mfn_``)."""
        cached = operator.handle.get("exponential")
        if cached is not None:
            return cached
        from slepc4py import SLEPc

        W = operator.handle["W"]
        mfn = SLEPc.MFN().create(comm=W.getComm())
        mfn.setOperator(W)
        mfn.setType(SLEPc.MFN.Type.EXPOKIT)
        function = mfn.getFN()
        function.setType(SLEPc.FN.Type.EXP)
        mfn.setTolerances(tol=MFN_TOLERANCE, max_it=100000)
        self._apply_user_options()
        mfn.setFromOptions()
        operator.handle["exponential"] = (mfn, function)
        return mfn, function

    # -- mode expansion ---------------------------------------------------------------------

    def mode_expansion(self, operator: Operator, count: int, start: np.ndarray,
                       times: np.ndarray, dense_limit: int = 1024) -> tuple[np.ndarray,
                                                                           np.ndarray]:
        n = operator.n_states
        count = min(count, n)
        if n <= dense_limit:
            values, left, right = self._dense_left_right(operator, count)
        else:
            modes = self.slowest_modes(operator, count, method="shift-invert", vectors=True,
                                       dense_limit=dense_limit)
            values, right = modes.values, modes.vectors
            left = self._left_vectors_of(operator, values)
        return mode_sum(values, left, right, start, times, total=self.world.sum), values

    def _dense_left_right(self, operator: Operator,
                          count: int) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        """The ``count`` slowest eigenvalues with left and right vectors (local rows) from
        LAPACK ``geev`` of the gathered (small) ``W``, the same on every rank."""
        import scipy.linalg

        from pipeline.modes import grouping_tolerance, take_slowest

        start, stop = operator.handle["rows"]
        values, left, right = scipy.linalg.eig(self._gather_scipy(operator).toarray(),
                                               left=True, right=True)
        chosen, _ = take_slowest(values, count, grouping_tolerance(values,
                                                                    operator.check.norm1))
        return (values[chosen], left[start:stop, chosen].copy(),
                right[start:stop, chosen].copy())

    def _left_vectors_of(self, operator: Operator, values: np.ndarray) -> np.ndarray:
        """Left eigenvectors ``l`` (``l^H W = lambda l^H``, local rows ``[state, mode]``) of
        the eigenvalues ``values``: Krylov–Schur with shift-and-invert (MUMPS) on ``W^T``
        near the same small shift, each right eigenvalue paired with the nearest left one."""
        from slepc4py import SLEPc

        W = operator.handle["W"]
        scale = max(operator.check.norm1, np.finfo(float).tiny)
        transposed = W.copy()
        transposed.transpose()
        eps = SLEPc.EPS().create(comm=W.getComm())
        eps.setOperators(transposed)
        eps.setProblemType(SLEPc.EPS.ProblemType.NHEP)
        spectral = eps.getST()
        spectral.setType(SLEPc.ST.Type.SINVERT)
        ksp = spectral.getKSP()
        ksp.setType("preonly")
        ksp.getPC().setType("lu")
        ksp.getPC().setFactorSolverType("mumps")
        eps.setTarget(1e-9 * max(operator.check.max_exit_rate, np.finfo(float).tiny))
        eps.setWhichEigenpairs(SLEPc.EPS.Which.TARGET_MAGNITUDE)
        nev = min(operator.n_states - 2, 2 * values.size + 4)
        eps.setDimensions(nev=nev, ncv=min(operator.n_states - 1, max(2 * nev + 1, 32)))
        eps.setTolerances(tol=1e-12, max_it=10000)
        eps.setOptionsPrefix("left_")
        self._apply_user_options()
        eps.setFromOptions()
        eps.solve()
        converged = eps.getConverged()
        found = np.array([eps.getEigenvalue(i) for i in range(converged)], dtype=complex)
        vr, vi = transposed.createVecs()
        left = np.empty((vr.getLocalSize(), values.size), dtype=complex)
        for k, value in enumerate(values):  # a loop over modes
            distance = np.abs(found - value)
            nearest = int(np.argmin(distance)) if found.size else -1
            if nearest < 0 or distance[nearest] > PAIRING_TOLERANCE * scale:
                raise SolverError(f"evolve.modes: no left eigenvector of W found for the "
                                  f"eigenvalue {value:.6g}; fix: lower evolve.modes or raise "
                                  "solve.dense_limit above the number of states")
            eps.getEigenvector(nearest, vr, vi)
            # W^T y = mu y means conj(y)^H W = mu conj(y)^H: the left vector is conj(y).
            y = vr.getArray(readonly=True) + 1j * vi.getArray(readonly=True)
            left[:, k] = np.conj(y)
        eps.destroy()
        transposed.destroy()
        return left


def _sorted_entries(matrix: Any, start: int, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Keys ``i n + j`` (sorted) and values of the stored entries of this rank's rows."""
    indptr, indices, data = matrix.getValuesCSR()
    rows = np.repeat(np.arange(start, start + indptr.size - 1, dtype=np.int64),
                     np.diff(indptr))
    keys = rows * n + indices.astype(np.int64)
    if keys.size > 1 and not bool(np.all(keys[1:] > keys[:-1])):
        order = np.argsort(keys, kind="stable")
        keys, data = keys[order], data[order]
    return keys, np.asarray(data, dtype=np.float64)


def _lookup(keys: np.ndarray, values: np.ndarray, wanted: np.ndarray) -> np.ndarray:
    """``values`` at the sorted ``keys`` equal to ``wanted`` (0 where absent)."""
    if keys.size == 0:
        return np.zeros(wanted.size)
    position = np.minimum(np.searchsorted(keys, wanted), keys.size - 1)
    return np.where(keys[position] == wanted, values[position], 0.0)


def _channels(model: Any, start: int, stop: int, indptr: np.ndarray, indices: np.ndarray,
              data: np.ndarray) -> np.ndarray:
    """Channel of each local entry of ``W`` (CSR order), from the model's row blocks hook."""
    pieces = []
    for first in range(start, stop, BLOCK_ROWS):  # a loop over row blocks
        last = min(first + BLOCK_ROWS, stop)
        low, high = int(indptr[first - start]), int(indptr[last - start])
        block = RowBlock(first, last, (indptr[first - start : last - start + 1] - low)
                         .astype(np.int64), indices[low:high], data[low:high])
        pieces.append(model.transition_channels(block))
    return np.concatenate(pieces) if pieces else np.zeros(0, dtype=np.int64)

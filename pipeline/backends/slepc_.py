"""Distributed backend: PETSc matrices, SLEPc Krylov–Schur with shift-and-invert (MUMPS or
an iterative inner solve), an inertia certificate of completeness, and the stationary
distribution, the same under ``mpiexec -n P`` as on one process.

Ownership: rank r assembles and keeps rows ``pipeline.parallel.ownership_ranges(n, P)[r]``
(whole store chunks). Vectors in the returned ``Modes``/``Stationary`` are those local rows
(``vector_rows``/``rows`` say which); eigenvalues and certificates are the same on every rank.
"""

from __future__ import annotations

import resource
import time
from collections.abc import Callable
from typing import Any

import numpy as np
import scipy.sparse as sp

from pipeline.backends.base import (
    Backend,
    GeneratorCheck,
    Modes,
    Operator,
    Stationary,
    check_column_sums,
)
from pipeline.backends.conditioning import conditions_from_products
from pipeline.backends.inverse_iteration import STATIONARY_TARGET, inverse_iteration
from pipeline.backends.petsc_tools import (
    apply,
    apply_transpose,
    column_dots,
    combine,
    global_norms,
    gram,
    normalize_columns,
    petsc,
    start_vector,
    subtract_combination,
)
from pipeline.backends.slepc_analysis import SlepcAnalysis
from pipeline.errors import BackendError, ModelError, SolverError
from pipeline.models.base import Model, validate_block
from pipeline.modes import grouping_tolerance, take_slowest
from pipeline.parallel import ownership_ranges, state_chunk, world
from pipeline.progress import log, warn

__all__ = ["SlepcBackend"]

SHIFT_FACTOR = 1e-9  # target of shift-and-invert: this times the largest exit rate (> 0)
CLUSTER_FACTOR = 1e-8  # eigenvalues closer than this times ||W||_1 are one cluster
MAX_ROUNDS = 4
# modes asked for beyond the wanted ones: the certificate needs one converged real part
# below the last wanted group (the search widens when it has none)
EXTRA_MODES = 2
# Krylov–Schur tolerance floor: the residuals of the original problem come out ~1e3 times
# smaller than SLEPc's estimate for the transformed one (measured on the tests' chains and
# tori); they are computed explicitly and checked by verify either way.
KRYLOV_TOLERANCE_FLOOR = 1e-9
SYMMETRIC_TOLERANCE_FLOOR = 1e-10  # 1e-8 saved 14% of the solves but left W residuals ~1e-9
# block Lanczos of the symmetric-part path: the block width (4: the multiplicity of the
# generic mode of a square 2D torus; wider blocks converge in fewer steps but more solved
# columns, measured on the driven torus) and the largest basis per search round
LANCZOS_BLOCK = 4
LANCZOS_MAX_COLUMNS = 400
# Ritz pairs of the symmetric part beyond the wanted ones, at a loose tolerance: they only
# place the certificate's test shift below the last wanted group
LOOSE_MODES = 2
# the coarse start of the symmetric-part search (coarse_start.py), for models that group
# their states (Model.state_aggregates): tried from this size on (below it the search from a
# pseudo-random start is cheap), with aggregates of about this many states and a test shift
# in the first gap of at least this relative size among the coarse estimates
COARSE_START_MIN_STATES = 50_000
COARSE_AGGREGATE = 16
COARSE_GAP = 0.05
INNER_SOLVERS = ("direct", "iterative")
PRECONDITIONERS = {"auto": "bjacobi", "bjacobi": "bjacobi", "gamg": "gamg", "hypre": "hypre",
                   "asm": "asm"}


def _unavailable() -> str | None:
    try:
        import mpi4py  # noqa: F401
        from petsc4py import PETSc
        from slepc4py import SLEPc  # noqa: F401
    except ImportError as exc:
        return (f"solve.backend: 'slepc' needs petsc4py, slepc4py and mpi4py ({exc}); run "
                "'make venv' (it builds them against the system PETSc/SLEPc)")
    if not PETSc.Sys.hasExternalPackage("mumps"):
        return ("solve.backend: 'slepc' needs a PETSc built with MUMPS (Debian's "
                "libpetsc-real-dev has it); or set solve.inner = 'iterative'")
    return None


class SlepcBackend(SlepcAnalysis, Backend):
    name = "slepc"
    description = ("PETSc/SLEPc under MPI: distributed AIJ, Krylov–Schur + shift-and-invert "
                   "(MUMPS or GMRES), inertia certificate")
    block_rows = 1 << 16

    def __init__(self) -> None:
        from pipeline.backends.page_policy import prefer_small_pages

        # first touch is what memory costs here (page_policy.py); recorded in provenance
        self.small_pages = prefer_small_pages()
        self.world = world()
        self.inner = "direct"
        self.preconditioner = "auto"
        self.inner_tolerance = 1e-12
        self.options: dict[str, Any] = {}

    @classmethod
    def unavailable_reason(cls) -> str | None:
        return _unavailable()

    def configure(self, settings: Any) -> None:
        """Take the inner solver and PETSc options of a ``SolveConfig``."""
        self.inner = getattr(settings, "inner", "direct")
        self.preconditioner = getattr(settings, "preconditioner", "auto")
        self.inner_tolerance = getattr(settings, "inner_tolerance", 1e-12)
        self.options = dict(getattr(settings, "petsc", {}) or {})

    # -- assembly ------------------------------------------------------------------------

    def assemble(self, model: Model) -> Operator:
        """Each rank asks the model for its own rows and inserts them with exact
        preallocation (CSR); the column sums are checked as ``W^T 1`` (no gather)."""
        reason = self.unavailable_reason()
        if reason:
            raise BackendError(reason)
        PETSc = petsc()
        started = time.perf_counter()
        n = model.n_states
        ranks = self.world.size
        ranges = ownership_ranges(n, ranks)
        start, stop = ranges[self.world.rank]
        index_bytes = PETSc.IntType(0).itemsize
        if index_bytes == 4 and model.nnz_upper_bound(0, n) >= 2**31 - 1:
            raise BackendError(f"solve.backend: {n} states need 64-bit indices but this PETSc "
                               "uses 32-bit ones; use a PETSc built with --with-64-bit-indices")

        def local_rows() -> tuple[np.ndarray, np.ndarray, np.ndarray]:
            bound = model.nnz_upper_bound(start, stop) if stop > start else 0
            indices = np.empty(bound, dtype=PETSc.IntType)
            data = np.empty(bound, dtype=np.float64)
            indptr = np.zeros(stop - start + 1, dtype=PETSc.IntType)
            filled = 0
            for first in range(start, stop, self.block_rows):
                last = min(first + self.block_rows, stop)
                block = model.row_block(first, last)
                validate_block(block, n)
                count = block.nnz
                indices[filled : filled + count] = block.indices
                data[filled : filled + count] = block.data
                indptr[first - start + 1 : last - start + 1] = block.indptr[1:] + filled
                filled += count
            local = sp.csr_matrix((data[:filled], indices[:filled], indptr),
                                  shape=(stop - start, n))
            local.sort_indices()  # in place; PETSc's CSR preallocation wants sorted rows
            return local.indptr, local.indices, local.data

        indptr, indices, data = self.world.collective(local_rows)
        m = stop - start
        W = PETSc.Mat().createAIJ(size=((m, n), (m, n)),
                                  csr=(indptr.astype(PETSc.IntType, copy=False),
                                       indices.astype(PETSc.IntType, copy=False), data),
                                  comm=PETSc.COMM_WORLD)
        W.assemble()
        del indptr, indices, data
        ones, column_sums = W.createVecs()
        ones.set(1.0)
        W.multTranspose(ones, column_sums)
        diagonal = W.getDiagonal().getArray(readonly=True).copy()
        sums = column_sums.getArray(readonly=True).copy()

        def check_local() -> GeneratorCheck:
            if diagonal.size and diagonal.max() > 0:
                state = int(np.argmax(diagonal))
                raise ModelError(f"W[{start + state}, {start + state}] = {diagonal[state]}: the "
                                 "diagonal is minus an exit rate and must be <= 0")
            column_abs = sums - 2.0 * diagonal
            norm1 = self.world.max(float(column_abs.max(initial=0.0)))
            return check_column_sums(sums, diagonal, model.conserving, norm1, offset=start)

        local_check = self.world.collective(check_local)
        check = GeneratorCheck(
            conserving=model.conserving,
            norm1=local_check.norm1,
            max_exit_rate=self.world.max(local_check.max_exit_rate),
            column_sum_defect=self.world.max(local_check.column_sum_defect),
            tolerance=local_check.tolerance,
            leak_rate_max=self.world.max(local_check.leak_rate_max),
        )
        info = {
            "ranks": ranks,
            "ownership_ranges": [list(r) for r in ranges],
            "state_chunk": state_chunk(n, ranks),
            "index_bytes": int(index_bytes),
            "matrix_type": W.getType(),
        }
        nnz = int(W.getInfo(PETSc.Mat.InfoType.GLOBAL_SUM)["nz_used"])
        seconds = time.perf_counter() - started
        return Operator(model, n, nnz, check, seconds,
                        handle={"W": W, "rows": (start, stop)}, info=info)

    # -- slowest modes -------------------------------------------------------------------

    def _unfactored_modes(self, operator: Operator, count: int, tolerance: float,
                            want_vectors: bool) -> Modes:
        """Method ``krylov``: Krylov–Schur on ``W`` itself, no factorization, largest real
        parts (symmetric Lanczos when ``W = W^T``); never certified complete (a Krylov
        method proves nothing about eigenvalues it has not seen). The stationary vector is
        the mode-0 eigenvector of a conserving ``W``."""
        from slepc4py import SLEPc

        started = time.perf_counter()
        W = operator.handle["W"]
        n = operator.n_states
        rows = operator.handle["rows"]
        scale = operator.check.norm1
        if count >= n - 1:
            raise SolverError(f"solve.method: 'krylov' finds at most n - 2 = {n - 2} modes; "
                              "use 'dense' for this problem")
        probe = start_vector(*rows)[:, None]
        symmetric = float(global_norms(self.world, apply(W, probe) - apply_transpose(W, probe))
                          .max()) <= 1e-13 * scale * float(global_norms(self.world, probe).max())
        eps = SLEPc.EPS().create(comm=W.getComm())
        eps.setOperators(W)
        eps.setProblemType(SLEPc.EPS.ProblemType.HEP if symmetric
                           else SLEPc.EPS.ProblemType.NHEP)
        eps.setWhichEigenpairs(SLEPc.EPS.Which.LARGEST_REAL)
        nev = min(n - 2, count + EXTRA_MODES)
        eps.setDimensions(nev=nev, ncv=min(n - 1, max(4 * nev, 64)))
        eps.setTolerances(tol=max(tolerance, KRYLOV_TOLERANCE_FLOOR), max_it=100000)
        space = W.createVecRight()
        space.getArray()[:] = probe[:, 0]
        eps.setInitialSpace([space])
        self._apply_user_options()
        eps.setFromOptions()
        eps.solve()
        converged = eps.getConverged()
        values = np.array([eps.getEigenvalue(i) for i in range(converged)], dtype=complex)
        local = np.empty((rows[1] - rows[0], converged), dtype=complex)
        vr, vi = W.createVecs()
        for i in range(converged):  # a loop over modes
            eps.getEigenvector(i, vr, vi)
            local[:, i] = vr.getArray(readonly=True) + 1j * vi.getArray(readonly=True)
        iterations = int(eps.getIterationNumber())
        eps.destroy()
        if converged < count:
            raise SolverError(f"solve: Krylov–Schur on W converged {converged} of {count} "
                              "modes; raise solve.tolerance or use method 'shift-invert'")
        local = normalize_columns(self.world, local, rows[0])
        values = self._rayleigh_quotients(W, local)
        residuals = self._residuals(W, values, local, scale)
        chosen, group_complete = take_slowest(values, count, grouping_tolerance(values, scale))
        if operator.check.conserving and "stationary" not in operator.handle:
            top = int(np.argmax(values.real))
            p = np.abs(local[:, top].real)
            operator.handle["stationary"] = (p / self.world.sum(float(p.sum())),
                                             "eigenvector of mode 0 (method krylov)", 0,
                                             float("nan"))
        note = "NOT CERTIFIED: a Krylov method on W cannot prove that no slower mode exists"
        return Modes(
            values=values[chosen].astype(np.complex128), residuals=residuals[chosen],
            vectors=local[:, chosen] if want_vectors else None,
            method=("Lanczos" if symmetric else "Krylov–Schur") + " (SLEPc) on W, largest "
                   "real parts, no factorization",
            certified=False, certificate={"kind": "none", "note": note},
            group_complete=group_complete, seconds=time.perf_counter() - started,
            condition=np.ones(chosen.size) if symmetric else None,
            error_estimates=(residuals[chosen] * scale) if symmetric else None,
            info={**self._provenance(operator), "search": "krylov", "symmetric": symmetric,
                  "iterations": iterations, "converged": int(converged)},
            vector_rows=rows if want_vectors else None,
        )

    def _gather_scipy(self, operator: Operator) -> sp.csr_matrix:
        """The whole (small) matrix on every rank: only for the dense method."""
        W = operator.handle["W"]
        indptr, indices, data = W.getValuesCSR()
        pieces = self.world.allgather((indptr, indices, data))
        rows = [sp.csr_matrix((d, j, i), shape=(i.size - 1, operator.n_states))
                for i, j, d in pieces]
        return sp.vstack(rows, format="csr")

    def _dense_modes(self, operator: Operator, count: int, want_vectors: bool) -> Modes:
        from pipeline.backends.scipy_ import ScipyBackend

        W = self._gather_scipy(operator)
        local = Operator(operator.model, operator.n_states, operator.nnz, operator.check,
                         0.0, handle={"W": W})
        modes = ScipyBackend()._dense_modes(local, count, want_vectors)
        start, stop = operator.handle["rows"]
        if modes.vectors is not None:
            modes.vectors = modes.vectors[start:stop].copy()
            modes.vector_rows = (start, stop)
        modes.method = "dense (LAPACK geev on the gathered matrix, the same on every rank)"
        modes.info.update(self._provenance(operator))
        return modes

    def _shifted_solver(self, operator: Operator) -> dict[str, Any]:
        """The solver of ``(W - sigma I) x = b`` (MUMPS LU or GMRES + preconditioner),
        built once per operator and shared by the eigensolver, the stationary law and the
        left vectors (transposed solves)."""
        cached = operator.handle.get("shifted")
        if cached is not None:
            return cached
        PETSc = petsc()
        W = operator.handle["W"]
        shift = SHIFT_FACTOR * max(operator.check.max_exit_rate, np.finfo(float).tiny)
        shifted = W.copy()
        shifted.shift(-shift)
        ksp = PETSc.KSP().create(comm=W.getComm())
        ksp.setOperators(shifted)
        pc = ksp.getPC()
        if self.inner == "direct":
            ksp.setType("preonly")
            pc.setType("lu")
            pc.setFactorSolverType("mumps")
            inner = {"inner_solver": "direct", "factorization": "LU (MUMPS)"}
        else:
            ksp.setType("gmres")
            ksp.setTolerances(rtol=self.inner_tolerance, atol=0.0, max_it=10000)
            pc.setType(PRECONDITIONERS[self.preconditioner])
            inner = {"inner_solver": "iterative", "ksp": "gmres",
                     "pc": PRECONDITIONERS[self.preconditioner],
                     "inner_tolerance": self.inner_tolerance}
        ksp.setOptionsPrefix("st_")  # the prefix users know from SLEPc's shift-and-invert
        self._apply_user_options()
        ksp.setFromOptions()
        started = time.perf_counter()
        ksp.setUp()
        setup_seconds = time.perf_counter() - started
        log(f"solve: {inner['inner_solver']} solver of W - {shift:.2e} I ready in "
            f"{setup_seconds:.1f} s")
        cached = {"ksp": ksp, "matrix": shifted, "shift": shift, "inner": inner,
                  "setup_seconds": setup_seconds, "solves": 0,
                  "ksp_type": ksp.getType(), "pc_type": pc.getType()}
        operator.handle["shifted"] = cached
        return cached

    def _solve_shifted(self, operator: Operator, rhs: np.ndarray,
                       transpose: bool = False) -> np.ndarray:
        """``(W - sigma I)^-1 rhs`` (or its transpose) for local rows ``rhs``."""
        solver = self._shifted_solver(operator)
        x, y = solver["matrix"].createVecs()
        x.getArray()[:] = rhs
        (solver["ksp"].solveTranspose if transpose else solver["ksp"].solve)(x, y)
        solver["solves"] += 1
        reason = solver["ksp"].getConvergedReason()
        if reason < 0:
            raise SolverError(f"solve.inner: the inner solve of shift-and-invert failed (PETSc "
                              f"reason {reason}); use solve.inner = 'direct' or another "
                              "solve.preconditioner")
        return y.getArray(readonly=True).copy()

    def _apply_user_options(self) -> None:
        if not self.options:
            return
        options = petsc().Options()
        for key, value in self.options.items():
            if isinstance(value, bool):
                value = "true" if value else "false"
            options.setValue(str(key), str(value))

    def _eigensolve(self, operator: Operator, nev: int, ncv: int, tolerance: float,
                    initial: np.ndarray | None, stationary: np.ndarray | None,
                    transpose: bool = False, balanced: bool = True) -> dict[str, Any]:
        """Krylov–Schur on ``Q (W - sigma I)^-1`` (or its transpose), ranked by the real part
        of the back-transformed eigenvalue ``sigma + 1/theta``.

        ``Q = I - p 1^T`` removes the stationary mode (``p``, local rows; ``1^T`` is the left
        null vector of a conserving W): it maps its huge eigenvalue ``-1/sigma`` to 0 and
        leaves every other eigenvector unchanged, so it cannot swamp the Krylov basis
        (Wielandt-type deflation; Saad 2011, Numerical Methods for Large Eigenvalue
        Problems, 4.2). For ``W^T`` the projector is ``Q^T = I - 1 p^T``.

        With ``p`` known the search runs in balanced coordinates, on ``D^-1 Q (W - sigma
        I)^-1 D`` with ``D = diag(sqrt(p))``: a similarity (same eigenvalues), symmetric for
        reversible chains, so the Schur vectors give accurate eigenvectors even where W
        itself is far from normal (a biased chain with walls). ``initial`` and the returned
        vectors are in the original coordinates. ``balanced = False`` keeps ``D = I`` (a
        reducible chain, where ``p`` vanishes on some states) and the oblique projector.
        """
        from slepc4py import SLEPc

        PETSc = petsc()
        W = operator.handle["W"]
        solver = self._shifted_solver(operator)
        shift = solver["shift"]
        start, stop = operator.handle["rows"]
        backend = self

        oblique = None
        if stationary is not None and not balanced:
            # Q = I - p 1^T (Q^T = I - 1 p^T), p summing to 1, in the original coordinates
            scaling, null = np.ones(stop - start), None
            law = stationary / self.world.sum(float(stationary.sum()))
            ones = np.ones(stop - start)
            oblique = (ones, law) if transpose else (law, ones)
        elif stationary is not None:
            weights = self._scaling_from(stationary, floor=1e-100)
            # transposed problem: balanced by D^-1 (W^T is balanced by the inverse scaling)
            scaling = 1.0 / weights if transpose else weights
            # the null vector in these coordinates: D^-1 p for W, D 1 = E^-1 1 for W^T
            null = stationary / scaling if not transpose else weights
            null = null / np.sqrt(self.world.sum(float(null @ null)))
        else:
            scaling, null = np.ones(stop - start), None

        class ShiftedInverse:  # the operator SLEPc sees: D^-1 Q (W - sigma I)^-1 D
            def mult(self, matrix: Any, x: Any, y: Any) -> None:
                result = backend._solve_shifted(operator, scaling * x.getArray(readonly=True),
                                                transpose=transpose) / scaling
                if null is not None:  # the balanced projector is orthogonal: I - c c^T
                    result -= null * backend.world.sum(float(null @ result))
                elif oblique is not None:  # I - a b^T
                    result -= oblique[0] * backend.world.sum(float(oblique[1] @ result))
                y.getArray()[:] = result

        m = stop - start
        shell = PETSc.Mat().createPython(((m, operator.n_states), (m, operator.n_states)),
                                         ShiftedInverse(), comm=W.getComm())
        shell.setUp()
        eps = SLEPc.EPS().create(comm=W.getComm())
        eps.setOperators(shell)
        eps.setProblemType(SLEPc.EPS.ProblemType.NHEP)
        eps.setType(SLEPc.EPS.Type.KRYLOVSCHUR)
        # Rank by the real part of the original eigenvalue, not by distance to the shift:
        # complex slow modes with large imaginary parts are exactly those a nearest-first
        # search skips. theta ~ 0 (the deflated stationary mode, back to rounding level)
        # would back-transform to |lambda| >> ||W||: no eigenvalue of a generator lies there
        # (Gershgorin: |lambda - W_jj| <= exit rate), so such values rank last and are
        # dropped.
        largest = 2.0 * operator.check.norm1 + abs(shift)

        def real_part(theta: complex) -> float:
            theta = complex(theta)
            if abs(theta) * largest <= 1.0:
                return -np.inf
            return (shift + 1.0 / theta).real

        def by_real_part(a: complex, b: complex, *_: Any) -> int:
            first, second = real_part(a), real_part(b)
            return -1 if first > second else (1 if first < second else 0)

        eps.setWhichEigenpairs(SLEPc.EPS.Which.USER)
        eps.setEigenvalueComparison(by_real_part)
        eps.setDimensions(nev=nev, ncv=ncv)
        eps.setTolerances(tol=tolerance, max_it=100000)
        eps.getST().setType("shift")  # the shell already is the spectral transformation
        base = shell.createVecRight()
        seeds = initial if initial is not None else start_vector(start, stop)[:, None]
        space = []
        for column in np.atleast_2d(np.asarray(seeds).T):  # a loop over seed vectors
            vec = base.duplicate()
            vec.getArray()[:] = column / scaling
            space.append(vec)
        eps.setInitialSpace(space)
        self._apply_user_options()
        eps.setFromOptions()
        started = time.perf_counter()
        solves_before = solver["solves"]
        eps.solve()
        seconds = time.perf_counter() - started
        converged = eps.getConverged()
        thetas = np.array([eps.getEigenvalue(i) for i in range(converged)], dtype=complex)
        keep = np.abs(thetas) * largest > 1.0
        local = np.empty((m, converged), dtype=complex)
        vr, vi = shell.createVecs()
        for i in range(converged):  # a loop over modes
            eps.getEigenvector(i, vr, vi)
            local[:, i] = (vr.getArray(readonly=True) + 1j * vi.getArray(readonly=True)) * scaling
        nev_used, ncv_used, _ = eps.getDimensions()
        outcome = {
            "values": shift + 1.0 / thetas[keep], "vectors": local[:, keep],
            "seconds": seconds, "iterations": int(eps.getIterationNumber()),
            "nev": int(nev_used), "ncv": int(ncv_used),
            "reason": int(eps.getConvergedReason()),
            "solves": solver["solves"] - solves_before,
        }
        eps.destroy()
        shell.destroy()
        return outcome

    def _shift_invert_modes(self, operator: Operator, count: int, tolerance: float,
                            want_vectors: bool, max_search: int) -> Modes:
        started = time.perf_counter()
        W = operator.handle["W"]
        rows = operator.handle["rows"]
        n = operator.n_states
        scale = operator.check.norm1
        stationary = None
        if operator.check.conserving:
            stationary = self._stationary_vector(operator)[0]
        deflated = int(stationary is not None)
        # Ask for more than wanted: the certificate needs the next real part below the last
        # wanted group, to put its test shift in the gap.
        nev = min(n - 2, count + EXTRA_MODES) - deflated
        cap = max(min(max_search, n - 2) - deflated, 1)
        rounds: list[dict[str, Any]] = []
        initial = None
        certificate: dict[str, Any] = {}
        certified = False
        eps_seconds = 0.0
        path = "general"
        residual_data = kept = None
        # balancing by sqrt(p) needs p > 0 everywhere: not with transient states or several
        # closed classes (p vanishes there, up to rounding noise), where D = I is used
        balance = operator.irreducible is not False
        if (stationary is not None and balance and self.inner == "direct"
                and self._balanced_is_normal(operator, stationary)):
            found = self._symmetric_part_search(operator, count, tolerance, stationary)
            rounds.append(found["record"])
            eps_seconds += found["record"]["seconds"]
            values, local = found["values"], found["vectors"]
            if found.get("subspace") is not None:  # every residual from k x k numbers
                residual_data, kept = found["subspace"]
                residuals = residual_data.residuals(values, kept) / max(scale, 1e-300)
            else:
                residuals = self._residuals(W, values, local, scale)
            tol = grouping_tolerance(values, scale)
            chosen, group_complete = take_slowest(values, count, tol)
            certificate, certified = found["certificate"], found["certified"]
            path = "symmetric part"
            if not certified:
                log("solve: the symmetric-part search did not certify; searching W itself")
        while not certified:
            residual_data = None
            solver = self._shifted_solver(operator)
            nev = max(1, min(nev, cap))
            ncv = min(n - 1, max(4 * nev, 64))
            log(f"solve: Krylov–Schur on the shifted inverse about {solver['shift']:.2e}, "
                f"{nev} modes by real part (subspace {ncv})")
            result = self._eigensolve(operator, nev, ncv, max(tolerance, KRYLOV_TOLERANCE_FLOOR),
                                      initial, stationary, balanced=balance)
            eps_seconds += result["seconds"]
            values, local = result["values"], result["vectors"]
            if stationary is not None:
                values = np.concatenate([[0.0], values])
                local = np.column_stack([stationary.astype(complex), local])
            local = normalize_columns(self.world, local, rows[0])
            values = self._rayleigh_quotients(W, local)
            residuals = self._residuals(W, values, local, scale)
            tol = grouping_tolerance(values, scale)
            chosen, group_complete = take_slowest(values, count, tol)
            threshold = float(values[chosen].real.min())
            below = values.real[values.real < threshold - tol]
            record = {"nev": result["nev"], "ncv": result["ncv"],
                      "converged": int(values.size), "iterations": result["iterations"],
                      "inner_solves": result["solves"], "seconds": result["seconds"]}
            rounds.append(record)
            exhausted = len(rounds) >= MAX_ROUNDS or nev >= cap
            if below.size == 0:
                record["note"] = "no converged mode below the last wanted group"
                certificate = {"kind": "inertia", "note": "NOT CERTIFIED: the search never "
                               "reached below the last wanted group; raise solve.max_search"}
                if exhausted:
                    break
                nev, initial = 2 * nev, local.real
                continue
            test_shift = 0.5 * (threshold + float(below.max()))
            if self.inner != "direct":
                certificate = {"kind": "none", "note": "NOT CERTIFIED: the inertia certificate "
                               "needs a factorization; use solve.inner = 'direct' to certify"}
                break
            above = values.real > test_shift
            scaling = (self._balancing(values, local) if balance
                       else np.ones(local.shape[0]))
            cert = self._certify(W, scaling, values[above], local[:, above], test_shift)
            record.update(missing=cert.missing, certified=cert.certified,
                          certificate_seconds=cert.seconds)
            certificate = cert.as_dict()
            certified = cert.certified
            log(f"solve: certificate at t = {test_shift:.3e}: {cert.above_shift} above t, "
                f"{cert.captured} in the found span -> "
                + ("certified" if certified else f"{cert.missing} missing"))
            if certified or exhausted:
                break
            nev, initial = nev + max(cert.missing, 1) + 4, local.real
        # Condition numbers and error estimates in the balanced coordinates D^-1 W D (a
        # similarity, so a first-order bound there bounds the same eigenvalue): for
        # reversible chains they are those of a symmetric matrix, where W's own basis would
        # multiply both the residual and the condition by the conditioning of D.
        if residual_data is not None:
            # the symmetric-part search's subspace residuals give the balanced residuals,
            # the left residuals of the right vectors and their inner products directly
            balanced_residuals = residual_data.balanced_residuals(values, kept) / max(
                scale, 1e-300)
            left_residuals = residual_data.left_residuals(values, kept) / max(scale, 1e-300)
            if float(left_residuals.max(initial=0.0)) > max(1e3 * tolerance, 1e-9):
                residual_data = None  # the right vectors are no left ones: solve for them
            else:
                left_values = values.copy()
                left_method = ("right vectors of D^-1 W D (left residual checked, from the "
                               "subspace residuals)")
                products = (residual_data.vector_gram(kept),) * 3
        if residual_data is None:
            scaling = (self._balancing(values, local) if balance
                       else np.ones(local.shape[0]))
            if self.world.min(float(scaling.min(initial=1.0))) == 1.0 == self.world.max(
                    float(scaling.max(initial=1.0))):  # D = I: the same unit vectors
                balanced, balanced_residuals = local, residuals
            else:
                balanced = np.divide(local, scaling[:, None], order="F")
                balanced /= global_norms(self.world, balanced)[None, :]
                balanced_residuals = self._residuals(W, values, balanced, scale, scaling)
            left_values, left, left_method = self._left_vectors(operator, values, balanced,
                                                                scaling, scale, tolerance,
                                                                stationary, balance)
            products = (gram(self.world, balanced, balanced), gram(self.world, left, left),
                        gram(self.world, left, balanced))
            del balanced, left
        condition = conditions_from_products(values, left_values, *products,
                                             CLUSTER_FACTOR * scale, chosen)
        values_kept, residuals_kept = values[chosen], residuals[chosen]
        solver = operator.handle.get("shifted") or {
            "shift": None, "setup_seconds": sum(r.get("factor_seconds", 0.0) for r in rounds),
            "solves": int(sum(r.get("solved_columns", 0) for r in rounds)),
            "inner": {"inner_solver": "direct", "factorization": "LDL^T of sigma I - S "
                      "(MUMPS), refactored at the certificate's shift"},
            "ksp_type": "preonly", "pc_type": "cholesky"}
        info = {
            **self._provenance(operator),
            "searched": int(values.size),
            "rounds": rounds,
            "search": path,
            "shift": solver["shift"],
            "eigensolver_seconds": eps_seconds,
            "inner_setup_seconds": solver["setup_seconds"],
            "inner_solves": solver["solves"],
            "left_vectors": left_method,
            "condition_coordinates": "balanced D^-1 W D, D = diag(sqrt(p)) (p stationary or "
                                     "Perron vector); error estimates = condition x balanced "
                                     "residual x ||W||_1",
            **solver["inner"],
            "ksp_type": solver["ksp_type"],
            "pc_type": solver["pc_type"],
            "iterations": int(sum(r["iterations"] for r in rounds)),
        }
        if not certified:
            warn(f"solve: {certificate.get('note')}")
        with np.errstate(invalid="ignore", over="ignore"):
            estimates = np.where(np.isfinite(condition),
                                 condition * balanced_residuals[chosen] * scale, np.inf)
        return Modes(
            values=values_kept.astype(np.complex128),
            residuals=residuals_kept,
            vectors=local[:, chosen] if want_vectors else None,
            method=(("block Lanczos on the shifted inverse of the symmetric part of the "
                     "balanced generator + Rayleigh–Ritz on W, inertia certificate")
                    if path == "symmetric part" else
                    (f"Krylov–Schur (SLEPc) on the shifted inverse "
                     f"({solver['inner']['inner_solver']}), ranked by real part, inertia "
                     "certificate")),
            certified=certified,
            certificate=certificate,
            group_complete=group_complete,
            seconds=time.perf_counter() - started,
            condition=condition,
            error_estimates=estimates,
            info=info,
            vector_rows=rows if want_vectors else None,
        )

    def _balanced_is_normal(self, operator: Operator, stationary: np.ndarray) -> bool:
        """Whether ``Wb = D^-1 W D`` (``D = diag(sqrt(p))``) commutes with its transpose, on
        two fixed pseudo-random vectors (relative to ``||W||_1^2``): then the symmetric part
        ``(Wb + Wb^T)/2`` has the real parts of W's eigenvalues as its own eigenvalues and
        shares their eigenvectors (a normal matrix; Horn and Johnson 2013, Matrix Analysis,
        2.5), reversible chains and translation-invariant drives are the common cases."""
        W = operator.handle["W"]
        start, stop = operator.handle["rows"]
        scaling = self._scaling_from(stationary)
        probes = np.column_stack([start_vector(start, stop), np.cos(
            np.arange(start, stop) * 0.37)])

        def forward(x: np.ndarray) -> np.ndarray:
            return apply(W, x * scaling[:, None]) / scaling[:, None]

        def backward(x: np.ndarray) -> np.ndarray:
            return apply_transpose(W, x / scaling[:, None]) * scaling[:, None]

        commutator = forward(backward(probes)) - backward(forward(probes))
        size = global_norms(self.world, commutator) / np.maximum(
            global_norms(self.world, probes), 1e-300)
        return bool(size.max() <= 1e-12 * operator.check.norm1 ** 2)

    def _scaling_from(self, stationary: np.ndarray, floor: float = 1e-200) -> np.ndarray:
        """Local rows of ``D = diag(sqrt(p / max p))``, floored at ``sqrt(floor)`` so ``D``
        stays positive (any positive ``D`` is a similarity; ``p`` only makes it sharp)."""
        p = np.abs(stationary)
        peak = self.world.max(float(p.max(initial=0.0)))
        return np.sqrt(np.maximum(p / max(peak, 1e-300), floor))

    def _symmetric_part_search(self, operator: Operator, count: int, tolerance: float,
                               stationary: np.ndarray) -> dict[str, Any]:
        """For a normal balanced generator: the slowest modes from the largest eigenvalues of
        its symmetric part ``S`` (a real symmetric problem, the known null vector ``sqrt(p)``
        deflated), then Rayleigh–Ritz of ``Wb`` on their span, and the inertia certificate
        at a test shift ``t`` in the gap of ``S``'s eigenvalues.

        When the model groups its states (``Model.state_aggregates``) and the problem is
        large, the aggregated ``S`` first gives estimates that place ``t`` and start vectors
        (:meth:`_coarse_started_search`): one MUMPS ``LDL^T`` of ``t I - S`` then serves the
        count above ``t``, the search and the certificate. Otherwise, or when that does not
        certify: block Lanczos on ``(sigma I - S)^-1`` about a point ``sigma`` just above 0
        from a pseudo-random start, and the certificate on the same factorization refactored
        at ``t`` (the symbolic analysis is reused). Copies of a multiple eigenvalue beyond the
        block width are counted by the certificate (``missing``) and searched for again with
        everything found so far deflated. The certificate decides; nothing is assumed."""
        from pipeline.backends.block_lanczos import shift_invert_lanczos, start_block
        from pipeline.backends.inertia_certificate import orthonormal_basis, symmetric_part
        from pipeline.backends.symmetric_factor import ShiftedSymmetricFactor

        W = operator.handle["W"]
        start, stop = operator.handle["rows"]
        n = operator.n_states
        started = time.perf_counter()
        scaling = self._scaling_from(stationary)
        S, norm_s = symmetric_part(W, scaling)
        norm_s = max(norm_s, np.finfo(float).tiny)
        null = stationary / scaling
        null = null / np.sqrt(self.world.sum(float(null @ null)))
        above = SHIFT_FACTOR * max(operator.check.max_exit_rate, np.finfo(float).tiny)
        self._apply_user_options()
        factor = ShiftedSymmetricFactor(self.world, S)
        floor = max(tolerance, SYMMETRIC_TOLERANCE_FLOOR)

        work = S.createVecs()

        def apply_s(columns: np.ndarray) -> np.ndarray:
            return apply(S, columns, work)

        found = np.zeros((stop - start, 0))
        s_values = np.zeros(0)
        # the wanted modes besides the null vector need the tight tolerance; LOOSE_MODES
        # more only place the test shift (their eigenvalues converge as the square of the
        # residual, so a loose residual is enough), unless they are copies of the last
        # wanted eigenvalue
        tight = max(1, min(n - 2, count - 1))
        nev = max(1, min(n - 2, tight + LOOSE_MODES))
        loose = min(1e3 * floor, 1e-6)
        record = {"search": "symmetric part", "method": "block Lanczos, shift-and-invert "
                  "(MUMPS LDL^T)", "block_size": LANCZOS_BLOCK, "rounds": 0, "converged": 0,
                  "iterations": 0, "solved_columns": 0, "start": "pseudo-random"}
        cert, test_shift = None, None
        subspace = coefficients = None
        outcome = None
        labels = None
        if n >= COARSE_START_MIN_STATES:
            labels = operator.model.state_aggregates(start, stop, COARSE_AGGREGATE)
        if labels is not None:
            outcome = self._coarse_started_search(W, S, norm_s, scaling, null, labels,
                                                  factor, apply_s, tight, floor, above,
                                                  record, start)
        for _ in range(MAX_ROUNDS if outcome is None else 0):  # deflated restarts
            factor.at(above)
            deflation = orthonormal_basis(self.world, np.column_stack([null, found]))
            room = n - deflation.shape[1]
            nev = max(1, min(nev, room))
            width = max(1, min(LANCZOS_BLOCK, room))
            search = shift_invert_lanczos(
                self.world, factor.solve, apply_s, start_block(start, stop, width),
                deflation, (nev, _tight_then_loose(min(tight, nev), floor, loose, norm_s)),
                norm_s, max_columns=max(LANCZOS_MAX_COLUMNS, 4 * nev), dimension=n)
            # (fewer Ritz pairs than asked when the whole complement was spanned)
            keep_new = search.residuals <= search.tolerances
            new = search.vectors[:, keep_new]
            s_values = np.concatenate([s_values, search.values[keep_new]])
            found = np.column_stack([found, new])
            record["rounds"] += 1
            record["converged"] += int(keep_new.sum())
            record["iterations"] += int(search.steps)
            record["solved_columns"] += int(search.columns)
            log(f"solve: block Lanczos on the symmetric part: {int(keep_new.sum())} of "
                f"{nev} converged after {search.steps} steps ({search.columns} solved "
                "columns)")
            values, vectors, Q, coefficients, image = self._balanced_ritz(W, scaling, null,
                                                                          found, start)
            chosen, _ = take_slowest(values, count, grouping_tolerance(values,
                                                                       operator.check.norm1))
            threshold = float(values[chosen].real.min())
            ordered = np.sort(np.concatenate([[0.0], s_values]))[::-1]
            tol = grouping_tolerance(ordered.astype(complex), operator.check.norm1)
            below = ordered[ordered < threshold - tol]
            if below.size == 0:
                nev = 2 * nev
                continue
            candidate = 0.5 * (threshold + float(below.max()))
            if test_shift is None or not (float(below.max()) < test_shift < threshold):
                test_shift = candidate
            keep = values.real > test_shift
            cert, subspace = self._certify_found(W, scaling, values, vectors, Q,
                                                 coefficients, image, keep, test_shift,
                                                 factor)
            del Q, image
            if cert.certified or cert.missing <= 0:
                break
            tight = cert.missing
            nev = tight + LOOSE_MODES
        record.update(factorizations=factor.factorizations,
                      factor_seconds=factor.seconds)
        factor.destroy()
        for vec in work:
            vec.destroy()
        S.destroy()
        record["seconds"] = time.perf_counter() - started
        if outcome is not None:
            values, vectors, keep, cert, subspace, coefficients = outcome
        if cert is None:
            return {"values": values, "vectors": vectors, "record": record, "certified": False,
                    "certificate": {"kind": "inertia", "note": "NOT CERTIFIED: no gap found"}}
        record.update(missing=cert.missing, certified=cert.certified,
                      certificate_seconds=cert.seconds)
        return {"values": values[keep] if cert.certified else values,
                "vectors": vectors[:, keep] if cert.certified else vectors,
                "record": record, "certified": cert.certified, "certificate": cert.as_dict(),
                # the residuals of the kept modes in k x k numbers (subspace_residuals.py)
                "subspace": (subspace, coefficients[:, keep]) if cert.certified else None}

    def _coarse_started_search(self, W: Any, S: Any, norm_s: float, scaling: np.ndarray,
                               null: np.ndarray, labels: np.ndarray, factor: Any,
                               apply_s: Callable, tight: int, floor: float, above: float,
                               record: dict[str, Any], start: int) -> tuple | None:
        """The one-factorization try of :meth:`_symmetric_part_search`: estimates and start
        vectors from the aggregated ``S`` (``coarse_start.py``) place the test shift ``t``;
        one ``LDL^T`` of ``t I - S`` gives the count above ``t`` (inertia), the block
        Lanczos search for exactly those from the coarse start, and the certificate.
        ``(values, vectors, keep, certificate)`` when it certifies, else ``None`` (the
        caller then searches from a pseudo-random start; ``record`` says what happened)."""
        from pipeline.backends.block_lanczos import shift_invert_lanczos
        from pipeline.backends.coarse_start import coarse_start

        n = W.getSize()[0]
        coarse = coarse_start(self.world, S, null, labels, tight + LOOSE_MODES, above)
        if coarse is None:
            record["coarse_start"] = {"outcome": "no usable coarse space"}
            return None
        info = record["coarse_start"] = dict(coarse.info)
        estimates = coarse.estimates
        # the test shift: half-way across the first clear gap after the wanted ones (the
        # estimates are lower bounds; the inertia counts what is really above)
        gaps = estimates[tight - 1:-1] - estimates[tight:]
        clear = np.flatnonzero(gaps > COARSE_GAP * np.abs(estimates[tight - 1:-1])
                               + 1e-12 * norm_s)
        if clear.size == 0:
            info["outcome"] = "no clear gap among the coarse estimates"
            return None
        j = tight + int(clear[0])  # estimates[j - 1] > t > estimates[j]
        shift = 0.5 * (float(estimates[j - 1]) + float(estimates[j]))
        negative, zero, _ = factor.at(shift)
        above_shift = negative - 1  # the null vector's eigenvalue 0 is above too
        info.update(shift=shift, above_shift=int(negative))
        if zero or not tight <= above_shift <= coarse.vectors.shape[1]:
            info["outcome"] = (f"{negative} eigenvalues of S above the test shift: not the "
                               "count the coarse start was built for")
            return None
        loose = min(1e2 * floor, 1e-8)  # every mode above t enters the certificate
        start_vectors, width = coarse.vectors, coarse.vectors.shape[1]
        coarse.vectors = None  # (the search overwrites and then drops them)
        search = shift_invert_lanczos(
            self.world, factor.solve, apply_s, start_vectors, null[:, None],
            (above_shift, _tight_then_loose(tight, floor, loose, norm_s)), norm_s,
            max_columns=max(LANCZOS_MAX_COLUMNS, 4 * above_shift), dimension=n,
            estimate=False)  # (one or two steps from this start: check every step)
        del start_vectors
        converged = int(np.sum(search.residuals <= search.tolerances))
        # the work counts (a fallback after this adds its own); what started the search is
        # recorded only when this try is the one kept
        record.update(rounds=1, iterations=int(search.steps),
                      solved_columns=int(search.columns))
        log(f"solve: block Lanczos at the test shift {shift:.3e} from the coarse start: "
            f"{converged} of {above_shift} converged after {search.steps} steps "
            f"({search.columns} solved columns)")
        if not search.converged:
            info["outcome"] = "the search from the coarse start did not converge"
            return None
        found, search.vectors = search.vectors, None
        values, vectors, Q, coefficients, image = self._balanced_ritz(W, scaling, null, found,
                                                                      start)
        del found
        keep = values.real > shift
        cert, subspace = self._certify_found(W, scaling, values, vectors, Q, coefficients,
                                             image, keep, shift, factor)
        del Q, image
        info["outcome"] = "certified" if cert.certified else "not certified: " + cert.note
        if not cert.certified:
            return None
        record.update(converged=converged, block_size=int(width),
                      start=f"aggregated S ({coarse.info['coarse_states']} states)")
        return values, vectors, keep, cert, subspace, coefficients

    def _balanced_ritz(self, W: Any, scaling: np.ndarray, null: np.ndarray,
                       found: np.ndarray, start: int) -> tuple:
        """Rayleigh–Ritz of ``Wb = D^-1 W D`` on ``span(null, found)``: ``(values, vectors,
        Q, coefficients)``: the Ritz values (complex; the Rayleigh quotients of the balanced
        Ritz vectors), the Ritz vectors of ``W`` (unit columns, local rows), the orthonormal
        basis ``Q``, the coefficients of the balanced Ritz vectors in it, and ``Wb Q``."""
        from pipeline.backends.inertia_certificate import orthonormal_basis

        Q = np.empty((found.shape[0], found.shape[1] + 1), order="F")
        Q[:, 0] = null
        Q[:, 1:] = found
        products = gram(self.world, Q, Q)
        if np.abs(products - np.eye(Q.shape[1])).max(initial=0.0) > 1e-12:
            Q = orthonormal_basis(self.world, Q)  # (the search's vectors already are)
        WbQ = apply(W, np.multiply(Q, scaling[:, None], order="F"))
        WbQ /= scaling[:, None]
        ritz, coefficients = np.linalg.eig(gram(self.world, Q, WbQ))
        ritz_vectors = combine(Q, coefficients)
        ritz_vectors *= scaling[:, None]
        vectors = normalize_columns(self.world, ritz_vectors, start, overwrite=True)
        return ritz.astype(np.complex128), vectors, Q, coefficients, WbQ

    def _certify_found(self, W: Any, scaling: np.ndarray, values: np.ndarray,
                       vectors: np.ndarray, Q: np.ndarray, coefficients: np.ndarray,
                       image: np.ndarray, keep: np.ndarray, shift: float, factor: Any):
        """The inertia certificate of the found modes ``keep`` at ``shift`` on ``factor``
        (``image``: ``Wb Q``, overwritten), and the :class:`SubspaceResiduals` of ``Q``
        (every residual of the Ritz pairs follows from it)."""
        from pipeline.backends.inertia_certificate import certify_by_inertia
        from pipeline.backends.subspace_residuals import subspace_residuals

        subspace = subspace_residuals(self.world, W, Q, scaling, image)
        cert = certify_by_inertia(self.world, W, scaling, values[keep], vectors[:, keep],
                                  shift, factor=factor, span=(Q, coefficients[:, keep]),
                                  subspace=subspace)
        log(f"solve: symmetric-part search, certificate at t = {shift:.3e}: "
            f"{cert.above_shift} above t, {cert.captured} in the found span -> "
            + ("certified" if cert.certified else f"{cert.missing} missing"))
        return cert, subspace

    def _rayleigh_quotients(self, W: Any, local: np.ndarray) -> np.ndarray:
        products = apply(W, local)
        return column_dots(self.world, local, products) / global_norms(self.world, local) ** 2

    def _residuals(self, W: Any, values: np.ndarray, local: np.ndarray, scale: float,
                   scaling: np.ndarray | None = None) -> np.ndarray:
        """``||W v - lambda v|| / ||W||_1`` (or of ``D^-1 W D`` with ``D = diag(scaling)``)
        for unit columns."""
        if scaling is None:
            difference = apply(W, local)
        else:
            difference = apply(W, np.multiply(local, scaling[:, None], order="F"))
            difference /= scaling[:, None]
        subtract_combination(difference, local, np.diag(values))  # W v - v diag(lambda)
        return global_norms(self.world, difference) / max(scale, 1e-300)

    def _balancing(self, values: np.ndarray, local: np.ndarray) -> np.ndarray:
        """Local rows of ``D = diag(sqrt(p))``, ``p`` the stationary (Perron) vector: the
        eigenvector of the slowest mode, floored so ``D`` stays positive (any positive ``D``
        keeps the certificate rigorous; ``p`` makes it sharp)."""
        return self._scaling_from(local[:, int(np.argmax(values.real))].real)

    def _certify(self, W: Any, scaling: np.ndarray, values: np.ndarray, vectors: np.ndarray,
                 shift: float):
        from pipeline.backends.inertia_certificate import certify_by_inertia

        self._apply_user_options()
        return certify_by_inertia(self.world, W, scaling, values, vectors, shift)

    def _left_vectors(self, operator: Operator, values: np.ndarray, balanced: np.ndarray,
                      scaling: np.ndarray, scale: float, tolerance: float,
                      stationary: np.ndarray | None,
                      balance: bool = True) -> tuple[np.ndarray, np.ndarray, str]:
        """Left eigenvectors in balanced coordinates (``l^H Wb = mu l^H``, ``Wb = D^-1 W
        D``). First guess: the right ones (exact when ``Wb`` is normal), accepted when their
        left residual ``||Wb^T l - conj(mu) l||`` is small; otherwise a Krylov–Schur solve
        on ``W^T`` with transposed solves of the same factorization."""
        W = operator.handle["W"]
        guess = balanced
        left_residual = apply_transpose(W, np.divide(guess, scaling[:, None], order="F"))
        left_residual *= scaling[:, None]
        subtract_combination(left_residual, guess, np.diag(values.conj()))
        norms = global_norms(self.world, left_residual) / max(scale, 1e-300)
        del left_residual
        if float(norms.max(initial=0.0)) <= max(1e3 * tolerance, 1e-9):
            return values.copy(), guess, "right vectors of D^-1 W D (left residual checked)"
        deflated = int(stationary is not None)
        result = self._eigensolve(operator, max(values.size - deflated, 1),
                                  min(operator.n_states - 1, max(2 * values.size + 8, 48)),
                                  tolerance, None, stationary, transpose=True,
                                  balanced=balance)
        left_values, left = result["values"], result["vectors"]
        if stationary is not None:  # the left null vector of a conserving W is 1
            left_values = np.concatenate([[0.0], left_values])
            left = np.column_stack([np.ones(left.shape[0], dtype=complex), left])
        # W^T y = mu y means conj(y)^H W = mu conj(y)^H: the left vector of mu is conj(y);
        # in balanced coordinates it is D conj(y).
        return (left_values, np.conj(left) * scaling[:, None],
                "Krylov–Schur on W^T with transposed solves (the right vectors did not fit)")

    # -- analysis (the analyze and evolve stages) -----------------------------------------
    # Currents, transposed solves, exp(tW) p0 and the mode expansion are distributed
    # (slepc_analysis.py, the same code on 1 and P ranks), and so are the communicating
    # classes and class stationary laws (slepc_classes.py). On one process the symmetrized
    # solve runs the scipy backend's method on the same matrix in CSR form.

    def _one_process_view(self, operator: Operator, what: str) -> Operator:
        if self.world.size > 1:
            raise BackendError(f"{what}: not available on the slepc backend under MPI in this "
                               "version; rerun the stage on one process (gapline run CONFIG "
                               "--from analyze)")
        view = operator.handle.get("scipy_view")
        if view is None:  # the scipy backend's own operator of the same model (checked)
            view = self._scipy().assemble(operator.model)
            operator.handle["scipy_view"] = view
        return view

    @staticmethod
    def _scipy():
        from pipeline.backends.scipy_ import ScipyBackend

        return ScipyBackend()

    def symmetric_slowest_modes(self, operator: Operator, count: int, *,
                                tolerance: float = 1e-12, vectors: bool = False,
                                dense_limit: int = 1024) -> Modes:
        """Reversible chains. On one process: the scipy backend's symmetrized solve on this
        matrix (its ``p`` comes from detailed balance in logarithms, accurate where ``p``
        spans hundreds of orders of magnitude). Under MPI: the general search, which takes
        its symmetric-part path (Lanczos on D^-1/2 W D^1/2, certified by inertia)."""
        if self.world.size == 1:
            view = self._one_process_view(operator, "solve.symmetrize")
            modes = self._scipy().symmetric_slowest_modes(view, count, tolerance=tolerance,
                                                          vectors=vectors,
                                                          dense_limit=dense_limit)
            if vectors:
                modes.vector_rows = operator.handle["rows"]
            return modes
        modes = self.slowest_modes(operator, count, tolerance=tolerance, vectors=vectors,
                                   dense_limit=dense_limit)
        symmetric = modes.info.get("search") == "symmetric part"
        modes.info["symmetrized"] = symmetric
        if symmetric:  # eigenvalues of a symmetric matrix: real (the rest is rounding)
            modes.values = modes.values.real.astype(np.complex128)
        return modes

    # -- stationary distribution ---------------------------------------------------------

    def stationary(self, operator: Operator, dense_limit: int = 1024) -> Stationary:
        if not operator.check.conserving:
            raise SolverError("solve.stationary: W is a sub-generator (probability leaks "
                              "out), so there is no stationary distribution; set it to false")
        started = time.perf_counter()
        W = operator.handle["W"]
        start, stop = operator.handle["rows"]
        p, method, steps, estimate = self._stationary_vector(operator)
        negative_mass = float(self.world.sum(float(-p[p < 0].sum()))) + 0.0
        p = np.clip(p, 0.0, None)
        p = p / self.world.sum(float(p.sum()))
        image = apply(W, p)
        residual = self.world.sum(float(np.abs(image).sum())) / max(operator.check.norm1,
                                                                    1e-300)
        info = {"iterations": steps, "error_estimate": estimate,
                **self._provenance(operator)}
        seconds = operator.info.get("stationary_seconds", 0.0) + time.perf_counter() - started
        return Stationary(p, float(residual), negative_mass, method, seconds, info=info,
                          rows=(start, stop))

    def _stationary_vector(self, operator: Operator) -> tuple[np.ndarray, str, int, float]:
        """Null vector of a conserving W (local rows, sum 1), before clipping (cached)."""
        cached = operator.handle.get("stationary")
        if cached is not None:
            return cached
        started = time.perf_counter()
        W = operator.handle["W"]
        start, stop = operator.handle["rows"]
        n = operator.n_states
        ones, row_sums = W.createVecs()
        ones.set(1.0)
        W.mult(ones, row_sums)  # W 1 = 0 as well as 1^T W = 0: the uniform law is exact
        row_defect = self.world.max(float(np.abs(row_sums.getArray(readonly=True)).max(
            initial=0.0)))
        if row_defect <= 1e-14 * operator.check.norm1:
            result = (np.full(stop - start, 1.0 / n),
                      "uniform (W 1 = 0 and 1^T W = 0: the uniform law is stationary)", 0, 0.0)
        else:
            shift = self._shifted_solver(operator)["shift"]
            p, steps, estimate = inverse_iteration(
                lambda x: self._solve_shifted(operator, x), np.full(stop - start, 1.0 / n),
                self.world.sum)
            if not estimate <= STATIONARY_TARGET:
                warn(f"solve.stationary: inverse iteration stopped after {steps} steps with an "
                     f"estimated error of {estimate:.1e} (sum of |p - p_exact|)")
            result = (p, f"inverse iteration with the solver of W - {shift:.2e} I", steps,
                      estimate)
        operator.handle["stationary"] = result
        operator.info["stationary_seconds"] = time.perf_counter() - started
        return result

    def _provenance(self, operator: Operator) -> dict[str, Any]:
        peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0
        return {"backend": self.name, "ranks": self.world.size,
                "peak_memory_mib_per_rank": [round(v, 1) for v in self.world.allgather(peak)],
                "petsc_options": {str(k): str(v) for k, v in self.options.items()},
                "numpy_huge_pages": "off" if self.small_pages else "numpy's default"}


def _tight_then_loose(tight: int, floor: float, loose: float,
                      norm_s: float) -> Callable[[np.ndarray], np.ndarray]:
    """Tolerances of the symmetric-part search from its Ritz values ``mu`` of ``S``
    (descending): ``floor`` for the first ``tight`` and for every later one equal to the
    last of them within the grouping tolerance (a multiple eigenvalue cut by the wanted
    count is wanted whole), ``loose`` for the rest."""

    def rule(mu: np.ndarray) -> np.ndarray:
        tolerances = np.full(mu.size, loose)
        tolerances[:tight] = floor
        if mu.size > tight > 0:
            spread = float(mu[0] - mu[-1])
            same = mu[tight:] >= mu[tight - 1] - max(1e-8 * spread, 1e-12 * norm_s)
            tolerances[tight:][same] = floor
        return tolerances

    return rule

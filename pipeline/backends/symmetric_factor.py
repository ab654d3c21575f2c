"""One MUMPS ``LDL^T`` factorization of ``t I - S`` (``S`` symmetric, distributed rows) whose
shift ``t`` may change: the symbolic analysis (ordering, the elimination tree), which costs
more than the numerical factorization on 2D and 3D lattices, is done once; every new shift
refactors numerically on the same pattern. Gives the inertia of ``t I - S`` (Sylvester's law
on the ``LDL^T`` pivots) and block solves with many right-hand sides.

The search of the symmetric-part path factors at a point just above the spectrum, then the
inertia certificate refactors at its test shift inside the gap; both use this one object.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from pipeline.backends.petsc_tools import petsc
from pipeline.parallel import World

__all__ = ["ShiftedSymmetricFactor", "solve_block"]


class ShiftedSymmetricFactor:
    """``LDL^T`` of ``t I - S`` with MUMPS (symmetric indefinite, null pivots detected).

    ``S``: a PETSc AIJ matrix (not changed; a copy is kept). ``options_prefix``: the PETSc
    options prefix of its KSP (``gapline_sym_`` by default, so ``[solve.petsc]`` can reach the
    MUMPS controls, e.g. ``gapline_sym_mat_mumps_icntl_14``).
    """

    def __init__(self, world: World, S: Any, options_prefix: str = "gapline_sym_") -> None:
        PETSc = petsc()
        self.world = world
        self.matrix = S.copy()
        self.matrix.scale(-1.0)  # -S; shift() adds t I
        self.matrix.setOption(PETSc.Mat.Option.SYMMETRIC, True)
        self.shift: float | None = None
        self._offset = 0.0  # the diagonal shift now added to -S
        self.ksp = PETSc.KSP().create(comm=S.getComm())
        self.ksp.setType("preonly")
        pc = self.ksp.getPC()
        pc.setType("cholesky")  # not marked SPD: MUMPS uses its symmetric indefinite LDL^T
        pc.setFactorSolverType("mumps")
        self.ksp.setOptionsPrefix(options_prefix)
        options = PETSc.Options()
        options.setValue(f"{options_prefix}mat_mumps_icntl_24", 1)  # null pivots: inertia
        options.setValue(f"{options_prefix}mat_mumps_icntl_13", 1)  # root node on one rank
        self.inertia: tuple[int, int, int] = (0, 0, 0)
        self.factorizations = 0
        self.seconds = 0.0
        self.solved_columns = 0

    def at(self, shift: float) -> tuple[int, int, int]:
        """Factor ``shift I - S`` (numerically only after the first time) and return its
        inertia ``(negative, zero, positive)``: ``negative`` counts eigenvalues of ``S``
        above ``shift``."""
        if self.shift == shift:
            return self.inertia
        started = time.perf_counter()
        self.matrix.shift(shift - self._offset)
        self._offset = shift
        self.ksp.setOperators(self.matrix)
        if self.factorizations == 0:
            self.ksp.setFromOptions()
        self.ksp.setUp()
        self.shift = shift
        self.factorizations += 1
        self.inertia = tuple(int(v) for v in self.ksp.getPC().getFactorMatrix().getInertia())
        self.seconds += time.perf_counter() - started
        return self.inertia

    def solve(self, columns: np.ndarray) -> np.ndarray:
        """``(t I - S)^-1 columns`` for real local rows ``[row, k]``."""
        self.solved_columns += columns.shape[1]
        return solve_block(self.ksp, self.matrix, columns)

    def destroy(self) -> None:
        self.ksp.destroy()
        self.matrix.destroy()


def solve_block(ksp: Any, matrix: Any, columns: np.ndarray) -> np.ndarray:
    """``matrix^-1 columns`` with the direct factorization set up in ``ksp``, all columns in
    one multi-right-hand-side MUMPS solve (about 4x cheaper per column than single solves in
    blocks of 4 to 16 on a 2D lattice with 10^6 states; measured, benchmarks/README.md)."""
    PETSc = petsc()
    local, k = columns.shape
    if k == 0:
        return np.zeros_like(columns)
    if k == 1:
        source, target = matrix.createVecs()
        source.getArray()[:] = columns[:, 0]
        ksp.solve(source, target)
        result = target.getArray(readonly=True).copy()[:, None]
        source.destroy()
        target.destroy()
        return result
    n = matrix.getSize()[0]
    comm = matrix.getComm()
    rhs = PETSc.Mat().createDense(((local, n), (None, k)), comm=comm,
                                  array=np.asfortranarray(columns, dtype=np.float64))
    result = np.empty((local, k), order="F")  # the solution is written here, not copied
    out = PETSc.Mat().createDense(((local, n), (None, k)), comm=comm, array=result)
    ksp.getPC().getFactorMatrix().matSolve(rhs, out)
    rhs.destroy()
    out.destroy()
    return result

"""Reducibility on the ``slepc`` backend (mixed into :class:`SlepcAnalysis`), the same code on
one rank and under ``mpiexec -n P``.

- communicating classes: rank 0 gathers the pattern of the positive off-diagonal rates and
  the leak of every column, finds the strongly connected components with
  ``scipy.sparse.csgraph`` and scatters the labels: each rank keeps those of its own rows.
  The component search itself stays on rank 0 (it needs the whole graph, 8 or 16 bytes per
  transition there); no other rank holds more than its rows.
- stationary law of a closed class ``c``: the sub-generator ``W_c`` (``createSubMatrix`` with
  the locally owned states of the class, so its rows stay where they are), its null vector by
  the backend's shared inverse iteration with the MUMPS (or GMRES) solver of
  ``W_c - sigma I`` (``_stationary_vector`` on a class operator), or a dense solve with the
  normalization row of the gathered class up to ``solve.dense_limit`` states. Sums, clipped
  mass and the residual ``||W_c p_c||_1 / ||W||_1`` are reductions over the ranks.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from pipeline.backends.base import Classes, Operator, Stationary
from pipeline.backends.inverse_iteration import normalized_null_vector
from pipeline.backends.petsc_tools import apply, petsc
from pipeline.errors import SolverError

__all__ = ["SlepcClasses"]


class SlepcClasses:
    """Communicating classes and per-class stationary laws on a distributed PETSc ``W``."""

    world: Any

    def communicating_classes(self, operator: Operator) -> Classes:
        """Strongly connected components of the graph ``j -> i`` for ``W[i, j] > 0``;
        ``labels`` are this rank's rows (``rows``), ``closed`` covers every class. The
        components are computed on rank 0 from the gathered pattern (see the module)."""
        W = operator.handle["W"]
        start, stop = operator.handle["rows"]
        n = operator.n_states
        indptr, indices, data = W.getValuesCSR()
        rows = np.repeat(np.arange(start, stop, dtype=np.int64), np.diff(indptr))
        keep = (data > 0) & (indices != rows)
        ones, sums = W.createVecs()
        ones.set(1.0)
        W.multTranspose(ones, sums)  # 1^T W: the leak of each (local) column
        leak = sums.getArray(readonly=True).copy()
        kind = np.int32 if n < 2**31 else np.int64
        pieces = self.world.gather((rows[keep].astype(kind), indices[keep].astype(kind), leak))
        ranges = self.world.gather((start, stop))
        shares = None
        if self.world.is_root:
            try:
                labels, closed = _components(pieces, n, operator.check.tolerance)
                shares = [(labels[a:b].copy(), closed, None) for a, b in ranges]
            except Exception as exc:  # shared below, raised on every rank
                shares = [(None, None, exc)] * len(ranges)
            del pieces
        labels, closed, error = self.world.scatter(shares)
        if error is not None:
            raise error
        return Classes(labels, closed, rows=(start, stop))

    def class_stationary(self, operator: Operator, states: np.ndarray,
                         dense_limit: int = 1024) -> Stationary:
        """Stationary law of the closed class whose states among this rank's rows are
        ``states`` (int64, sorted, global indices; every rank passes its part, possibly
        none). The distribution is over ``states``; ``rows`` are this rank's rows."""
        started = time.perf_counter()
        PETSc = petsc()
        W = operator.handle["W"]
        start, stop = operator.handle["rows"]
        states = np.asarray(states, dtype=np.int64)

        def check() -> None:
            inside = states.size == 0 or (states[0] >= start and states[-1] < stop
                                          and bool(np.all(np.diff(states) > 0)))
            if not inside:
                raise ValueError(f"class_stationary: states must be sorted local rows "
                                 f"[{start}, {stop}) of this rank")

        self.world.collective(check)
        size = int(self.world.sum(int(states.size)))
        index = PETSc.IS().createGeneral(states.astype(PETSc.IntType), comm=W.getComm())
        sub = W.createSubMatrix(index, index)  # W_c, rows on the ranks that own them
        try:
            if size <= max(dense_limit, 1):
                p = self.world.collective(lambda: self._dense_class_law(sub, size))
                method, info = "dense solve on the gathered class with the normalization row", {}
            else:
                p, method, info = self._iterative_class_law(operator, sub, size)
            negative = float(self.world.sum(float(-p[p < 0].sum()))) + 0.0
            p = np.clip(p, 0.0, None)
            p = p / self.world.sum(float(p.sum()))
            image = self.world.sum(float(np.abs(apply(sub, p)).sum()))
        finally:
            sub.destroy()
            index.destroy()
        residual = image / max(operator.check.norm1, np.finfo(float).tiny)
        return Stationary(p, float(residual), negative, method, time.perf_counter() - started,
                          info={"class_states": size, "ranks": self.world.size, **info},
                          rows=(start, stop))

    def _dense_class_law(self, sub: Any, size: int) -> np.ndarray:
        """Null vector of the gathered (small) ``W_c`` with the last balance equation
        replaced by ``sum p = 1`` (the same solve on every rank); this rank's part."""
        import scipy.sparse as sparse

        pieces = self.world.allgather(sub.getValuesCSR())
        A = sparse.vstack([sparse.csr_matrix((d, j, i), shape=(i.size - 1, size))
                           for i, j, d in pieces], format="csr").toarray()
        try:
            p = normalized_null_vector(A)
        except np.linalg.LinAlgError:
            raise SolverError("solve.closed_classes: a closed class has no unique stationary "
                              "law (its states do not all communicate)") from None
        low, high = sub.getOwnershipRange()
        return p[low:high].copy()

    def _iterative_class_law(self, operator: Operator, sub: Any,
                             size: int) -> tuple[np.ndarray, str, dict[str, Any]]:
        """Null vector of ``W_c`` by the backend's inverse iteration (its solver of
        ``W_c - sigma I``, sigma from the whole ``W``), freed afterwards."""
        view = Operator(operator.model, size, 0, operator.check, 0.0,
                        handle={"W": sub, "rows": tuple(sub.getOwnershipRange())})
        try:
            p, method, steps, estimate = self._stationary_vector(view)  # type: ignore[attr-defined]
        finally:
            shifted = view.handle.get("shifted")
            if shifted is not None:
                shifted["ksp"].destroy()
                shifted["matrix"].destroy()
        return p, f"{method} on the class", {"iterations": steps, "error_estimate": estimate}


def _components(pieces: list[tuple[np.ndarray, np.ndarray, np.ndarray]], n: int,
                tolerance: float) -> tuple[np.ndarray, np.ndarray]:
    """Labels ``[state]`` and closed flags ``[class]`` from every rank's (target, source)
    pairs of positive rates and column leaks (rank order)."""
    import scipy.sparse as sparse
    import scipy.sparse.csgraph as csgraph

    target = np.concatenate([piece[0] for piece in pieces])
    source = np.concatenate([piece[1] for piece in pieces])
    leaks = np.concatenate([piece[2] for piece in pieces])
    graph = sparse.csr_matrix((np.ones(target.size, dtype=np.int8), (target, source)),
                              shape=(n, n))
    count, labels = csgraph.connected_components(graph, directed=True, connection="strong")
    labels = labels.astype(np.int64)
    leaving = labels[target] != labels[source]
    has_exit = np.bincount(labels[source[leaving]], minlength=count) > 0
    # A class whose states leak probability out of a sub-generator is not closed either.
    leaky = np.bincount(labels, weights=np.minimum(leaks, 0.0), minlength=count) < -tolerance
    return labels, ~(has_exit | leaky)

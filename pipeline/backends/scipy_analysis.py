"""Analysis operations of the ``scipy`` backend (mixed into :class:`ScipyBackend`).

Currents and entropy production from the CSR entries of ``W``, communicating classes with
``scipy.sparse.csgraph``, transposed solves with SuperLU, ``exp(tW) p0`` with
``scipy.sparse.linalg.expm_multiply`` (Al-Mohy and Higham 2011, SIAM J. Sci. Comput. 33,
488), and the symmetrized Lanczos solve of reversible chains with ARPACK ``eigsh``.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.linalg
import scipy.sparse as sp
import scipy.sparse.csgraph as csgraph
import scipy.sparse.linalg as spla

from pipeline.analysis.evolution import mode_sum
from pipeline.backends.base import (
    Classes,
    Currents,
    Modes,
    Operator,
    Stationary,
    flows_from_entries,
)
from pipeline.backends.inverse_iteration import normalized_null_vector
from pipeline.errors import SolverError
from pipeline.models.base import RowBlock

__all__ = ["ScipyAnalysis"]

BLOCK_ROWS = 1 << 16


class ScipyAnalysis:
    """The analysis methods of the Backend interface on a CSR ``W`` (``handle["W"]``)."""

    def currents(self, operator: Operator, distribution: np.ndarray) -> Currents:
        W = operator.handle["W"]
        n = operator.n_states
        model = operator.model
        p = np.asarray(distribution, dtype=np.float64)
        channels = np.concatenate([
            model.transition_channels(_row_block(W, start, min(start + BLOCK_ROWS, n)))
            for start in range(0, n, BLOCK_ROWS)
        ]) if n else np.zeros(0, dtype=np.int64)
        rows = np.repeat(np.arange(n, dtype=np.int64), np.diff(W.indptr))
        columns = W.indices.astype(np.int64)
        off = rows != columns
        rows, columns, rates, channels = rows[off], columns[off], W.data[off], channels[off]
        flux = rates * p[columns]
        reverse = flux_of(W, columns, rows, p)  # F_ji = W_ji p_i for every entry (i, j)
        return flows_from_entries(flux, reverse, channels, len(model.channel_names()))

    def communicating_classes(self, operator: Operator) -> Classes:
        W = operator.handle["W"]
        count, labels = csgraph.connected_components(W, directed=True, connection="strong")
        labels = labels.astype(np.int64)
        rows = np.repeat(np.arange(W.shape[0], dtype=np.int64), np.diff(W.indptr))
        columns = W.indices
        leaving = (labels[rows] != labels[columns]) & (W.data > 0)
        has_exit = np.bincount(labels[columns[leaving]], minlength=count) > 0
        # A class whose states leak probability out of a sub-generator is not closed either.
        leak = W.T @ np.ones(W.shape[0])
        leaks = np.bincount(labels, weights=np.minimum(leak, 0.0), minlength=count) < -(
            operator.check.tolerance)
        return Classes(labels, ~(has_exit | leaks))

    def class_stationary(self, operator: Operator, states: np.ndarray,
                         dense_limit: int = 1024) -> Stationary:
        from pipeline.backends.scipy_ import SHIFT_FACTOR, _inverse_iteration

        started = time.perf_counter()
        W = operator.handle["W"]
        states = np.asarray(states, dtype=np.int64)
        sub = W[states][:, states].tocsr()
        m = states.size
        if m <= max(dense_limit, 1):
            p = normalized_null_vector(sub.toarray())
            method = "dense solve on the class with the normalization row"
        else:
            shift = SHIFT_FACTOR * max(operator.check.max_exit_rate, np.finfo(float).tiny)
            lu = spla.splu((sub - shift * sp.identity(m, format="csr")).tocsc(),
                           permc_spec="COLAMD")
            p, _, _ = _inverse_iteration(lu, m)
            method = "inverse iteration on the class"
        negative = float(-p[p < 0].sum()) + 0.0
        p = np.clip(p, 0.0, None)
        p /= p.sum()
        scale = max(operator.check.norm1, np.finfo(float).tiny)
        residual = float(np.abs(sub @ p).sum() / scale)
        return Stationary(p, residual, negative, method, time.perf_counter() - started)

    def solve_transposed(self, operator: Operator,
                         rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        W = operator.handle["W"]
        rhs = np.asarray(rhs, dtype=np.float64)
        matrix = rhs if rhs.ndim == 2 else rhs[:, None]
        if "lu" in operator.handle:
            solution = _refined_transposed_solve(W, operator.handle["lu"], matrix)
        else:
            lu = operator.handle.get("lu_transposed")
            if lu is None:
                try:
                    lu = spla.splu(W.T.tocsc(), permc_spec="COLAMD")
                except RuntimeError:
                    raise SolverError("analyze: W^T is singular: some states never leave (a "
                                      "closed class inside a sub-generator); absorption "
                                      "times are infinite there") from None
                operator.handle["lu_transposed"] = lu
            solution = lu.solve(matrix)
        if not np.isfinite(solution).all():
            raise SolverError("analyze: the absorption solve is not finite: W^T is singular")
        misfit = np.abs(W.T @ solution - matrix).max(axis=0, initial=0.0)
        size = (operator.check.norm1 * np.abs(solution).max(axis=0, initial=0.0)
                + np.abs(matrix).max(axis=0, initial=0.0))
        residual = misfit / np.maximum(size, np.finfo(float).tiny)
        return (solution, residual) if rhs.ndim == 2 else (solution[:, 0], residual)

    def evolve_method(self, operator: Operator) -> str:
        return (f"{self.name}: Krylov action of exp(tW) (expm_multiply, Al-Mohy and Higham "
                "2011)")

    def evolve(self, operator: Operator, start: np.ndarray, times: np.ndarray) -> np.ndarray:
        W = operator.handle["W"]
        times = np.asarray(times, dtype=np.float64)
        p0 = np.asarray(start, dtype=np.float64)
        if times.size >= 3 and np.allclose(np.diff(times), times[1] - times[0],
                                           rtol=1e-12, atol=0):
            # A uniform grid in one call (the algorithm steps between the grid points).
            return spla.expm_multiply(W, p0, start=times[0], stop=times[-1],
                                      num=times.size, endpoint=True)
        result = np.empty((times.size, p0.size))
        current, now = p0, 0.0
        for index, moment in enumerate(times):  # a loop over requested times
            if moment > now:
                current = spla.expm_multiply((moment - now) * W, current)
                now = moment
            result[index] = current
        return result

    def mode_expansion(self, operator: Operator, count: int, start: np.ndarray,
                       times: np.ndarray, dense_limit: int = 1024) -> tuple[np.ndarray,
                                                                           np.ndarray]:
        from pipeline.modes import grouping_tolerance, take_slowest

        W = operator.handle["W"]
        n = operator.n_states
        count = min(count, n)
        if n <= dense_limit:
            values, left, right = scipy.linalg.eig(W.toarray(), left=True, right=True)
            chosen, _ = take_slowest(values, count,
                                     grouping_tolerance(values, operator.check.norm1))
            values, left, right = values[chosen], left[:, chosen], right[:, chosen]
        else:
            modes = self.slowest_modes(operator, count, method="shift-invert", vectors=True,
                                       dense_limit=dense_limit)
            values, right = modes.values, modes.vectors
            left_values, left_all = self._left_modes(operator, int(modes.info["searched"]),
                                                     1e-12)
            nearest = np.argmin(np.abs(left_values[None, :] - values[:, None]), axis=1)
            left = left_all[:, nearest]
        return mode_sum(values, left, right, start, times), values

    def symmetric_slowest_modes(self, operator: Operator, count: int, *,
                                tolerance: float = 1e-12,
                                vectors: bool = False, dense_limit: int = 1024) -> Modes:
        from pipeline.backends.scipy_ import SHIFT_FACTOR, _residuals, _skew_bound

        started = time.perf_counter()
        W = operator.handle["W"]
        n = operator.n_states
        count = min(count, n)
        log_p = reversible_log_law(W)
        rows = np.repeat(np.arange(n, dtype=np.int64), np.diff(W.indptr))
        # S_ij = W_ij sqrt(p_j / p_i) from log p: relatively accurate even where p is tiny.
        raw = sp.csr_matrix((W.data * np.exp(0.5 * (log_p[W.indices] - log_p[rows])),
                             W.indices, W.indptr), shape=W.shape)
        skew = _skew_bound(raw)  # rounding, or a chain that is not reversible
        S = ((raw + raw.T) * 0.5).tocsr()  # exactly symmetric
        root = np.exp(0.5 * (log_p - log_p.max()))
        scale = operator.check.norm1
        if n <= dense_limit or count >= n - 1:
            all_values, basis = scipy.linalg.eigh(S.toarray())
            method = "symmetrized dense (LAPACK syevd on D^-1/2 W D^1/2)"
        else:
            shift = SHIFT_FACTOR * max(operator.check.max_exit_rate, np.finfo(float).tiny)
            search = min(n - 1, count + 1)
            all_values, basis = spla.eigsh(
                S, k=search, sigma=shift, which="LM", tol=tolerance,
                v0=np.random.default_rng(20261201).standard_normal(n))
            method = "symmetrized Lanczos (ARPACK eigsh, shift-invert on D^-1/2 W D^1/2)"
        order = np.argsort(-all_values, kind="stable")
        values, basis = all_values[order][:count], basis[:, order][:, :count]
        following = all_values[order][count] if all_values.size > count else None
        right = basis * root[:, None]
        right /= np.linalg.norm(right, axis=0)
        residuals = _residuals(W, values.astype(complex), right.astype(complex), scale)
        # The eigenvalues come from the symmetric S (condition 1): |lambda - exact| <=
        # ||S s - lambda s||_2 for unit s (Parlett 1998, The Symmetric Eigenvalue Problem,
        # thm. 4.5.1), plus the dropped skew part ||(S - S^T)/2|| (Weyl).
        symmetric_residuals = np.linalg.norm(S @ basis - basis * values[None, :], axis=0)
        estimates = symmetric_residuals + skew
        condition = np.ones(values.size)
        certificate = _inertia_certificate(S, values, following, n, dense_limit, scale)
        signs = np.sign(right[np.argmax(np.abs(right), axis=0), np.arange(right.shape[1])])
        return Modes(
            values=values.astype(np.complex128),
            residuals=residuals,
            vectors=(right * signs).astype(np.complex128) if vectors else None,
            method=method,
            certified=certificate["certified"],
            certificate=certificate,
            group_complete=following is None or bool(
                values[-1] - following > 1e-8 * max(scale, 1e-300)),
            seconds=time.perf_counter() - started,
            condition=condition,
            error_estimates=estimates,
            info={"symmetrized": True, "skew_bound": skew,
                  "condition_definition": "of the symmetrized problem (1)"},
        )


def _refined_transposed_solve(W: sp.csr_matrix, factored: tuple, rhs: np.ndarray,
                              steps: int = 30) -> np.ndarray:
    """``W^T X = rhs`` with the LU of ``W - sigma I`` already made for the eigensolver (no
    second factorization): iterative refinement ``X += (W - sigma I)^{-T} (rhs - W^T X)``,
    whose error shrinks by ``sigma / |lambda_slowest|`` per step (tiny: sigma is 1e-9 times
    the largest exit rate). Stops when the residual stops decreasing."""
    _, lu = factored
    X = lu.solve(rhs, trans="T")
    previous = np.inf
    for _ in range(steps):  # a few refinement steps
        misfit = rhs - W.T @ X
        size = float(np.abs(misfit).max(initial=0.0))
        if not size < previous or size == 0.0:
            break
        previous = size
        X = X + lu.solve(misfit, trans="T")
    return X


def reversible_log_law(W: sp.csr_matrix) -> np.ndarray:
    """``log p`` of a reversible irreducible ``W`` from detailed balance along a spanning
    tree: ``p_i / p_q = W_iq / W_qi`` for tree edges ``q -> i`` (Kelly 1979, Reversibility and
    Stochastic Networks, 1.5). Path sums by pointer jumping (``log2(depth)`` vector steps),
    so the result is relatively accurate however small ``p`` gets; up to a constant."""
    n = W.shape[0]
    order, parents = csgraph.breadth_first_order(W, 0, directed=False,
                                                 return_predecessors=True)
    if order.size != n:
        raise SolverError("solve.symmetrize: W is not irreducible; set solve.symmetrize = "
                          "'never'")
    parents = parents.astype(np.int64)
    parents[0] = 0
    ones = np.ones(n)
    states = np.arange(n, dtype=np.int64)
    with np.errstate(divide="ignore", invalid="ignore"):  # the root's entry is fixed below
        step = np.log(flux_of(W, states, parents, ones)) - np.log(flux_of(W, parents, states,
                                                                          ones))
    step[0] = 0.0
    if not np.isfinite(step).all():
        raise SolverError("solve.symmetrize: a transition has no reverse, so the chain is not "
                          "reversible; set solve.symmetrize = 'never'")
    total, ancestor = step, parents
    while np.any(ancestor != 0):  # pointer jumping: about log2(tree depth) rounds
        total = total + total[ancestor]
        ancestor = ancestor[ancestor]
    return total


def _inertia_certificate(S: sp.csr_matrix, values: np.ndarray, following: float | None,
                         n: int, dense_limit: int, scale: float) -> dict:
    """Completeness of the slowest set of a symmetric ``S``: with a threshold ``theta``
    between the last kept and the next eigenvalue, the number of eigenvalues above it is
    the number of positive pivots of ``S - theta I = L D L^T`` (Sylvester's law of inertia;
    Golub and Van Loan 2013, Matrix Computations, 8.1). Done densely up to ``dense_limit``
    states; above that the spectrum is real, so the values nearest a shift right of 0 are
    the largest ones and completeness rests on ARPACK convergence (not certified here)."""
    last = float(values[-1])
    gap = (last - following) if following is not None else max(abs(last), 1.0) * 1e-3
    theta = last - 0.5 * gap
    if n > dense_limit:
        return {"kind": "real spectrum (symmetric); nearest-to-shift = largest",
                "certified": False,
                "note": "real spectrum; completeness not certified by inertia above "
                        "solve.dense_limit states (ARPACK converged)"}
    _, D, _ = scipy.linalg.ldl(S.toarray() - theta * np.eye(n))
    above = int(np.sum(np.linalg.eigvalsh(D) > 0))  # D is block diagonal (1x1, 2x2)
    certified = above == values.size
    return {"kind": "Sylvester inertia of D^-1/2 W D^1/2 - theta I (LDL^T)",
            "certified": certified, "threshold": theta, "count_above": above,
            "note": f"{above} eigenvalues above {theta:.6g} by inertia; {values.size} kept"}


def flux_of(W: sp.csr_matrix, rows: np.ndarray, columns: np.ndarray,
            p: np.ndarray) -> np.ndarray:
    """``W[rows, columns] * p[columns]`` (0 where the entry is not stored), vectorized by
    sorted keys ``row * n + column`` of the CSR entries."""
    n = W.shape[0]
    canonical = W if W.has_sorted_indices else W.sorted_indices()
    keys = (np.repeat(np.arange(n, dtype=np.int64), np.diff(canonical.indptr)) * n
            + canonical.indices.astype(np.int64))
    wanted = rows.astype(np.int64) * n + columns.astype(np.int64)
    position = np.minimum(np.searchsorted(keys, wanted), max(keys.size - 1, 0))
    found = keys.size > 0
    values = np.where(found & (keys[position] == wanted) if found else False,
                      canonical.data[position] if found else 0.0, 0.0)
    return values * p[columns]


def _row_block(W: sp.csr_matrix, start: int, stop: int) -> RowBlock:
    """Rows ``start..stop-1`` of the assembled CSR matrix as a RowBlock (views)."""
    first, last = int(W.indptr[start]), int(W.indptr[stop])
    indptr = (W.indptr[start : stop + 1] - first).astype(np.int64)
    return RowBlock(start, stop, indptr, W.indices[first:last], W.data[first:last])

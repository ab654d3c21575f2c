"""Slowest modes by Krylov iteration on ``W`` itself, without any factorization.

For generators too large for a sparse LU of ``W - sigma I`` (an exclusion ring with 10^7
states fills in badly). ARPACK iterates with ``W`` directly, asking for the eigenvalues of
largest real part (``which='LR'``; Lehoucq, Sorensen and Yang 1998, ARPACK Users' Guide,
ch. 4). When ``W`` is symmetric (detected by a random probe ``||W x - W^T x||``) the
symmetric Lanczos variant ``eigsh(which='LA')`` is used instead: real arithmetic, half the
memory, and condition numbers are exactly 1.

Honesty: a Krylov method converges to the rightmost eigenvalues but proves nothing about
eigenvalues it has not seen, so these results are never marked certified. The stationary
vector is the mode-0 eigenvector (normalized to sum 1), with its residual.
"""

from __future__ import annotations

import time

import numpy as np
import scipy.sparse.linalg as spla

from pipeline.backends.base import Modes, Operator
from pipeline.errors import SolverError
from pipeline.modes import grouping_tolerance, take_slowest
from pipeline.progress import log

__all__ = ["is_symmetric", "krylov_modes"]

SYMMETRY_PROBE_TOLERANCE = 1e-13


def is_symmetric(W, scale: float) -> bool:
    """True when ``W x == W^T x`` for a fixed random ``x`` to rounding (a probe: a
    non-symmetric W passes only for x in a measure-zero set)."""
    x = np.random.default_rng(7).standard_normal(W.shape[0])
    difference = W @ x - W.T @ x
    return bool(np.abs(difference).max(initial=0.0)
                <= SYMMETRY_PROBE_TOLERANCE * max(scale, 1e-300) * np.abs(x).max(initial=1.0))


def krylov_modes(operator: Operator, count: int, tolerance: float, want_vectors: bool) -> Modes:
    """The ``count`` rightmost eigenpairs by ARPACK on ``W`` (no inversion); uncertified."""
    started = time.perf_counter()
    W = operator.handle["W"]
    n = operator.n_states
    scale = operator.check.norm1
    if count >= n - 1:
        raise SolverError(f"solve.method: 'krylov' finds at most n - 2 = {n - 2} modes; use "
                          "'dense' for this problem")
    symmetric = is_symmetric(W, scale)
    ncv = min(n, max(2 * count + 1, count + 20))
    start = np.random.default_rng(20261201).standard_normal(n)
    matvecs = {"n": 0}

    def apply(x: np.ndarray) -> np.ndarray:
        matvecs["n"] += 1
        return W @ x

    A = spla.LinearOperator((n, n), matvec=apply, dtype=np.float64)
    converged = True
    try:
        if symmetric:
            values, vectors = spla.eigsh(A, k=count, which="LA", tol=tolerance, ncv=ncv,
                                         v0=start, maxiter=max(1000, n // ncv))
        else:
            values, vectors = spla.eigs(A, k=count, which="LR", tol=tolerance, ncv=ncv,
                                        v0=start, maxiter=max(1000, n // ncv))
    except spla.ArpackNoConvergence as failure:
        values, vectors, converged = failure.eigenvalues, failure.eigenvectors, False
    values = np.asarray(values, dtype=complex)
    vectors = np.asarray(vectors, dtype=complex)
    norms = np.linalg.norm(vectors, axis=0)
    vectors = vectors / np.where(norms > 0, norms, 1.0)
    chosen, group_complete = take_slowest(values, min(count, values.size),
                                          grouping_tolerance(values, scale))
    values, vectors = values[chosen], vectors[:, chosen]
    residuals = (np.linalg.norm(W @ vectors - vectors * values[None, :], axis=0)
                 / max(scale, 1e-300))
    condition = np.ones(values.size) if symmetric else None
    if operator.check.conserving and values.size:
        p = vectors[:, 0].real.copy()
        p /= p.sum()
        operator.handle["krylov_stationary"] = (
            p, "eigenvector of mode 0 from the Krylov solve (no inversion)", matvecs["n"])
    variant = ("symmetric Lanczos (ARPACK eigsh, which='LA')" if symmetric
               else "Arnoldi (ARPACK eigs, which='LR')")
    log(f"solve: krylov {variant}: {matvecs['n']} products with W in "
        f"{time.perf_counter() - started:.1f} s")
    certificate = {
        "kind": "none (krylov)",
        "note": ("NOT CERTIFIED: Krylov iteration on W converges to the rightmost eigenvalues "
                 "but does not prove that none was missed"
                 + ("" if converged else "; ARPACK did not converge")),
        "converged": converged,
    }
    return Modes(
        values=values,
        residuals=residuals,
        vectors=vectors if want_vectors else None,
        method=f"krylov: {variant} on W, no factorization",
        certified=False,
        certificate=certificate,
        group_complete=group_complete,
        seconds=time.perf_counter() - started,
        condition=condition,
        error_estimates=None if condition is None else condition * residuals * scale,
        info={"matrix_products": matvecs["n"], "symmetric": symmetric, "ncv": ncv},
    )

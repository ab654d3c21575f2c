"""Eigenvalue condition numbers and first-order error estimates.

A small residual does not make an eigenvalue accurate when ``W`` is far from normal (biased
chains with boundaries are the classic case: the eigenvector basis has a condition that grows
like ``(u/v)^(L/2)``). The error of an eigenvalue is, to first order, its condition times the
backward error of the eigenpair (Wilkinson 1965, The Algebraic Eigenvalue Problem, ch. 2,
sec. 10): for a simple eigenvalue the condition is ``||l|| ||r|| / |l^H r|``; for a cluster of
(nearly) equal eigenvalues it is the norm of the spectral projector,
``1 / sigma_min(Q_l^H Q_r)`` with orthonormal bases of the left and right invariant subspaces
(Stewart and Sun 1990, Matrix Perturbation Theory, ch. V; from memory).
"""

from __future__ import annotations

import numpy as np
from scipy.sparse import csr_matrix
from scipy.sparse.csgraph import connected_components

__all__ = ["cluster_labels", "eigenvalue_conditions"]


def cluster_labels(values: np.ndarray, tolerance: float) -> np.ndarray:
    """Labels of clusters: values linked by chains of distances <= ``tolerance``."""
    values = np.asarray(values, dtype=complex)
    close = np.abs(values[:, None] - values[None, :]) <= tolerance
    _, labels = connected_components(csr_matrix(close), directed=False)
    return labels


def eigenvalue_conditions(
    values: np.ndarray,
    right: np.ndarray,
    left_values: np.ndarray,
    left: np.ndarray,
    tolerance: float,
) -> np.ndarray:
    """Condition number of each eigenvalue in ``values`` (float64 ``[mode]``).

    Parameters
    ----------
    values, right
        Eigenvalues ``[mode]`` and right eigenvectors ``[state, mode]`` (``W r = lambda r``).
    left_values, left
        Eigenvalues and left eigenvectors ``[state, m]`` (``l^H W = mu l^H``), any superset
        of the partners of ``values``.
    tolerance
        Eigenvalues closer than this form one cluster (rate units).

    Returns ``inf`` for a cluster whose left partners are missing.
    """
    values = np.asarray(values, dtype=complex)
    left_values = np.asarray(left_values, dtype=complex)
    conditions = np.full(values.size, np.inf)
    labels = cluster_labels(values, tolerance)
    for label in np.unique(labels):  # a loop over clusters of modes, not over states
        members = np.flatnonzero(labels == label)
        distance = np.abs(left_values[:, None] - values[None, members]).min(axis=1)
        partners = np.flatnonzero(distance <= tolerance)
        if partners.size < members.size:
            continue
        q_right = np.linalg.qr(right[:, members])[0]
        q_left = np.linalg.qr(left[:, partners])[0]
        smallest = np.linalg.svd(q_left.conj().T @ q_right, compute_uv=False).min()
        conditions[members] = 1.0 / smallest if smallest > 0 else np.inf
    return conditions

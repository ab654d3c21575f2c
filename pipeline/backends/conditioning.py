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
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

__all__ = ["cluster_labels", "eigenvalue_conditions"]


def cluster_labels(values: np.ndarray, tolerance: float) -> np.ndarray:
    """Labels of clusters: values linked by chains of distances <= ``tolerance``."""
    values = np.asarray(values, dtype=complex)
    if values.size == 0:
        return np.zeros(0, dtype=np.int64)
    points = np.column_stack([values.real, values.imag])
    pairs = cKDTree(points).query_pairs(tolerance, output_type="ndarray")
    graph = coo_matrix((np.ones(len(pairs)), (pairs[:, 0], pairs[:, 1])),
                       shape=(values.size, values.size))
    _, labels = connected_components(graph, directed=False)
    return labels


def eigenvalue_conditions(
    right_values: np.ndarray,
    right: np.ndarray,
    left_values: np.ndarray,
    left: np.ndarray,
    tolerance: float,
    chosen: np.ndarray,
) -> np.ndarray:
    """Condition numbers of the eigenvalues ``right_values[chosen]`` (float64 ``[mode]``).

    Parameters
    ----------
    right_values, right
        Every computed eigenvalue and right eigenvector ``[state, m]`` (``W r = lambda r``):
        a cluster is taken whole, also where ``chosen`` cuts it.
    left_values, left
        Computed eigenvalues and left eigenvectors ``[state, m]`` (``l^H W = mu l^H``).
    tolerance
        Eigenvalues closer than this form one cluster (rate units).
    chosen
        Indices of the modes whose conditions are wanted.

    Returns ``inf`` where the condition is unbounded or unknown: a cluster whose eigenvectors
    are numerically dependent (a defective eigenvalue, a Jordan block) or whose left partners
    do not match it one to one.
    """
    right_values = np.asarray(right_values, dtype=complex)
    left_values = np.asarray(left_values, dtype=complex)
    chosen = np.asarray(chosen)
    conditions = np.full(chosen.size, np.inf)
    labels = cluster_labels(right_values, tolerance)
    for label in np.unique(labels[chosen]):  # a loop over clusters of modes, not states
        members = np.flatnonzero(labels == label)
        distance = np.abs(left_values[:, None] - right_values[None, members]).min(axis=1)
        partners = np.flatnonzero(distance <= tolerance)
        if partners.size != members.size:
            continue
        q_right = _independent_basis(right[:, members])
        q_left = _independent_basis(left[:, partners])
        if q_right is None or q_left is None:
            continue
        smallest = np.linalg.svd(q_left.conj().T @ q_right, compute_uv=False).min()
        if smallest > 0:
            conditions[np.isin(chosen, members)] = 1.0 / smallest
    return conditions


def _independent_basis(vectors: np.ndarray) -> np.ndarray | None:
    """Orthonormal basis of the span of ``vectors``, or None when they are numerically
    dependent (relative smallest singular value below 1e-8: a defective eigenvalue)."""
    columns = vectors / np.linalg.norm(vectors, axis=0)
    basis, triangle = np.linalg.qr(columns)
    spread = np.abs(np.diag(triangle))
    if spread.min(initial=1.0) < 1e-8 * max(spread.max(initial=1.0), 1e-300):
        return None
    singular = np.linalg.svd(columns, compute_uv=False)
    if singular.min() < 1e-8 * singular.max():
        return None
    return basis

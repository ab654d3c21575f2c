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

__all__ = ["cluster_labels", "conditions_from_products", "eigenvalue_conditions"]


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
    chosen = np.asarray(chosen)
    conditions = np.full(chosen.size, np.inf)
    for members, partners in _clusters(right_values, left_values, tolerance, chosen):
        q_right = _independent_basis(right[:, members])
        q_left = _independent_basis(left[:, partners])
        if q_right is None or q_left is None:
            continue
        smallest = np.linalg.svd(q_left.conj().T @ q_right, compute_uv=False).min()
        if smallest > 0:
            conditions[np.isin(chosen, members)] = 1.0 / smallest
    return conditions


def _clusters(right_values: np.ndarray, left_values: np.ndarray, tolerance: float,
              chosen: np.ndarray):
    """Clusters of the chosen right eigenvalues (whole), each with its left partners:
    ``(members, partners)`` index arrays, only where they match one to one."""
    right_values = np.asarray(right_values, dtype=complex)
    left_values = np.asarray(left_values, dtype=complex)
    labels = cluster_labels(right_values, tolerance)
    for label in np.unique(labels[np.asarray(chosen)]):  # a loop over clusters of modes
        members = np.flatnonzero(labels == label)
        distance = np.abs(left_values[:, None] - right_values[None, members]).min(axis=1)
        partners = np.flatnonzero(distance <= tolerance)
        if partners.size == members.size:
            yield members, partners


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


def conditions_from_products(
    right_values: np.ndarray,
    left_values: np.ndarray,
    right_gram: np.ndarray,
    left_gram: np.ndarray,
    cross: np.ndarray,
    tolerance: float,
    chosen: np.ndarray,
) -> np.ndarray:
    """:func:`eigenvalue_conditions` from inner products only, for vectors spread over MPI
    ranks: ``right_gram = R^H R``, ``left_gram = L^H L``, ``cross = L^H R`` (all computed
    modes). With ``Q_r = R_c G_r^{-1/2}`` (and likewise for ``L``) the cluster condition is
    ``1 / sigma_min(G_l^{-1/2} L_c^H R_c G_r^{-1/2})``; a Gram matrix whose relative smallest
    eigenvalue is below 1e-16 (singular values below 1e-8) marks dependent vectors: ``inf``.
    """
    chosen = np.asarray(chosen)
    conditions = np.full(chosen.size, np.inf)
    for members, partners in _clusters(right_values, left_values, tolerance, chosen):
        right_root = _inverse_root(right_gram[np.ix_(members, members)])
        left_root = _inverse_root(left_gram[np.ix_(partners, partners)])
        if right_root is None or left_root is None:
            continue
        core = left_root.conj().T @ cross[np.ix_(partners, members)] @ right_root
        smallest = np.linalg.svd(core, compute_uv=False).min()
        if smallest > 0:
            conditions[np.isin(chosen, members)] = 1.0 / smallest
    return conditions


def _inverse_root(products: np.ndarray) -> np.ndarray | None:
    """``G^{-1/2}`` of a Hermitian Gram matrix, or None when its vectors are dependent."""
    products = 0.5 * (products + products.conj().T)
    scale = np.sqrt(np.abs(np.diag(products)).clip(1e-300))
    normalized = products / np.outer(scale, scale)
    values, vectors = np.linalg.eigh(normalized)
    if values.min(initial=1.0) < 1e-16 * max(values.max(initial=1.0), 1e-300):
        return None
    root = (vectors / np.sqrt(values)) @ vectors.conj().T  # N^{-1/2}
    return root / scale[:, None]  # S^{-1} N^{-1/2}: C S^{-1} N^{-1/2} is orthonormal

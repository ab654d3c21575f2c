"""Residuals of Rayleigh–Ritz pairs from the residual block of their subspace, in ``k x k``
numbers: one pass over the basis instead of one per question asked about the modes.

For an orthonormal real basis ``Q`` (local rows ``[row, k]``) of a subspace and the balanced
generator ``Wb = D^-1 W D`` (``D = diag(scaling)``), let ``T = Q^T Wb Q``, ``R = Wb Q - Q T``
and ``L = Wb^T Q - Q T^T``. A Ritz pair ``(lambda, c)`` of ``T`` (``e = T c - lambda c``, zero
up to rounding) has

* balanced residual ``Wb x - lambda x = (R c + Q e) / ||c||`` for ``x = Q c / ||c||``;
* left residual ``Wb^T x - conj(lambda) x = (L c + Q f) / ||c||``, ``f = T^T c - conj(lambda)
  c`` (the right vector as the left guess, exact for a normal ``Wb``);
* residual in ``W``'s coordinates ``W v - lambda v = D (R c + Q e) / ||D Q c||`` for
  ``v = D Q c / ||D Q c||``,

so their norms follow from the Gram matrices of ``R``, ``L``, ``D R`` and ``D Q`` with each
other and with ``Q`` (``||a + b||^2 = a^H a + b^H b + 2 Re a^H b``; common practice). ``R``
and ``L`` are computed explicitly (with ``W``, ``W^T``); only their inner products are kept.
"""

from __future__ import annotations

from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.backends.petsc_tools import apply, apply_transpose, gram, subtract_combination
from pipeline.parallel import World

__all__ = ["SubspaceResiduals", "subspace_residuals"]


@dataclass
class SubspaceResiduals:
    """``T = Q^T Wb Q`` and the ``k x k`` inner products of ``R = Wb Q - Q T``,
    ``L = Wb^T Q - Q T^T``, ``D R`` and ``D Q`` (module docstring), summed over ranks."""

    T: np.ndarray
    right: np.ndarray  # R^T R
    right_basis: np.ndarray  # R^T Q
    left: np.ndarray  # L^T L
    left_basis: np.ndarray  # L^T Q
    scaled_right: np.ndarray  # (D R)^T (D R)
    scaled_right_basis: np.ndarray  # (D R)^T (D Q)
    scaled_basis: np.ndarray  # (D Q)^T (D Q)

    @property
    def right_norm(self) -> float:
        """``||R||_F`` (unscaled)."""
        return float(np.sqrt(max(float(np.trace(self.right)), 0.0)))

    @property
    def left_norm(self) -> float:
        """``||L||_F`` (unscaled)."""
        return float(np.sqrt(max(float(np.trace(self.left)), 0.0)))

    def balanced_residuals(self, values: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
        """``||Wb x - lambda x||`` of the unit balanced Ritz vectors ``x = Q c / ||c||``
        (``coefficients``: the columns ``c``, ``[k, m]``; ``values``: ``[m]``)."""
        errors = self.T @ coefficients - coefficients * values[None, :]
        squares = _squares(self.right, self.right_basis, np.eye(self.T.shape[0]),
                           coefficients, errors)
        return np.sqrt(squares / _column_squares(coefficients))

    def left_residuals(self, values: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
        """``||Wb^T x - conj(lambda) x||`` of the same unit vectors ``x`` taken as left
        eigenvectors (the guess that is exact for a normal ``Wb``)."""
        errors = self.T.T @ coefficients - coefficients * np.conj(values)[None, :]
        squares = _squares(self.left, self.left_basis, np.eye(self.T.shape[0]),
                           coefficients, errors)
        return np.sqrt(squares / _column_squares(coefficients))

    def residuals(self, values: np.ndarray, coefficients: np.ndarray) -> np.ndarray:
        """``||W v - lambda v||`` of the unit Ritz vectors of ``W``, ``v = D Q c / ||D Q
        c||``."""
        errors = self.T @ coefficients - coefficients * values[None, :]
        squares = _squares(self.scaled_right, self.scaled_right_basis, self.scaled_basis,
                           coefficients, errors)
        norms = np.einsum("ij,ij->j", np.conj(coefficients), self.scaled_basis @ coefficients)
        return np.sqrt(squares / np.maximum(norms.real, np.finfo(float).tiny))

    def vector_gram(self, coefficients: np.ndarray) -> np.ndarray:
        """``X^H X`` of the unit balanced Ritz vectors ``X = Q C N`` (``N`` the column
        normalization; ``Q`` orthonormal)."""
        unit = coefficients / np.sqrt(_column_squares(coefficients))[None, :]
        return unit.conj().T @ unit


def _column_squares(coefficients: np.ndarray) -> np.ndarray:
    return np.maximum(np.einsum("ij,ij->j", np.conj(coefficients), coefficients).real,
                      np.finfo(float).tiny)


def _squares(residual_gram: np.ndarray, cross: np.ndarray, basis_gram: np.ndarray,
             coefficients: np.ndarray, errors: np.ndarray) -> np.ndarray:
    """``||A c + B e||^2`` per column from ``A^T A``, ``A^T B`` and ``B^T B``."""
    first = np.einsum("ij,ij->j", np.conj(coefficients), residual_gram @ coefficients).real
    second = np.einsum("ij,ij->j", np.conj(errors), basis_gram @ errors).real
    mixed = np.einsum("ij,ij->j", np.conj(coefficients), cross @ errors).real
    return np.maximum(first + second + 2.0 * mixed, 0.0)


def subspace_residuals(world: World, W: Any, Q: np.ndarray, scaling: np.ndarray,
                       image: np.ndarray | None = None,
                       work: tuple[Any, Any] | None = None) -> SubspaceResiduals:
    """The :class:`SubspaceResiduals` of the orthonormal real basis ``Q`` (local rows,
    column-major) for ``Wb = D^-1 W D``, ``D = diag(scaling)`` (local rows). ``image``:
    ``Wb Q`` when the caller has it (overwritten); ``work``: PETSc work vectors of ``W``."""
    if work is None:
        work = W.createVecs()
    column = scaling[:, None]
    scaled = np.empty_like(Q, order="F")
    if image is None:
        np.multiply(Q, column, out=scaled)  # D Q
        R = apply(W, scaled, work)
        R /= column  # Wb Q
    else:
        R = image
    T = gram(world, Q, R)
    subtract_combination(R, Q, T)  # R = Wb Q - Q T
    right, right_basis = gram(world, R, R), gram(world, R, Q)
    np.multiply(Q, column, out=scaled)  # D Q
    scaled_basis = gram(world, scaled, scaled)
    R *= column  # D R
    scaled_right, scaled_right_basis = gram(world, R, R), gram(world, R, scaled)
    del R
    np.divide(Q, column, out=scaled)  # D^-1 Q
    L = apply_transpose(W, scaled, work)
    del scaled
    L *= column  # Wb^T Q
    subtract_combination(L, Q, T.T)  # L = Wb^T Q - Q T^T
    left, left_basis = gram(world, L, L), gram(world, L, Q)
    return SubspaceResiduals(T=T, right=right, right_basis=right_basis, left=left,
                             left_basis=left_basis, scaled_right=scaled_right,
                             scaled_right_basis=scaled_right_basis,
                             scaled_basis=scaled_basis)

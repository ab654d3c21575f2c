"""Completeness certificate of a found set of slowest modes, by inertia (PETSc + MUMPS).

Claim: ``W`` has no eigenvalue with real part >= ``level`` other than the ``k`` found ones
(counted with multiplicity). The argument (see README, "How the slowest set is certified"):

1. Balance: ``Wb = D^-1 W D`` with ``D = diag(sqrt(p))`` for a positive ``p`` (the stationary
   or Perron vector; any positive ``D`` is a similarity, ``p`` only makes the test sharp).
2. ``Q`` (n x k, orthonormal) spans the found modes in balanced coordinates:
   ``Wb Q = Q T + R``. Then ``Wb - R Q^T`` has the exact invariant subspace ``Q`` and spectrum
   ``spec(T) U spec(B)``, ``B = Qp^T Wb Qp`` on the orthogonal complement.
3. ``spec(B)`` lies in its field of values, whose real parts are at most
   ``omega = lambda_max(Qp^T S Qp)``, ``S = (Wb + Wb^T) / 2`` (Horn and Johnson 1991, Topics
   in Matrix Analysis, 1.2 and 1.5). ``omega < t`` is decided by inertia: with
   ``M = t I - S`` and ``G = Q^T M^-1 Q``, the count of eigenvalues of ``Qp^T S Qp`` above ``t``
   is ``n_-(M) - n_-(G)`` (Haynsworth 1968, inertia additivity of the Schur complement;
   Sylvester's law of inertia on the LDL^T factorization of ``M``).
4. The residual ``R`` moves eigenvalues at most into a pseudospectral neighbourhood; on the
   line ``Re z = level`` (half-way between ``t`` and the slowest found real part) the
   resolvent of the block-triangular ``[[T, C], [0, B]]`` is at most
   ``kappa(T)/g (1 + ||C||/g) + 1/g`` with ``g`` the half-distance, and ``||C|| <= ||Wb^T Q -
   Q T^T||``; when ``||R||`` times that bound is < 1 no eigenvalue crosses the line as ``R``
   is switched on (Trefethen and Embree 2005, Spectra and Pseudospectra, ch. 2 and 4), so
   the counts agree.

For a normal ``Wb`` (reversible chains, translation-invariant drives) ``omega`` is exactly the
next real part and the test needs no extra modes; for a far-from-normal ``W`` it fails safe
and reports how many directions above ``t`` are unaccounted for (``missing``).
The inertia is that of ``M + E`` with ``E`` of the size of the factorization's backward
error (Higham 2002, Accuracy and Stability of Numerical Algorithms, ch. 11), tiny against
the gap margins used here.
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any

import numpy as np

from pipeline.backends.petsc_tools import combine, gram, orthonormalize, petsc
from pipeline.backends.subspace_residuals import SubspaceResiduals, subspace_residuals
from pipeline.backends.symmetric_factor import ShiftedSymmetricFactor
from pipeline.parallel import World

__all__ = ["InertiaCertificate", "certify_by_inertia", "orthonormal_basis", "real_span"]


@dataclass
class InertiaCertificate:
    certified: bool
    level: float  # every eigenvalue with Re >= level is among the found ones (when certified)
    shift: float  # t of the inertia test
    found: int  # k, modes in Q
    above_shift: int  # n_-(t I - S): eigenvalues of S above t
    captured: int  # n_-(G): of those, directions inside span(Q)
    zero_pivots: int
    residual: float  # ||R||_F (balanced, rate units)
    left_residual: float  # ||Wb^T Q - Q T^T||_F
    perturbation_bound: float  # ||R|| x resolvent bound on the line; < 1 needed
    seconds: float
    factor_seconds: float
    note: str = ""
    info: dict[str, Any] = field(default_factory=dict)

    @property
    def missing(self) -> int:
        return self.above_shift - self.captured

    def as_dict(self) -> dict[str, Any]:
        return {
            "kind": "deflated numerical range of the balanced generator, by inertia",
            "level": self.level, "shift": self.shift, "found": self.found,
            "above_shift": self.above_shift, "captured": self.captured,
            "missing": self.missing, "zero_pivots": self.zero_pivots,
            "residual": self.residual, "left_residual": self.left_residual,
            "perturbation_bound": self.perturbation_bound, "seconds": self.seconds,
            "factor_seconds": self.factor_seconds, "note": self.note, **self.info,
        }


def real_span(vectors: np.ndarray) -> np.ndarray:
    """Real columns spanning the complex eigenvectors (local rows ``[row, k]``): their real
    and imaginary parts (a conjugate pair ``v, conj(v)`` spans ``Re v, Im v``). The span's
    dimension is found by :func:`orthonormal_basis`."""
    columns = [part for vector in vectors.T for part in (vector.real, vector.imag)]
    if not columns:
        return np.zeros((vectors.shape[0], 0))
    return np.column_stack(columns)


def orthonormal_basis(world: World, columns: np.ndarray,
                      relative_tolerance: float = 1e-10) -> np.ndarray:
    """Orthonormal basis of the span of real ``columns`` (rank-revealing: eigenvectors of the
    Gram matrix above ``relative_tolerance`` of the largest, then one CholQR pass)."""
    norms = np.sqrt(world.sum(np.ascontiguousarray(np.einsum("ij,ij->j", columns, columns))))
    keep = norms > 0
    columns = columns[:, keep] / norms[keep][None, :]
    if columns.shape[1] == 0:
        return columns
    products = gram(world, columns, columns)
    values, vectors = np.linalg.eigh(0.5 * (products + products.T))
    rank = values > relative_tolerance * values.max()
    basis = combine(columns, vectors[:, rank] / np.sqrt(values[rank]))
    return orthonormalize(world, basis, overwrite=True)


def symmetric_part(W: Any, scaling: np.ndarray) -> tuple[Any, float]:
    """``S = (Wb + Wb^T)/2`` with ``Wb = D^-1 W D``, ``D = diag(scaling)`` (local rows)."""
    PETSc = petsc()
    left, right = W.createVecs()
    right.getArray()[:] = scaling
    left.getArray()[:] = 1.0 / scaling
    balanced = W.copy()
    balanced.diagonalScale(left, right)
    transposed = balanced.transpose(PETSc.Mat())
    balanced.axpy(1.0, transposed, structure=PETSc.Mat.Structure.DIFFERENT_NONZERO_PATTERN)
    transposed.destroy()
    balanced.scale(0.5)
    balanced.setOption(PETSc.Mat.Option.SYMMETRIC, True)
    return balanced, float(balanced.norm(PETSc.NormType.NORM_1))


def certify_by_inertia(
    world: World,
    W: Any,
    scaling: np.ndarray,
    values: np.ndarray,
    vectors: np.ndarray,
    shift: float,
    options_prefix: str = "gapline_cert_",
    factor: ShiftedSymmetricFactor | None = None,
    span: tuple[np.ndarray, np.ndarray] | None = None,
    subspace: SubspaceResiduals | None = None,
) -> InertiaCertificate:
    """Decide whether ``values`` (found eigenvalues, all with real part > ``shift``; their
    right eigenvectors ``vectors``, local rows ``[row, k]``) are all of ``W``'s eigenvalues
    with real part >= the level half-way between ``shift`` and ``min(values.real)``.

    ``scaling``: local rows of ``D`` (positive). ``shift``: ``t``, placed inside a gap of the
    found real parts (the caller picks it between the last wanted group and the next one).
    ``factor``: the caller's :class:`ShiftedSymmetricFactor` of this ``S``, refactored at ``t``
    (the symbolic analysis of the search's factorization is reused; the caller destroys it);
    without it one is made (options prefix ``options_prefix``) and destroyed here.
    ``span``: ``(B, C)`` when the caller knows the balanced eigenvectors as ``B C`` (``B``
    orthonormal real local rows ``[row, m]``, ``C`` complex ``[m, k]``, the same on every
    rank): the basis is then ``B`` times an orthonormal basis of the small ``real_span(C)``,
    with no pass over 10^6-row blocks. ``subspace``: the caller's
    :func:`subspace_residuals` of ``B``, used when the found modes span all of ``B``.
    """
    started = time.perf_counter()
    slowest_kept = float(np.min(values.real))
    level = 0.5 * (shift + slowest_kept)
    given = None
    gap = slowest_kept - level  # = level - shift
    if span is None:
        balanced = vectors / scaling[:, None]  # eigenvectors of Wb = D^-1 W D
        Q = orthonormal_basis(world, real_span(balanced))
    else:  # span(B C) = B span(C) for orthonormal B: the same rank test, on m x 2k numbers
        small = orthonormal_basis(World(), real_span(span[1]))
        # all of span(B): B itself is an orthonormal basis of it (every quantity below is
        # invariant under an orthogonal change of basis)
        whole = small.shape[1] == span[0].shape[1]
        Q = span[0] if whole else combine(span[0], small)
        if whole:
            given = subspace
    k = Q.shape[1]
    dependent = k != values.size  # fewer independent directions than modes claimed
    # R = Wb Q - Q T and L = Wb^T Q - Q T^T, T = Q^T Wb Q (subspace_residuals.py)
    residuals = given if given is not None else subspace_residuals(world, W, Q, scaling)
    T = residuals.T
    residual, left_residual = residuals.right_norm, residuals.left_norm
    # Pseudospectral margin on the line Re z = level.
    ritz, ritz_vectors = np.linalg.eig(T)
    try:
        kappa = float(np.linalg.cond(ritz_vectors))
    except np.linalg.LinAlgError:
        kappa = np.inf
    bound = residual * (kappa / gap * (1 + left_residual / gap) + 1 / gap) if gap > 0 else np.inf
    # The inertia test.
    owned = factor is None
    if owned:
        S = symmetric_part(W, scaling)[0]
        factor = ShiftedSymmetricFactor(world, S, options_prefix)
        S.destroy()
    before = factor.seconds
    negative, zero, _positive = factor.at(shift)
    factor_seconds = factor.seconds - before
    solution = factor.solve(Q)
    G = gram(world, Q, solution)
    G = 0.5 * (G + G.T)
    g_values = np.linalg.eigvalsh(G) if k else np.zeros(0)
    captured = int(np.sum(g_values < 0))
    tiny_g = bool(k) and float(np.min(np.abs(g_values))) <= 1e-13 * float(
        np.max(np.abs(g_values)))
    if owned:
        factor.destroy()
    certified = (zero == 0 and negative == captured and not tiny_g and bound < 1.0
                 and not dependent)
    if dependent and k < values.size:
        note = (f"NOT CERTIFIED: the {values.size} found modes have only {k} independent "
                "eigenvectors (defective or duplicated); the multiplicities are not proven")
    elif dependent:
        note = (f"NOT CERTIFIED: the {values.size} found modes span {k} real directions: the "
                "set is not closed under conjugation (a copy of a complex pair is missing)")
    elif certified:
        note = (f"all {k} eigenvalues with real part >= {level:.6e} were found (inertia of "
                f"tI - S at t = {shift:.6e}: {negative} above t, all in the found span)")
    elif zero:
        note = "NOT CERTIFIED: the test shift hit an eigenvalue of S (zero pivots); retry"
    elif negative > captured:
        note = (f"NOT CERTIFIED: {negative - captured} direction(s) of the balanced generator "
                f"reach real part >= {shift:.3e} outside the found modes: slower modes may be "
                "missing (or W is far from normal)")
    else:
        note = (f"NOT CERTIFIED: the residuals of the found modes are too large for the gap "
                f"margin {gap:.3e} (bound {bound:.2e} >= 1)")
    return InertiaCertificate(
        certified=bool(certified), level=level, shift=shift, found=k,
        above_shift=int(negative), captured=captured, zero_pivots=int(zero),
        residual=residual, left_residual=left_residual, perturbation_bound=float(bound),
        seconds=time.perf_counter() - started, factor_seconds=factor_seconds, note=note,
        info={"ritz_condition": kappa},
    )

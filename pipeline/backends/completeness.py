"""Completeness certificate for shift-and-invert searches.

Shift-and-invert Arnoldi around a real shift ``sigma`` returns the eigenvalues *nearest to
sigma*: every eigenvalue inside the disk ``|lambda - sigma| < r`` is found, where ``r`` is the
distance of the farthest converged one. That ranks by modulus, not by real part, so a slow
mode with a large imaginary part can lie outside the disk and be missed.

The certificate closes the gap with an enclosure of the whole spectrum:

* Gershgorin (columns): every eigenvalue lies in a disk centred at ``W_jj`` with radius
  ``sum_{i != j} |W_ij|`` (Gershgorin 1931; Horn and Johnson 2013, Matrix Analysis, 6.1.1);
* Bendixson: ``|Im lambda| <= ||(W - W^T)/2||_2 <= ||(W - W^T)/2||_1``
  (Bendixson 1902; Horn and Johnson 2013, 1.5 on the numerical range).

If every point of that enclosure with real part ``>= t`` (``t`` = real part of the slowest set's
last mode) lies strictly inside the search disk, no eigenvalue with real part ``>= t`` can have
been missed and the set is certified complete.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

__all__ = ["SpectrumEnclosure", "farthest_enclosed_distance"]


@dataclass(frozen=True)
class SpectrumEnclosure:
    """Gershgorin column disks (``centers``, ``radii``; float64 ``[state]``) and the
    Bendixson bound ``imag_bound`` on imaginary parts."""

    centers: np.ndarray
    radii: np.ndarray
    imag_bound: float

    def compact(self) -> SpectrumEnclosure:
        """The same enclosure with duplicate disks removed (lattices have few kinds)."""
        pairs = np.unique(np.stack([self.centers, self.radii], axis=1), axis=0)
        return SpectrumEnclosure(pairs[:, 0].copy(), pairs[:, 1].copy(), self.imag_bound)


def farthest_enclosed_distance(
    enclosure: SpectrumEnclosure, shift: float, threshold: float
) -> float:
    """Largest ``|z - shift|`` over enclosure points ``z`` with ``Re z >= threshold``.

    For each disk ``D(c, r)`` cut by ``Re z >= t`` and ``|Im z| <= B``, distance from the real
    point ``shift >= c`` grows as one moves left along the circle, so the farthest point is
    one of: the leftmost point ``(c - r, 0)`` when ``c - r >= t``; the corner on the line
    ``Re z = t`` at height ``min(sqrt(r^2 - (t - c)^2), B)``; the corner on ``|Im z| = B`` at
    ``Re z = c - sqrt(r^2 - B^2)`` when that is ``>= t``. Returns 0 if the region is empty.
    """
    c, r, bound = enclosure.centers, enclosure.radii, enclosure.imag_bound
    t = float(threshold)
    best = np.zeros_like(c)
    # Leftmost point of the disk, when the half-plane keeps it.
    left = c - r
    keep = left >= t
    best = np.where(keep, np.abs(shift - left), best)
    # Corner on the line Re z = t.
    reach = r**2 - (t - c) ** 2
    on_line = (reach >= 0) & (t <= c + r)
    height = np.minimum(np.sqrt(np.clip(reach, 0, None)), bound)
    best = np.where(on_line, np.maximum(best, np.hypot(shift - t, height)), best)
    # Corner on the line |Im z| = B.
    if np.isfinite(bound):
        across = r**2 - bound**2
        x_corner = c - np.sqrt(np.clip(across, 0, None))
        has_corner = (across >= 0) & (x_corner >= t)
        best = np.where(has_corner, np.maximum(best, np.hypot(shift - x_corner, bound)), best)
    return float(best.max(initial=0.0))

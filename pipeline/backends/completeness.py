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

    Each disk ``D(c, r)`` is cut by the half-plane ``Re z >= t`` and the strip
    ``|Im z| <= B``; the region is convex and the distance to the real point ``shift`` is
    convex, so the maximum sits at an extreme point: the point of the circle opposite the
    shift, ``(c - r sign(shift - c), 0)``, when the half-plane keeps it; the corners on the
    line ``Re z = t``, ``(t, min(sqrt(r^2 - (t - c)^2), B))``; the corners on the lines
    ``|Im z| = B``, ``(c +- sqrt(r^2 - B^2), B)``, when the half-plane keeps them. (Along an arc
    the distance is unimodal with its peak at the opposite point, and along a straight edge it
    is convex, so arcs and edges add no other candidates.) Returns 0 if the region is empty.
    """
    c, r, bound = enclosure.centers, enclosure.radii, enclosure.imag_bound
    t, shift = float(threshold), float(shift)
    best = np.zeros_like(c, dtype=float)
    # The circle's farthest point from the shift.
    opposite = np.where(shift >= c, c - r, c + r)
    keep = opposite >= t
    best = np.where(keep, np.abs(shift - opposite), best)
    # Corners on the line Re z = t.
    reach = r**2 - (t - c) ** 2
    on_line = reach >= 0
    height = np.minimum(np.sqrt(np.clip(reach, 0, None)), bound)
    best = np.where(on_line, np.maximum(best, np.hypot(shift - t, height)), best)
    # Corners on the lines |Im z| = B.
    if np.isfinite(bound):
        across = r**2 - bound**2
        half_width = np.sqrt(np.clip(across, 0, None))
        for x_corner in (c - half_width, c + half_width):
            has_corner = (across >= 0) & (x_corner >= t)
            best = np.where(has_corner, np.maximum(best, np.hypot(shift - x_corner, bound)),
                            best)
    return float(best.max(initial=0.0))

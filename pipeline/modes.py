"""The one definition of mode ordering.

Modes are ordered *slowest first*: by decreasing real part, then by increasing imaginary
part. Real parts that agree to within a tolerance form one *group* (degenerate modes,
complex-conjugate pairs); inside a group the imaginary part decides. Multiplicities are kept.
"""

from __future__ import annotations

import numpy as np

__all__ = ["grouping_tolerance", "order_modes", "real_part_groups", "take_slowest"]


def grouping_tolerance(values: np.ndarray, scale: float) -> float:
    """Tolerance below which two real parts count as equal.

    Parameters
    ----------
    values
        Eigenvalues (complex, any order).
    scale
        A norm of the generator (rate units); bounds the rounding error of the eigenvalues.

    Returns
    -------
    float
        ``max(1e-8 * spread, 1e-12 * scale)`` where ``spread`` is the range of the real
        parts: small against the distances between distinct slow modes, large against
        rounding (common practice).
    """
    values = np.asarray(values)
    spread = float(np.ptp(values.real)) if values.size else 0.0
    return max(1e-8 * spread, 1e-12 * float(scale), np.finfo(float).tiny)


def real_part_groups(values: np.ndarray, tolerance: float) -> np.ndarray:
    """Group labels of values already sorted by decreasing real part.

    Consecutive values whose real parts differ by at most ``tolerance`` share a label.
    Returns an int array ``[mode]`` of labels 0, 1, 2, ...
    """
    values = np.asarray(values)
    if values.size == 0:
        return np.zeros(0, dtype=np.int64)
    steps = -np.diff(values.real) > tolerance
    return np.concatenate([[0], np.cumsum(steps)]).astype(np.int64)


def order_modes(values: np.ndarray, tolerance: float) -> np.ndarray:
    """Permutation that puts ``values`` slowest first.

    Parameters
    ----------
    values
        Complex eigenvalues ``[mode]``.
    tolerance
        Real parts within this distance count as equal (see :func:`grouping_tolerance`).

    Returns
    -------
    numpy.ndarray
        Indices ``[mode]`` such that ``values[order]`` is ordered by decreasing real part,
        then increasing imaginary part.
    """
    values = np.asarray(values, dtype=complex)
    by_real = np.argsort(-values.real, kind="stable")
    groups = real_part_groups(values[by_real], tolerance)
    # Inside a group the real parts are equal for our purpose: order by imaginary part.
    inner = np.lexsort((values[by_real].imag, groups))
    return by_real[inner]


def take_slowest(values: np.ndarray, count: int, tolerance: float) -> tuple[np.ndarray, bool]:
    """Indices of the ``count`` slowest values, and whether the last group is whole.

    Returns ``(indices, group_complete)``: ``group_complete`` is False when the cut at
    ``count`` splits a group of equal real parts (the next mode is as slow as the last one
    kept), so a caller can say the multiplicity continues past the requested count.
    """
    order = order_modes(values, tolerance)
    kept = order[:count]
    if len(order) <= count or count == 0:
        return kept, True
    # The groups of order_modes (chained real parts), not the distance of the two modes at
    # the cut: inside a group the imaginary part orders, so neighbours there can differ in
    # real part by more than the tolerance.
    by_real = np.sort(np.asarray(values, dtype=complex).real)[::-1]
    groups = real_part_groups(by_real, tolerance)
    return kept, bool(groups[count - 1] != groups[count])

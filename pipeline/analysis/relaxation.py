"""Relaxation summary of the slowest modes: gap, relaxation time, oscillation, resolution."""

from __future__ import annotations

import math
from typing import Any

import numpy as np

__all__ = ["relaxation_summary"]


def relaxation_summary(values: np.ndarray, error_estimates: np.ndarray | None,
                       conserving: bool, norm1: float) -> dict[str, Any]:
    """Summarize slowest-first eigenvalues (rate units).

    The slowest mode is the first one with ``|lambda| > 1e-9 ||W||_1`` (several zero modes of
    a generator with several closed classes are skipped); for a sub-generator it is mode 0.
    Returns the ``gap`` (``-Re lambda``, the decay rate of a sub-generator), the
    ``relaxation_time`` ``1/gap``, the ``period`` ``2 pi / |Im lambda|`` of a complex slowest
    mode (None when real), the ``separation`` ``Re lambda - Re lambda_next`` from the next mode
    of different real part, and ``resolved``: that separation exceeds the sum of the two
    error estimates (the gap is told apart from the next mode).
    """
    values = np.asarray(values, dtype=complex)
    floor = 1e-9 * max(norm1, np.finfo(float).tiny)
    zero = np.abs(values) <= floor if conserving else np.zeros(values.size, dtype=bool)
    candidates = np.flatnonzero(~zero)
    summary: dict[str, Any] = {"zero_modes": int(zero.sum()), "gap": None,
                               "relaxation_time": None, "period": None,
                               "separation": None, "resolved": None}
    if candidates.size == 0:
        return summary
    first = int(candidates[0])
    slowest = values[first]
    gap = float(-slowest.real)
    summary.update(slowest_mode=first, gap=gap,
                   relaxation_time=1.0 / gap if gap > 0 else math.inf)
    if abs(slowest.imag) > floor:
        summary["period"] = 2 * math.pi / abs(slowest.imag)
    errors = (np.zeros(values.size) if error_estimates is None
              else np.asarray(error_estimates, dtype=float))
    later = [k for k in candidates if values[k].real < slowest.real - floor]
    if later:
        following = int(later[0])
        separation = float(slowest.real - values[following].real)
        summary.update(separation=separation,
                       resolved=bool(separation > errors[first] + errors[following]))
    return summary

"""Stationary vector by inverse iteration, judged by its contraction (both backends).

Each step ``p <- (W - sigma I)^-1 p`` (normalized to sum 1) shrinks the component of mode k
by ``sigma / |lambda_k - sigma|``, so the slow modes set the pace when the gap is near sigma.
The residual ``||W p||`` is blind to them (an error e along mode 1 leaves a residual
``|lambda_1| e``), so convergence is judged on the change between steps: once the contraction
``rho`` per step has settled, the error is about ``rho / (1 - rho) x change`` (a posteriori
bound of a contraction; from memory), doubled for safety.
"""

from __future__ import annotations

import math
from collections.abc import Callable

import numpy as np

__all__ = ["STATIONARY_MAX_STEPS", "STATIONARY_TARGET", "inverse_iteration"]

STATIONARY_MAX_STEPS = 600
STATIONARY_TARGET = 1e-13  # 1-norm error of the stationary vector the iteration aims at


def inverse_iteration(
    solve: Callable[[np.ndarray], np.ndarray],
    start: np.ndarray,
    total: Callable[[float], float] = lambda value: value,
) -> tuple[np.ndarray, int, float]:
    """Iterate ``p <- solve(p) / sum`` from ``start``.

    ``start`` and the vectors ``solve`` maps are the states this process holds (all of them
    on one process, one rank's rows under MPI); ``total`` sums a number over the processes.
    Returns ``(p, steps, error estimate)``, the estimate in the 1-norm (``inf`` when the
    contraction never settled).
    """
    p = start
    steps, change, ratios = 0, math.inf, [math.nan, math.nan]
    estimate = math.inf
    while steps < STATIONARY_MAX_STEPS:
        steps += 1
        following = solve(p)
        following /= total(float(following.sum()))
        previous, change = change, total(float(np.abs(following - p).sum()))
        p = following
        if change >= previous:  # no progress any more: the rounding floor of one step
            estimate = min(estimate, change) if math.isfinite(estimate) else change
            break
        ratios = [ratios[1], change / previous if math.isfinite(previous) else math.nan]
        settled = ratios[1] < 1 and abs(ratios[1] - ratios[0]) <= 0.1 * ratios[1]
        estimate = 2 * change * ratios[1] / (1 - ratios[1]) if settled else math.inf
        if change <= 1e-15 and settled:
            break
        if settled and estimate > STATIONARY_TARGET:
            needed = math.log(STATIONARY_TARGET / estimate) / math.log(ratios[1])
            if steps + needed > STATIONARY_MAX_STEPS:
                break  # cannot get there within the budget: report what it is
    return p, steps, float(estimate)


def normalized_null_vector(A: np.ndarray) -> np.ndarray:
    """``p`` with ``A p = 0`` and ``sum p = 1`` for a dense generator ``A`` (``[n, n]``): the
    last balance equation replaced by the normalization (common practice). Raises
    ``numpy.linalg.LinAlgError`` when the null space is not one-dimensional."""
    system = np.array(A, dtype=np.float64, copy=True)
    system[-1, :] = 1.0
    rhs = np.zeros(system.shape[0])
    rhs[-1] = 1.0
    return np.linalg.solve(system, rhs)

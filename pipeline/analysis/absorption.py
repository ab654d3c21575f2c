"""Absorption by a sub-generator: escape rate, quasi-stationary law, mean absorption times,
splitting probabilities between exits.

Conventions: ``W[i, j]`` is the rate ``j -> i`` on the transient states, ``r_e(j)`` the rate
of leaving ``j`` through exit ``e`` (``sum_e r_e(j) = -sum_i W[i, j]``). The mean time to
absorption ``tau`` and the splitting probabilities ``pi_e`` solve the backward equations
``W^T tau = -1`` and ``W^T pi_e = -r_e`` (Norris 1997, Markov Chains, thm. 3.3.1 and 3.3.3).
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np

__all__ = ["quasi_stationary"]


def quasi_stationary(vector: np.ndarray, total: Callable[[float], float] | None = None
                     ) -> tuple[np.ndarray, float]:
    """The quasi-stationary law from the slowest right eigenvector of a sub-generator
    (Darroch and Seneta 1967, J. Appl. Prob. 4, 192): real part, sign fixed so the mass is
    positive, negative rounding clipped, sum 1. Returns ``(law, clipped negative mass)``.

    ``vector`` may be one rank's rows (``[state]``); ``total`` then adds a number over the
    ranks (``World.sum``) and the law returned is those rows of the global law."""
    total = total or (lambda x: x)
    real = np.real(np.asarray(vector))
    if total(float(real.sum())) < 0:
        real = -real
    size = total(float(np.abs(real).sum()))
    negative = total(float(-real[real < 0].sum())) / max(size, np.finfo(float).tiny)
    law = np.clip(real, 0.0, None)
    return law / total(float(law.sum())), negative

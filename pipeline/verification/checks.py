"""Check records and the comparisons behind them."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from scipy.optimize import linear_sum_assignment

__all__ = ["Check", "compare_multisets", "spectral_gap"]


@dataclass
class Check:
    """One verification check, stored as-is in ``RUN/verify`` attrs ``checks``."""

    name: str
    source: str
    value: Any
    reference: Any
    tolerance: Any
    passed: bool

    def as_dict(self) -> dict[str, Any]:
        return asdict(self)


def compare_multisets(computed: np.ndarray, exact: np.ndarray) -> float:
    """Largest distance of an optimal one-to-one matching of ``computed`` into ``exact``.

    ``exact`` may hold more values than ``computed`` (a whole last group of equal real
    parts); degenerate and conjugate modes are matched whatever their order. Returns inf
    when ``exact`` has fewer values.
    """
    computed = np.asarray(computed, dtype=complex)
    exact = np.asarray(exact, dtype=complex)
    if computed.size == 0:
        return 0.0
    if exact.size < computed.size:
        return float("inf")
    cost = np.abs(computed[:, None] - exact[None, :])
    rows, cols = linear_sum_assignment(cost)
    return float(cost[rows, cols].max())


def spectral_gap(values: np.ndarray, conserving: bool) -> float | None:
    """Gap of slowest-first eigenvalues: ``-Re lambda_1`` for a conserving generator
    (``lambda_0 = 0``), ``-Re lambda_0`` (the decay rate) for a sub-generator."""
    values = np.asarray(values)
    index = 1 if conserving else 0
    if values.size <= index:
        return None
    return float(-values[index].real)

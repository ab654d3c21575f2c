"""Check records and the comparisons behind them."""

from __future__ import annotations

from dataclasses import asdict, dataclass
from typing import Any

import numpy as np
from scipy.optimize import linear_sum_assignment

from pipeline.modes import real_part_groups

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


def compare_multisets(computed: np.ndarray, exact: np.ndarray, tie: float = 0.0) -> float:
    """Largest distance of an optimal one-to-one matching of ``computed`` into ``exact``.

    ``exact`` (the slowest exact eigenvalues) may hold more values than ``computed`` only to
    finish its last group of equal real parts (real parts chained to the slowest-decaying one
    within ``tie``): those extra values may stay unmatched, every other exact value must be
    matched. Degenerate and conjugate modes are matched whatever their order. Returns inf
    when that is impossible (``exact`` too short, or too few computed values).
    """
    computed = np.asarray(computed, dtype=complex)
    exact = np.asarray(exact, dtype=complex)
    if computed.size == 0:
        return 0.0
    extra = exact.size - computed.size
    if extra < 0:
        return float("inf")
    cost = np.abs(computed[:, None] - exact[None, :])
    if extra:
        # Extra rows stand for the exact values left unmatched: free in the last group,
        # forbidden before it (a missing multiplicity must not hide behind a later copy).
        by_real = np.argsort(-exact.real, kind="stable")
        groups = np.empty(exact.size, dtype=np.int64)
        groups[by_real] = real_part_groups(exact[by_real], tie)
        optional = groups == groups[by_real[-1]]
        if extra > int(optional.sum()):
            return float("inf")
        filler = np.where(optional, 0.0, np.inf)
        cost = np.vstack([cost, np.broadcast_to(filler, (extra, exact.size))])
    rows, cols = linear_sum_assignment(cost)
    real = rows < computed.size
    return float(cost[rows[real], cols[real]].max())


def spectral_gap(values: np.ndarray, conserving: bool) -> float | None:
    """Gap of slowest-first eigenvalues: ``-Re lambda_1`` for a conserving generator
    (``lambda_0 = 0``), ``-Re lambda_0`` (the decay rate) for a sub-generator."""
    values = np.asarray(values)
    index = 1 if conserving else 0
    if values.size <= index:
        return None
    return float(-values[index].real)

"""Stationary expectations of a model's linear observables (density profiles, currents...).

A model lists :class:`~pipeline.models.base.LinearObservable` definitions; the solve stage
stores ``sum_x p(x) f(x, k)`` for each next to the stationary distribution, streamed over
blocks of states (no array of the whole ``[state, k]`` table).
"""

from __future__ import annotations

import numpy as np

from pipeline.models.base import Model

__all__ = ["stationary_expectations"]

BLOCK = 1 << 16


def stationary_expectations(model: Model, distribution: np.ndarray,
                            block: int = BLOCK) -> dict[str, tuple[str, np.ndarray, str]]:
    """``{name: (dim, expectation [size], meaning)}`` under ``distribution`` ([state])."""
    results = {}
    for name, observable in model.observables().items():
        total = np.zeros(observable.size)
        for start in range(0, model.n_states, block):
            stop = min(start + block, model.n_states)
            total += distribution[start:stop] @ observable.values(start, stop)
        results[name] = (observable.dim, total, observable.meaning)
    return results

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
                            block: int = BLOCK, rows: tuple[int, int] | None = None
                            ) -> dict[str, tuple[str, np.ndarray, str]]:
    """``{name: (dim, expectation [size], meaning)}`` under ``distribution`` ([state]).

    ``rows``: the states ``[start, stop)`` that ``distribution`` holds (one MPI rank's share);
    the partial sums are then added over the ranks, so every rank gets the expectations.
    """
    from pipeline.parallel import world

    first, last = rows if rows is not None else (0, model.n_states)
    results = {}
    for name, observable in model.observables().items():
        total = np.zeros(observable.size)
        for start in range(first, last, block):
            stop = min(start + block, last)
            total += distribution[start - first : stop - first] @ observable.values(start, stop)
        if rows is not None:
            total = world().sum(total)
        results[name] = (observable.dim, total, observable.meaning)
    return results

"""Start laws and observables of the time evolution ``p(t) = exp(tW) p0``."""

from __future__ import annotations

from collections.abc import Callable
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import ConfigError

__all__ = ["coordinate_moments", "law_from_file", "mode_sum", "point_law", "state_index"]

SUM_TOLERANCE = 1e-9


def state_index(model: Any, state: int | tuple[int, ...], label: str) -> int:
    """Flat index of a state given as an index or a lattice coordinate (one-line errors)."""
    n = model.n_states
    if isinstance(state, tuple):
        shape = getattr(model, "shape", None)
        if shape is None:
            raise ConfigError(f"{label}: this model has no coordinates; give a flat state index")
        if len(state) != len(shape) or any(x >= s for x, s in zip(state, shape, strict=False)):
            raise ConfigError(f"{label}: coordinate {list(state)} is not on the lattice of "
                              f"size {list(shape)}")
        return int(np.ravel_multi_index(state, shape))
    if state >= n:
        raise ConfigError(f"{label}: state {state} out of range; the model has {n} states")
    return int(state)


def point_law(n: int, index: int, rows: tuple[int, int] | None = None) -> np.ndarray:
    """All mass on state ``index``: float64 ``[state]``, or the local rows ``[start, stop)``
    of it (zero unless this rank owns ``index``)."""
    start, stop = rows if rows is not None else (0, n)
    law = np.zeros(stop - start)
    if start <= index < stop:
        law[index - start] = 1.0
    return law


def law_from_file(path: str, n: int, label: str,
                  rows: tuple[int, int] | None = None) -> np.ndarray:
    """A probability vector from a ``.npy`` file: shape ``[n]``, finite, >= 0, sum 1.

    With ``rows`` only the states ``[start, stop)`` are read (memory-mapped) and returned;
    the checks are shared by the ranks, so every rank raises the same error."""
    from pipeline.parallel import world

    file = Path(path)
    if not file.is_file():
        raise ConfigError(f"{label}: file {path!r} not found; fix: check the path")
    try:
        law = np.load(file, allow_pickle=False, mmap_mode="r")
    except (ValueError, OSError) as exc:
        raise ConfigError(f"{label}: {path!r} is not a .npy array ({exc})") from None
    if law.shape != (n,) or not np.issubdtype(law.dtype, np.number):
        raise ConfigError(f"{label}: {path!r} holds shape {law.shape}, expected ({n},) numbers")
    start, stop = rows if rows is not None else (0, n)
    law = np.array(law[start:stop], dtype=np.float64)
    parallel = world() if rows is not None else None
    bad = float(not np.isfinite(law).all() or law.min(initial=0.0) < 0)
    total = float(law.sum()) if not bad else 0.0
    if parallel is not None:
        bad, total = parallel.max(bad), float(parallel.sum(total))
    if bad:
        raise ConfigError(f"{label}: {path!r} has negative or non-finite entries")
    if abs(total - 1.0) > SUM_TOLERANCE:
        raise ConfigError(f"{label}: {path!r} sums to {total:.12g}, not 1; normalize it")
    return law


def coordinate_moments(laws: np.ndarray, coordinates: np.ndarray | None,
                       rows: tuple[int, int] | None = None) -> dict[str, np.ndarray]:
    """Total probability ``[time]`` and, with coordinates ``[state, axis]``, the mean and the
    variance of each coordinate under the normalized law ``[time, axis]``.

    ``laws [time, state]`` and ``coordinates`` may hold only the states ``rows`` (one MPI
    rank's share): the sums are then added over the ranks, so every rank gets the moments.
    """
    from pipeline.parallel import world

    total_of = world().sum if rows is not None else (lambda x: x)
    total = total_of(np.ascontiguousarray(laws.sum(axis=1)))
    moments = {"total_probability": total}
    if coordinates is not None:
        x = coordinates.astype(np.float64)
        safe = np.where(total > 0, total, 1.0)[:, None]
        mean = total_of(np.ascontiguousarray(laws @ x)) / safe
        moments["mean_coordinate"] = mean
        moments["variance_coordinate"] = (total_of(np.ascontiguousarray(laws @ (x * x)))
                                          / safe - mean * mean)
    return moments


def mode_sum(values: np.ndarray, left: np.ndarray, right: np.ndarray, start: np.ndarray,
             times: np.ndarray, total: Callable[[np.ndarray], np.ndarray] | None = None
             ) -> np.ndarray:
    """``Re sum_k e^{lambda_k t} r_k (l_k^H p0) / (l_k^H r_k)``, float64 ``[time, state]``.

    ``values [mode]``, ``left``/``right [state, mode]`` (complex), ``start [state]``: all of
    the states, or one rank's rows with ``total`` adding a ``[mode]`` array over the ranks.
    """
    total = total or (lambda x: x)
    pairing = total(np.ascontiguousarray(np.einsum("ij,ij->j", left.conj(), right)))
    weights = total(np.ascontiguousarray(left.conj().T @ np.asarray(start, dtype=np.float64)))
    growth = np.exp(np.outer(np.asarray(times, dtype=np.float64), values))
    return np.real((growth * (weights / pairing)[None, :]) @ right.T)

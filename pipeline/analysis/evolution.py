"""Start laws and observables of the time evolution ``p(t) = exp(tW) p0``."""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import ConfigError

__all__ = ["coordinate_moments", "point_law", "state_index", "law_from_file"]

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


def point_law(n: int, index: int) -> np.ndarray:
    law = np.zeros(n)
    law[index] = 1.0
    return law


def law_from_file(path: str, n: int, label: str) -> np.ndarray:
    """A probability vector from a ``.npy`` file: shape ``[n]``, finite, >= 0, sum 1."""
    file = Path(path)
    if not file.is_file():
        raise ConfigError(f"{label}: file {path!r} not found; fix: check the path")
    try:
        law = np.load(file, allow_pickle=False)
    except (ValueError, OSError) as exc:
        raise ConfigError(f"{label}: {path!r} is not a .npy array ({exc})") from None
    if law.shape != (n,) or not np.issubdtype(law.dtype, np.number):
        raise ConfigError(f"{label}: {path!r} holds shape {law.shape}, expected ({n},) numbers")
    law = law.astype(np.float64)
    if not np.isfinite(law).all() or law.min() < 0:
        raise ConfigError(f"{label}: {path!r} has negative or non-finite entries")
    if abs(law.sum() - 1.0) > SUM_TOLERANCE:
        raise ConfigError(f"{label}: {path!r} sums to {law.sum():.12g}, not 1; normalize it")
    return law


def coordinate_moments(laws: np.ndarray, coordinates: np.ndarray | None) -> dict[str, np.ndarray]:
    """Total probability ``[time]`` and, with coordinates ``[state, axis]``, the mean and the
    variance of each coordinate under the normalized law ``[time, axis]``."""
    total = laws.sum(axis=1)
    moments = {"total_probability": total}
    if coordinates is not None:
        x = coordinates.astype(np.float64)
        safe = np.where(total > 0, total, 1.0)[:, None]
        mean = (laws @ x) / safe
        moments["mean_coordinate"] = mean
        moments["variance_coordinate"] = (laws @ (x * x)) / safe - mean * mean
    return moments

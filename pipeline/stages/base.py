"""What a stage is: the config sections it reads, its upstream stage, and a ``run``."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

import numpy as np

from pipeline.store import ArraySpec, GroupData

if TYPE_CHECKING:
    from pipeline.backends.base import Backend, Operator
    from pipeline.config import Config
    from pipeline.models.base import Model
    from pipeline.store import Store

__all__ = ["RunContext", "StageOutput", "state_array"]


@dataclass
class RunContext:
    """Everything a stage may use. ``operator`` is kept in memory between stages."""

    config: Config
    store: Store
    run: str
    model: Model
    backend_name: str
    fingerprints: dict[str, str] = field(default_factory=dict)
    operator: Operator | None = None
    _backend: Backend | None = None

    @property
    def backend(self) -> Backend:
        if self._backend is None:
            from pipeline.backends import select_backend

            self._backend = select_backend(self.backend_name)
        return self._backend


@dataclass
class StageOutput:
    """Groups to commit (``RUN/<name>``) and extra fields for the run's stage record."""

    groups: dict[str, GroupData]
    record: dict[str, Any] = field(default_factory=dict)
    passed: bool = True


def state_array(data: np.ndarray, dims: tuple[str, ...], rows: tuple[int, int] | None,
                n_states: int) -> ArraySpec:
    """An array with a ``state`` axis (first or second): whole (``rows`` None), or this
    rank's rows ``[start, stop)`` of it, which every rank writes itself."""
    from pipeline.parallel import state_chunk, world

    if rows is None:
        return ArraySpec(data, dims)
    axis = dims.index("state")
    shape = list(data.shape)
    shape[axis] = n_states
    return ArraySpec(data, dims, shape=tuple(shape), offset=rows[0], axis=axis,
                     chunk_rows=state_chunk(n_states, world().size))

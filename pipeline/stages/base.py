"""What a stage is: the config sections it reads, its upstream stage, and a ``run``."""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import TYPE_CHECKING, Any

from pipeline.store import GroupData

if TYPE_CHECKING:
    from pipeline.backends.base import Backend, Operator
    from pipeline.config import Config
    from pipeline.models.base import Model
    from pipeline.store import Store

__all__ = ["RunContext", "StageOutput"]


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

"""The Backend interface and the plain results every backend returns.

A backend builds an operator from a model and answers ``slowest_modes`` and ``stationary``.
Callers pass plain options and get numpy arrays plus provenance; no solver object leaks out.

Conventions: eigenvalues in rate units (1/time), ordered slowest first (see
:mod:`pipeline.modes`); right eigenvectors ``[state, mode]`` with unit 2-norm; residuals
``||W v - lambda v||_2 / ||W||_1`` for unit ``v``, where ``||W||_1`` is the largest column
absolute sum (twice the largest exit rate for a conserving generator).
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from dataclasses import dataclass, field
from typing import Any, ClassVar

import numpy as np

from pipeline.errors import ModelError
from pipeline.models.base import BLOCK_TOLERANCE, Model

__all__ = [
    "Backend",
    "GeneratorCheck",
    "Modes",
    "Operator",
    "Stationary",
    "check_column_sums",
]


@dataclass
class GeneratorCheck:
    """Conservation certificate of an assembled generator."""

    conserving: bool
    norm1: float  # ||W||_1, rate units
    max_exit_rate: float
    column_sum_defect: float  # max_j |sum_i W_ij| (conserving) or max_j max(sum_i W_ij, 0)
    tolerance: float
    leak_rate_max: float  # largest rate of probability loss of one state (sub-generators)


@dataclass
class Operator:
    """An assembled generator held by a backend. ``handle`` is backend-private."""

    model: Model
    n_states: int
    nnz: int
    check: GeneratorCheck
    seconds: float
    handle: Any = field(repr=False, default=None)
    info: dict[str, Any] = field(default_factory=dict)


@dataclass
class Modes:
    """The slowest modes of ``W`` and their certificates.

    values : complex128 ``[mode]``, slowest first.
    residuals : float64 ``[mode]``, ``||W v - lambda v|| / ||W||_1``.
    vectors : complex128 ``[state, mode]`` (unit 2-norm, largest entry real positive) or None.
    condition : float64 ``[mode]``, eigenvalue condition numbers (1 for a normal ``W``).
    error_estimates : float64 ``[mode]``, first-order error bounds ``condition * residual *
        ||W||_1`` in rate units: how far each eigenvalue may be from the exact one.
    certified : the set is proven to hold every eigenvalue with real part >= the last one.
    certificate : how that was decided (kind, radii, note).
    group_complete : False when the requested count cuts a group of equal real parts.
    vector_rows : ``(start, stop)`` when ``vectors`` holds only these rows of the state axis
        (one MPI rank's share); None when it holds every row.
    """

    values: np.ndarray
    residuals: np.ndarray
    vectors: np.ndarray | None
    method: str
    certified: bool
    certificate: dict[str, Any]
    group_complete: bool
    seconds: float
    condition: np.ndarray | None = None
    error_estimates: np.ndarray | None = None
    info: dict[str, Any] = field(default_factory=dict)
    vector_rows: tuple[int, int] | None = None


@dataclass
class Stationary:
    """A stationary distribution ``p`` (``W p = 0``, ``sum p = 1``, ``p >= 0``).

    residual : ``||W p||_1 / ||W||_1``; negative_mass : total weight clipped from negative
    entries before renormalizing (rounding noise; large values mean a bad solve).
    rows : ``(start, stop)`` when ``distribution`` holds only these states (one MPI rank's
    share); None when it holds all of them.
    """

    distribution: np.ndarray
    residual: float
    negative_mass: float
    method: str
    seconds: float
    info: dict[str, Any] = field(default_factory=dict)
    rows: tuple[int, int] | None = None


class Backend(ABC):
    """A numerical engine. Subclasses set ``name`` and ``description``."""

    name: ClassVar[str]
    description: ClassVar[str]

    @classmethod
    def unavailable_reason(cls) -> str | None:
        """None when usable here, else one line saying why not and what to do."""
        return None

    def configure(self, settings: Any) -> None:  # noqa: B027 (optional hook)
        """Take backend-specific settings from a ``SolveConfig`` (inner solver, options)."""

    @abstractmethod
    def assemble(self, model: Model) -> Operator:
        """Build and check the generator from the model's row blocks."""

    @abstractmethod
    def slowest_modes(
        self,
        operator: Operator,
        count: int,
        *,
        method: str = "auto",
        tolerance: float = 1e-12,
        vectors: bool = False,
        dense_limit: int = 1024,
        max_search: int = 400,
    ) -> Modes:
        """The ``count`` eigenvalues of largest real part, with certificates."""

    @abstractmethod
    def stationary(self, operator: Operator, dense_limit: int = 1024) -> Stationary:
        """The stationary distribution of a conserving generator."""


def check_column_sums(
    column_sums: np.ndarray, diagonal: np.ndarray, conserving: bool, norm1: float,
    offset: int = 0,
) -> GeneratorCheck:
    """Check that columns of ``W`` sum to zero (or to <= 0 for a sub-generator).

    ``column_sums``/``diagonal`` may be a slice of the columns starting at state ``offset``
    (one rank's share); messages name global states. Raises :class:`ModelError` when they
    do not, within ``BLOCK_TOLERANCE * ||W||_1``.
    """
    tolerance = BLOCK_TOLERANCE * max(norm1, np.finfo(float).tiny)
    max_exit = float(-diagonal.min(initial=0.0))
    if conserving:
        defect = float(np.abs(column_sums).max(initial=0.0))
        if defect > tolerance:
            state = int(np.argmax(np.abs(column_sums)))
            raise ModelError(
                f"column {offset + state} of W sums to {column_sums[state]:.3g}, not 0: the model "
                "claims to conserve probability but does not"
            )
        leak = 0.0
    else:
        defect = float(max(column_sums.max(initial=0.0), 0.0))
        if defect > tolerance:
            state = int(np.argmax(column_sums))
            raise ModelError(
                f"column {offset + state} of W sums to {column_sums[state]:.3g} > 0: probability "
                "would be created"
            )
        leak = float(-column_sums.min(initial=0.0))
    return GeneratorCheck(conserving, float(norm1), max_exit, defect, tolerance, leak)

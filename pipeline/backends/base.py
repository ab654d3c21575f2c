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

from pipeline.errors import BackendError, ModelError
from pipeline.models.base import BLOCK_TOLERANCE, Model
from pipeline.progress import log

__all__ = [
    "Backend",
    "Classes",
    "Currents",
    "GeneratorCheck",
    "Modes",
    "Operator",
    "Stationary",
    "check_column_sums",
    "flows_from_entries",
    "resolve_method",
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
    #: one communicating class (True), several (False: the stationary law vanishes on
    #: transient states or is not unique, so a backend must not balance by it), unknown (None)
    irreducible: bool | None = None


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


@dataclass
class Currents:
    """Stationary probability flows of ``W`` under a distribution ``p``.

    With the flux ``F_ij = W_ij p_j`` (probability per unit time going ``j -> i``) and the net
    current ``J_ij = F_ij - F_ji``, summed over the off-diagonal entries of each channel
    (:meth:`~pipeline.models.base.Model.transition_channels`):

    channel_flux : float64 ``[channel]``, sum of ``F_ij``.
    channel_current : float64 ``[channel]``, sum of ``J_ij`` (a pair counts in both its
        channels with opposite signs).
    entropy_production : ``1/2 sum_{i != j} J_ij ln(F_ij / F_ji)`` per unit time
        (Schnakenberg 1976, Rev. Mod. Phys. 48, 571, eq. 7.6); ``inf`` when a transition
        carries flux whose reverse does not exist.
    max_flux : ``max F_ij``; max_current : ``max |J_ij|``; the detailed-balance defect is
        their ratio (0 when ``W`` is reversible under ``p``).
    """

    channel_flux: np.ndarray
    channel_current: np.ndarray
    entropy_production: float
    max_flux: float
    max_current: float

    @property
    def balance_defect(self) -> float:
        return self.max_current / self.max_flux if self.max_flux > 0 else 0.0


def flows_from_entries(flux: np.ndarray, reverse: np.ndarray, channels: np.ndarray,
                       count: int, world: Any = None) -> Currents:
    """:class:`Currents` from the off-diagonal entries ``(i, j)`` of ``W``: ``flux`` ``F_ij =
    W_ij p_j``, ``reverse`` ``F_ji`` (0 where ``W_ji`` is not stored) and the channel of each
    entry (float64/int64 ``[entry]``). ``world`` (a :class:`pipeline.parallel.World`) adds up
    the sums and maxima of every rank's entries; None: these entries are all of ``W``."""
    current = flux - reverse
    channel_flux = np.bincount(channels, weights=flux, minlength=count)
    channel_current = np.bincount(channels, weights=current, minlength=count)
    with np.errstate(divide="ignore", invalid="ignore"):
        terms = current * np.log(flux / reverse)
    terms[(flux == 0) & (reverse == 0)] = 0.0  # no flux either way: no contribution
    terms[current == 0] = 0.0
    entropy = 0.5 * float(terms.sum())
    max_flux, max_current = float(flux.max(initial=0.0)), float(np.abs(current).max(initial=0.0))
    if world is not None:
        channel_flux, channel_current = world.sum(channel_flux), world.sum(channel_current)
        entropy = float(world.sum(entropy))
        max_flux, max_current = world.max(max_flux), world.max(max_current)
    return Currents(channel_flux, channel_current, entropy, max_flux, max_current)


@dataclass
class Classes:
    """Communicating classes (strongly connected components of the transition graph).

    labels : int64 ``[state]``, class of each state (0..count-1): of the states ``rows``
        when set (one MPI rank's share), else of every state.
    closed : bool ``[class]``, no transition (and no leak) leaves the class (every class).
    rows : ``(start, stop)`` when ``labels`` holds only these states; None for all.
    """

    labels: np.ndarray
    closed: np.ndarray
    rows: tuple[int, int] | None = None

    @property
    def count(self) -> int:
        return int(self.closed.size)

    def labels_of(self, start: int, stop: int) -> np.ndarray:
        """Labels of the states ``[start, stop)``: this process's rows, held or sliced."""
        if self.rows is None:
            return self.labels[start:stop]
        if tuple(self.rows) != (start, stop):
            raise RuntimeError(f"classes hold the labels of rows {self.rows}, not "
                               f"[{start}, {stop})")
        return self.labels


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
        """The ``count`` eigenvalues of largest real part, with certificates, by the method
        :func:`resolve_method` picks (the same choice on every backend)."""
        n = operator.n_states
        count = min(count, n)
        method = resolve_method(method, n, count, dense_limit)
        if method == "dense":
            return self._dense_modes(operator, count, vectors)
        if method == "krylov":
            return self._unfactored_modes(operator, count, tolerance, vectors)
        return self._shift_invert_modes(operator, count, tolerance, vectors, max_search)

    @abstractmethod
    def _dense_modes(self, operator: Operator, count: int, want_vectors: bool) -> Modes:
        """Method ``dense``: every eigenvalue (certified complete)."""

    @abstractmethod
    def _unfactored_modes(self, operator: Operator, count: int, tolerance: float,
                          want_vectors: bool) -> Modes:
        """Method ``krylov``: a Krylov method on ``W`` itself, no factorization (never
        certified complete)."""

    @abstractmethod
    def _shift_invert_modes(self, operator: Operator, count: int, tolerance: float,
                            want_vectors: bool, max_search: int) -> Modes:
        """Method ``shift-invert``: the factorized search with its completeness
        certificate."""

    @abstractmethod
    def stationary(self, operator: Operator, dense_limit: int = 1024) -> Stationary:
        """The stationary distribution of a conserving generator."""

    # -- analysis operations: default implementations refuse (see DEVELOPERS.md) --------

    def _unsupported(self, what: str) -> BackendError:
        return BackendError(f"backend {self.name} does not support {what} yet; use "
                            "solve.backend = 'scipy'")

    def local_rows(self, operator: Operator) -> tuple[int, int] | None:
        """The states ``[start, stop)`` whose rows this process holds (one MPI rank's share);
        None when it holds every state. State vectors that the analysis methods take and
        return (``distribution``, ``rhs``, ``start``, their results) are these rows."""
        return None

    def evolve_method(self, operator: Operator) -> str:
        """How :meth:`evolve` computes ``exp(tW) p0`` (provenance, one line)."""
        return f"{self.name}: not implemented"

    def currents(self, operator: Operator, distribution: np.ndarray) -> Currents:
        """Fluxes, net currents per channel and entropy production under ``distribution``
        (float64 ``[state]`` local rows, see :meth:`local_rows`; sum 1 over all states)."""
        raise self._unsupported("currents")

    def communicating_classes(self, operator: Operator) -> Classes:
        """Strongly connected components of the graph ``j -> i`` for ``W[i, j] > 0``."""
        raise self._unsupported("communicating classes")

    def class_stationary(self, operator: Operator, states: np.ndarray,
                         dense_limit: int = 1024) -> Stationary:
        """Stationary law of ``W`` restricted to a closed class: ``states`` (int64, sorted)
        are the class's states among :meth:`local_rows` (the whole class on one process);
        the distribution is over those states, in that order (``rows``: the local rows).
        Collective under MPI: every rank passes its part of the same class."""
        raise self._unsupported("stationary laws of closed classes")

    def solve_transposed(self, operator: Operator,
                         rhs: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
        """``X`` with ``W^T X = rhs`` (float64 ``[state]`` or ``[state, k]``, local rows) and
        the relative residual ``||W^T x - b||_inf / (||W||_1 ||x||_inf + ||b||_inf)`` per
        column ``[k]``; used for mean absorption times (``rhs = -1``) and splitting
        probabilities (``rhs = -exit rates``). Raises SolverError when ``W^T`` is singular."""
        raise self._unsupported("linear solves with W^T")

    def evolve(self, operator: Operator, start: np.ndarray, times: np.ndarray) -> np.ndarray:
        """``p(t) = exp(t W) start`` at sorted ``times >= 0``, float64 ``[time, state]``
        (local rows of ``start`` in, local rows out)."""
        raise self._unsupported("time evolution")

    def mode_expansion(self, operator: Operator, count: int, start: np.ndarray,
                       times: np.ndarray, dense_limit: int = 1024) -> tuple[np.ndarray,
                                                                           np.ndarray]:
        """``sum_k e^{lambda_k t} r_k (l_k^H p0) / (l_k^H r_k)`` over the ``count`` slowest
        modes (right ``r``, left ``l``), real part, float64 ``[time, state]`` (local rows),
        and the eigenvalues used ``[mode]``. Exact when ``count = n_states``, else accurate
        once ``e^{Re lambda_count t}`` is small."""
        raise self._unsupported("the mode expansion")

    def symmetric_slowest_modes(self, operator: Operator, count: int, *,
                                tolerance: float = 1e-12, vectors: bool = False,
                                dense_limit: int = 1024) -> Modes:
        """Slowest modes of a reversible irreducible ``W`` from the symmetric
        ``S = D^{-1/2} W D^{1/2}`` (``D = diag(p)``, ``p`` from detailed balance along a
        spanning tree): real eigenvalues, vectors of ``W``; error estimates are
        ``||S s - lambda s|| + ||(S - S^T)/2||_1`` (the skew part is 0 for a reversible
        chain, up to rounding)."""
        raise self._unsupported("the symmetrized solve of reversible chains")


def resolve_method(method: str, n: int, count: int, dense_limit: int) -> str:
    """The method a backend runs for ``solve.method``: ``auto`` is dense up to
    ``dense_limit`` states, else shift-invert; shift-invert falls back to dense when the
    count leaves a Krylov search (at most n - 2 modes) no room past the last wanted mode (it
    could neither see the rest of its group nor be certified)."""
    if method == "auto":
        method = "dense" if n <= dense_limit else "shift-invert"
    if method == "shift-invert" and count >= n - 2:
        log(f"solve: {count} modes of {n} states leave a Krylov search (at most n - 2 = "
            f"{n - 2}) no room to certify; using dense")
        method = "dense"
    return method


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

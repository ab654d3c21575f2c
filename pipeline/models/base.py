"""The Model interface: a generator described by row blocks.

Convention: ``W[i, j]`` (``i != j``) is the rate from state ``j`` to state ``i``;
``W[j, j] = -(exit rate of j)``; ``dp/dt = W p``. Row ``i`` of ``W`` therefore lists the
*incoming* rates of state ``i`` and its diagonal. A model hands out rows ``[start, stop)`` as
CSR pieces; whole-matrix assembly, chunked assembly and per-rank MPI assembly all use the
same call. Models never import a solver library or the store.
"""

from __future__ import annotations

from abc import ABC, abstractmethod
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any, ClassVar, Protocol

import numpy as np

from pipeline.errors import ModelError

__all__ = [
    "BLOCK_TOLERANCE",
    "ExactResults",
    "LinearObservable",
    "Model",
    "RowBlock",
    "compress_stencil",
    "validate_block",
]

#: Relative tolerance of the generator checks (column sums against the largest exit rate).
BLOCK_TOLERANCE = 1e-12


@dataclass(frozen=True)
class RowBlock:
    """Rows ``start..stop-1`` of ``W`` in CSR form.

    ``indptr`` has ``stop - start + 1`` entries starting at 0; ``indices`` are global column
    (source-state) indices; ``data`` are the rates (float64), the diagonal included.
    """

    start: int
    stop: int
    indptr: np.ndarray
    indices: np.ndarray
    data: np.ndarray

    @property
    def nnz(self) -> int:
        return int(self.indptr[-1])


@dataclass(frozen=True)
class LinearObservable:
    """A per-state quantity whose expectation ``sum_x p(x) f(x, k)`` is stored.

    ``values(start, stop)`` returns float64 ``[state, dim]`` for states ``start..stop-1``
    (vectorized, independent of the block cut); ``dim`` names the second axis (``site``,
    ``bond``, ``species``...) and ``size`` its length.
    """

    dim: str
    size: int
    values: Callable[[int, int], np.ndarray]
    meaning: str = ""


class ExactResults(Protocol):
    """Known results for a model, used by ``verify`` and the tests.

    ``spectrum_sources`` and ``stationary_sources`` cite where each result comes from;
    ``has_stationary`` says whether :meth:`stationary` knows the law.
    """

    sources: tuple[str, ...]
    spectrum_sources: tuple[str, ...]
    stationary_sources: tuple[str, ...]
    has_stationary: bool

    def slowest_eigenvalues(self, count: int) -> np.ndarray:
        """At least ``count`` slowest eigenvalues, ordered slowest first; the list is
        extended past ``count`` to finish the last group of equal real parts."""

    def stationary(self, start: int, stop: int) -> np.ndarray | None:
        """Exact stationary probabilities of states ``start..stop-1``, or None."""


class Model(ABC):
    """A continuous-time Markov generator given by row blocks.

    Subclasses set :attr:`name` and implement the abstract methods; they must be
    vectorized (no Python loop over states) and deterministic: a row does not depend on how
    the state range is cut into blocks.
    """

    name: ClassVar[str]

    @property
    @abstractmethod
    def n_states(self) -> int:
        """Number of states."""

    @property
    @abstractmethod
    def conserving(self) -> bool:
        """True if no probability leaves the system (column sums are zero)."""

    @abstractmethod
    def row_block(self, start: int, stop: int) -> RowBlock:
        """Rows ``start..stop-1`` of ``W``."""

    @abstractmethod
    def nnz_upper_bound(self, start: int, stop: int) -> int:
        """An upper bound on the nonzeros of rows ``start..stop-1`` (for preallocation)."""

    @abstractmethod
    def state_labels(self, start: int, stop: int) -> dict[str, np.ndarray]:
        """Labels of states ``start..stop-1`` (e.g. lattice coordinates ``[state, axis]``)."""

    def exact(self) -> ExactResults | None:
        """Known spectrum and stationary law, or None when none is known."""
        return None

    def describe(self) -> dict[str, Any]:
        """Plain-data summary kept with the results (shape, kind, ...)."""
        return {"model": self.name, "n_states": self.n_states, "conserving": self.conserving}

    def warnings(self) -> list[str]:
        """Things a user should know before solving (ill-conditioning, ...)."""
        return []

    def observables(self) -> dict[str, LinearObservable]:
        """Linear observables whose stationary expectations are stored (name -> definition)."""
        return {}

    def state_aggregates(self, start: int, stop: int, size: int) -> np.ndarray | None:
        """Optional: labels ``[stop - start]`` grouping states ``start..stop-1`` into compact
        aggregates of about ``size`` strongly coupled states (equal label = one aggregate),
        from which the slowest-mode search of the slepc backend builds a coarse start;
        None (the default) when the model knows no such grouping."""
        return None

    # -- optional hooks of the analysis stage (see DEVELOPERS.md, "Channels and exits") ----

    def channel_names(self) -> tuple[str, ...]:
        """Names of the transition channels that currents are summed over (default: one)."""
        return ("all",)

    def transition_channels(self, block: RowBlock) -> np.ndarray:
        """Channel (an index into :meth:`channel_names`) of every entry of ``block``.

        Returns int64 ``[entry]`` aligned with ``block.indices``: the channel of the
        transition ``block.indices[k] -> row`` of entry ``k``, and ``-1`` on the diagonal.
        Vectorized; the default puts every transition in channel 0.
        """
        rows = np.repeat(np.arange(block.start, block.stop, dtype=np.int64),
                         np.diff(block.indptr))
        return np.where(block.indices == rows, -1, 0).astype(np.int64)

    def channel_displacements(self) -> np.ndarray | None:
        """Displacement of one transition of each channel, float64 ``[channel, axis]``, for
        the mean drift; None when states have no position."""
        return None

    def exit_names(self) -> tuple[str, ...]:
        """Names of the ways probability leaves a sub-generator (default: none)."""
        return ()

    def exit_rates(self, start: int, stop: int) -> np.ndarray:
        """Rates of leaving through each exit, float64 ``[state, exit]`` for states
        ``start..stop-1``; the rows sum to the leak rate ``-sum_i W[i, j]``."""
        return np.zeros((stop - start, 0))


class CsrRows:
    """Row blocks, nonzero counts and bounds of a model that holds its generator as a CSR
    matrix ``self.W`` (rows = target states, the ``W[i, j] = rate j -> i`` convention)."""

    W: Any

    def nnz_upper_bound(self, start: int, stop: int) -> int:
        return int(self.W.indptr[stop] - self.W.indptr[start])

    def nnz_count(self) -> int:
        return int(self.W.nnz)

    def row_block(self, start: int, stop: int) -> RowBlock:
        indptr = self.W.indptr
        first, last = int(indptr[start]), int(indptr[stop])
        return RowBlock(start, stop, (indptr[start : stop + 1] - first).astype(np.int64),
                        self.W.indices[first:last], self.W.data[first:last])


def compress_stencil(
    start: int, stop: int, columns: np.ndarray, values: np.ndarray,
    present: np.ndarray | None,
) -> RowBlock:
    """Pack a fixed-width stencil ``[row, slot]`` into CSR pieces; ``present`` (None: every
    entry) masks out the entries that do not exist."""
    rows, width = columns.shape
    if present is None or present.all():
        indptr = np.arange(0, rows * width + 1, width, dtype=np.int64)
        return RowBlock(start, stop, indptr, columns.reshape(-1), values.reshape(-1))
    indptr = np.zeros(rows + 1, dtype=np.int64)
    np.cumsum(np.count_nonzero(present, axis=1), out=indptr[1:])
    return RowBlock(start, stop, indptr, columns[present], values[present])


def validate_block(block: RowBlock, n_states: int) -> float:
    """Check a row block: shapes, index range, finite rates, off-diagonals >= 0.

    Returns the largest exit rate in the block (``max -W[i, i]``). Raises
    :class:`ModelError` naming the first bad entry.
    """
    rows = block.stop - block.start
    if block.indptr.shape != (rows + 1,) or block.indptr[0] != 0:
        raise ModelError(f"row block {block.start}:{block.stop}: malformed indptr")
    if block.indices.shape != block.data.shape or block.indices.size != block.nnz:
        raise ModelError(f"row block {block.start}:{block.stop}: indices and data disagree")
    if block.nnz == 0:
        return 0.0
    if block.indices.min() < 0 or block.indices.max() >= n_states:
        raise ModelError(f"row block {block.start}:{block.stop}: column index out of range")
    data = block.data
    # One reduction instead of a mask: a NaN or an infinity makes the sum non-finite (a sum
    # of finite rates can overflow only when they are near 1e308; then the mask decides).
    with np.errstate(over="ignore", invalid="ignore"):
        total = np.add.reduce(data)
    if not np.isfinite(total):
        bad = ~np.isfinite(data)
        if bad.any():
            row = _row_of(block, int(np.argmax(bad)))
            raise ModelError(f"state {row}: rate is not finite ({data[bad][0]})")
    # Negative entries must be diagonal ones. (A positive diagonal needs no test here: with
    # off-diagonals >= 0 it would make its column sum positive, which the assembly check of
    # column sums rejects.)
    negative = np.flatnonzero(data < 0)
    if negative.size == 0:
        return -0.0
    indptr = block.indptr
    if negative.size == rows and bool(
        ((indptr[:-1] <= negative) & (negative < indptr[1:])).all()
    ):
        # The usual case, one negative entry in every row: the k-th one is in row k.
        entry_rows = np.arange(block.start, block.stop, dtype=np.int64)
    else:
        entry_rows = block.start + np.searchsorted(indptr, negative, side="right") - 1
    off_diagonal = block.indices[negative] != entry_rows
    if off_diagonal.any():
        index = negative[int(np.argmax(off_diagonal))]
        raise ModelError(
            f"W[{_row_of(block, index)}, {block.indices[index]}] = {data[index]}: "
            "off-diagonal rates must be >= 0"
        )
    return float(-data[negative].min())


def _row_of(block: RowBlock, entry: int) -> int:
    return block.start + int(np.searchsorted(block.indptr, entry, side="right") - 1)

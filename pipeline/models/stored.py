"""A generator read back from stored CSR arrays (``RUN/matrix`` of the store).

:class:`StoredGenerator` is a :class:`~pipeline.models.base.Model` whose rows come from three
sliceable arrays (zarr arrays in practice: only the chunks of the requested rows are read),
so every backend assembles from it unchanged, each MPI rank reading just its own rows. State
labels and exact results are delegated to the model the matrix was built from. This module
never imports the store; the solve stage hands it the arrays.
"""

from __future__ import annotations

from typing import Any

import numpy as np

from pipeline.models.base import ExactResults, Model, RowBlock

__all__ = ["StoredGenerator", "csr_from_model"]

BLOCK_ROWS = 1 << 16


class StoredGenerator(Model):
    """Rows of ``W`` from stored CSR arrays.

    Parameters
    ----------
    indptr, indices, data : sliceable arrays (``[row_pointer]``, ``[entry]``, ``[entry]``)
        CSR of ``W`` (``W[i, j]`` = rate ``j -> i``); row ``i`` is
        ``indices/data[indptr[i]:indptr[i + 1]]``.
    source : the model the matrix was assembled from (labels, exact results, description).
    fingerprint : the assemble-stage fingerprint the arrays were committed with.
    """

    name = "stored"

    def __init__(self, indptr: Any, indices: Any, data: Any, source: Model,
                 fingerprint: str) -> None:
        self._indptr, self._indices, self._data = indptr, indices, data
        self.source = source
        self.fingerprint = fingerprint
        self._n = int(indptr.shape[0]) - 1
        if self._n != source.n_states:
            raise ValueError(f"stored matrix has {self._n} rows, the model {source.n_states}")

    @property
    def n_states(self) -> int:
        return self._n

    @property
    def conserving(self) -> bool:
        return self.source.conserving

    def row_block(self, start: int, stop: int) -> RowBlock:
        pointers = np.asarray(self._indptr[start : stop + 1], dtype=np.int64)
        first, last = int(pointers[0]), int(pointers[-1])
        indices = np.asarray(self._indices[first:last])
        data = np.asarray(self._data[first:last], dtype=np.float64)
        return RowBlock(start, stop, pointers - first, indices, data)

    def nnz_upper_bound(self, start: int, stop: int) -> int:
        return int(self._indptr[stop]) - int(self._indptr[start])

    def state_labels(self, start: int, stop: int) -> dict[str, np.ndarray]:
        return self.source.state_labels(start, stop)

    def exact(self) -> ExactResults | None:
        return self.source.exact()

    def describe(self) -> dict[str, Any]:
        return self.source.describe()

    def warnings(self) -> list[str]:
        return self.source.warnings()

    @property
    def index_dtype(self) -> np.dtype:
        return np.dtype(self._indices.dtype)

    # The source model's observables and analysis hooks (they depend on the states and
    # transitions, which are the same).

    def observables(self):
        return self.source.observables()

    def channel_names(self) -> tuple[str, ...]:
        return self.source.channel_names()

    def transition_channels(self, block: RowBlock) -> np.ndarray:
        return self.source.transition_channels(block)

    def channel_displacements(self) -> np.ndarray | None:
        return self.source.channel_displacements()

    def exit_names(self) -> tuple[str, ...]:
        return self.source.exit_names()

    def exit_rates(self, start: int, stop: int) -> np.ndarray:
        return self.source.exit_rates(start, stop)


def csr_from_model(model: Model, block_rows: int = BLOCK_ROWS) -> tuple[np.ndarray, ...]:
    """``(indptr, indices, data)`` of the whole ``W`` from the model's row blocks."""
    n = model.n_states
    bound = model.nnz_upper_bound(0, n)
    indptr = np.zeros(n + 1, dtype=np.int64)
    indices: np.ndarray | None = None
    data = np.empty(bound, dtype=np.float64)
    filled = 0
    for start in range(0, n, block_rows):
        stop = min(start + block_rows, n)
        block = model.row_block(start, stop)
        if indices is None:
            indices = np.empty(bound, dtype=block.indices.dtype)
        indices[filled : filled + block.nnz] = block.indices
        data[filled : filled + block.nnz] = block.data
        indptr[start + 1 : stop + 1] = block.indptr[1:] + filled
        filled += block.nnz
    if indices is None:
        indices = np.empty(0, dtype=np.int64)
    return indptr, indices[:filled], data[:filled]

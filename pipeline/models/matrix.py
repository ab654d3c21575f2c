"""A user-supplied generator read from a Matrix Market (``.mtx``) or scipy ``.npz`` file.

``convention = "columns"`` (default, gapline's own): entry ``(i, j)`` is the rate ``j -> i``
and columns sum to 0. ``"rows"``: entry ``(i, j)`` is the rate ``i -> j`` (rows sum to 0);
the matrix is transposed on load. ``diagonal = "from-rates"`` ignores the file's diagonal and
sets it to minus the exit rates. The file is checked on load, with one-line errors naming
the file and the first bad entry: square, finite, off-diagonal rates >= 0, and sums of the
source-state lines 0 (or <= 0 for ``conserving = false``) to ``1e-12 x ||W||_1``.
"""

from __future__ import annotations

from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import ModelError
from pipeline.models.base import BLOCK_TOLERANCE, CsrRows, Model

__all__ = ["UserMatrix", "load_sparse"]


def load_sparse(path: str, label: str = "model.file"):
    """Read a sparse matrix from ``.mtx`` or ``.npz`` (scipy CSR, float64); one-line errors."""
    import scipy.io
    import scipy.sparse as sp

    name = Path(path).name
    try:
        if path.lower().endswith(".npz"):
            matrix = sp.load_npz(path)
        else:
            matrix = scipy.io.mmread(path)
    except (ValueError, OSError, KeyError, IndexError, TypeError, EOFError) as exc:
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ModelError(f"{label}: {name!r} is not a readable "
                         f"{'scipy .npz' if path.lower().endswith('.npz') else 'Matrix Market'} "
                         f"file ({detail}); fix: write it with scipy.sparse.save_npz or "
                         "scipy.io.mmwrite") from None
    if not sp.issparse(matrix):
        matrix = sp.csr_matrix(np.asarray(matrix))
    if np.iscomplexobj(matrix.data):
        raise ModelError(f"{label}: {name!r} holds complex entries; rates must be real")
    matrix = sp.csr_matrix(matrix, dtype=np.float64)
    matrix.sum_duplicates()
    return matrix


class UserMatrix(CsrRows, Model):
    """A generator given as a sparse matrix (see the module docstring)."""

    name = "matrix"

    def __init__(self, matrix: Any, source: str = "matrix", convention: str = "columns",
                 diagonal: str = "given", conserving: bool = True) -> None:
        import scipy.sparse as sp

        name = Path(source).name
        rows, cols = matrix.shape
        if rows != cols:
            raise ModelError(f"model.file: {name!r} is {rows} x {cols}; a generator is square")
        if rows == 0:
            raise ModelError(f"model.file: {name!r} is empty")
        W = sp.csr_matrix(matrix.T if convention == "rows" else matrix, dtype=np.float64)
        W.sum_duplicates()
        W.eliminate_zeros()
        W.sort_indices()
        line = "row" if convention == "rows" else "column"

        def entry(i: int, j: int) -> str:  # as written in the file (1-based, its convention)
            return f"({j + 1}, {i + 1})" if convention == "rows" else f"({i + 1}, {j + 1})"

        coo = W.tocoo()
        bad = ~np.isfinite(coo.data)
        if bad.any():
            at = int(np.argmax(bad))
            raise ModelError(f"model.file: {name!r} entry {entry(coo.row[at], coo.col[at])} is "
                             f"{coo.data[at]}; rates must be finite")
        off = coo.row != coo.col
        negative = off & (coo.data < 0)
        if negative.any():
            at = int(np.argmax(negative))
            raise ModelError(f"model.file: {name!r} entry {entry(coo.row[at], coo.col[at])} = "
                             f"{coo.data[at]:g} is off the diagonal and negative; rates must "
                             f"be >= 0 (convention = {convention!r}: entry (i, j) is the rate "
                             + ("i -> j)" if convention == "rows" else "j -> i)"))
        if diagonal == "from-rates":
            exits = np.bincount(coo.col[off], weights=coo.data[off], minlength=rows)
            W = sp.csr_matrix((coo.data[off], (coo.row[off], coo.col[off])), shape=W.shape)
            W = (W - sp.diags(exits)).tocsr()
            W.sort_indices()
        sums = np.asarray(W.sum(axis=0)).ravel()
        scale = float(np.asarray(abs(W).sum(axis=0)).ravel().max(initial=0.0))
        tolerance = BLOCK_TOLERANCE * max(scale, np.finfo(float).tiny)
        worst = int(np.argmax(np.abs(sums) if conserving else sums))
        if (abs(sums[worst]) if conserving else sums[worst]) > tolerance:
            need = "0" if conserving else "<= 0"
            raise ModelError(
                f"model.file: {name!r} {line} {worst + 1} sums to {sums[worst]:.6g}, not {need} "
                f"(convention = {convention!r}: each {line} holds one state's exit rates and "
                "minus their sum on the diagonal); fix: correct the diagonal, set "
                "diagonal = 'from-rates', or check model.convention")
        self.W = W
        self.source = str(source)
        self.convention, self.diagonal = convention, diagonal
        self._conserving = bool(conserving)
        self.index_dtype = W.indices.dtype

    @classmethod
    def from_config(cls, config: Any) -> UserMatrix:
        return cls(load_sparse(config.file), config.file, config.convention, config.diagonal,
                   config.conserving)

    @property
    def n_states(self) -> int:
        return self.W.shape[0]

    @property
    def conserving(self) -> bool:
        return self._conserving

    def state_labels(self, start: int, stop: int) -> dict[str, np.ndarray]:
        return {"index": np.arange(start, stop, dtype=np.int64)}

    def describe(self) -> dict[str, Any]:
        info = super().describe()
        info.update(file=self.source, convention=self.convention, diagonal=self.diagonal,
                    nnz=int(self.W.nnz))
        return info

"""Resource estimates for ``gapline check``: states, nonzeros, memory by solve method."""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["estimate_resources"]


def _bytes(count: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if count < 1024 or unit == "TiB":
            return f"{count:.1f} {unit}"
        count /= 1024
    return f"{count:.1f} TiB"


def estimate_resources(model: Any, config: Any) -> dict[str, str]:
    """Plain-text estimates (one process, scipy backend); LU fill-in is not predicted."""
    n = model.n_states
    bound = model.nnz_upper_bound(0, n)
    nnz = model.nnz_count() if hasattr(model, "nnz_count") else bound
    # The widths the assembly uses: the model's column index dtype, and row pointers of the
    # same width when every pointer fits (ScipyBackend.assemble).
    index_bytes = np.dtype(getattr(model, "index_dtype", np.int64)).itemsize
    pointer_bytes = 4 if index_bytes == 4 and max(bound, n) < 2**31 - 1 else 8
    matrix = nnz * (8 + index_bytes) + (n + 1) * pointer_bytes
    solve = config.solve
    method = solve.method
    if method == "auto":
        method = "dense" if n <= solve.dense_limit else "shift-invert"
    if method == "shift-invert" and min(solve.modes, n) >= n - 2:
        method = "dense"  # Arnoldi could not search past the wanted modes (as solve does)
    info = {
        "states": f"{n}",
        "nonzeros": f"{nnz}",
        "conserving": "yes" if model.conserving else "no (sub-generator)",
        "matrix (CSR)": _bytes(matrix),
        "method": method,
    }
    if method == "dense":
        info["dense eigensolver"] = _bytes(40.0 * n * n)
    else:
        basis = 2 * solve.max_search + 1
        info["Arnoldi basis (max)"] = _bytes(16.0 * n * min(basis, n))
        info["LU of W - sigma I"] = "fill-in not predicted (grows fast in 3D)"
    if solve.vectors:
        info["stored vectors"] = _bytes(16.0 * n * solve.modes)
    info["stationary vector"] = _bytes(8.0 * n)
    return info

"""Resource estimates for ``gapline check`` and ``gapline submit``: states, nonzeros, memory
by solve method, and a rough time."""

from __future__ import annotations

from typing import Any

import numpy as np

__all__ = ["estimate_resources", "resource_numbers"]

# Rough throughputs of the 2-core development machine (benchmarks/README.md: assembly about
# 8e7 nonzeros/s; LAPACK about 1e9 flop/s per core); a batch time limit multiplies them by a
# safety factor (pipeline/submit.py).
ASSEMBLY_NNZ_PER_SECOND = 3e7
FLOPS_PER_SECOND = 1e9


def _bytes(count: float) -> str:
    for unit in ("B", "KiB", "MiB", "GiB", "TiB"):
        if count < 1024 or unit == "TiB":
            return f"{count:.1f} {unit}"
        count /= 1024
    return f"{count:.1f} TiB"


def resource_numbers(model: Any, config: Any) -> dict[str, Any]:
    """The estimate as numbers: ``states``, ``nonzeros``, ``method``, ``parts`` (name ->
    bytes), ``total_bytes`` and ``seconds`` (rough, LU fill-in not predicted)."""
    n = model.n_states
    bound = model.nnz_upper_bound(0, n)
    nnz = model.nnz_count() if hasattr(model, "nnz_count") else bound
    # The widths the assembly uses: the model's column index dtype, and row pointers of the
    # same width when every pointer fits (ScipyBackend.assemble).
    index_bytes = np.dtype(getattr(model, "index_dtype", np.int64)).itemsize
    pointer_bytes = 4 if index_bytes == 4 and max(bound, n) < 2**31 - 1 else 8
    solve = config.solve
    method = solve.method
    if method == "auto":
        method = "dense" if n <= solve.dense_limit else "shift-invert"
    if method == "shift-invert" and min(solve.modes, n) >= n - 2:
        method = "dense"  # Arnoldi could not search past the wanted modes (as solve does)
    parts = {"matrix (CSR)": float(nnz * (8 + index_bytes) + (n + 1) * pointer_bytes)}
    seconds = nnz / ASSEMBLY_NNZ_PER_SECOND
    if method == "dense":
        parts["dense eigensolver"] = 40.0 * n * n
        seconds += 25.0 * float(n) ** 3 / FLOPS_PER_SECOND  # nonsymmetric QR: ~25 n^3
    else:
        basis = 2 * solve.max_search + 1
        parts["Arnoldi basis (max)"] = 16.0 * n * min(basis, n)
        seconds += 4.0 * n * min(basis, n) ** 2 / FLOPS_PER_SECOND  # orthogonalization
    if solve.vectors:
        parts["stored vectors"] = 16.0 * n * solve.modes
    parts["stationary vector"] = 8.0 * n
    return {"states": n, "nonzeros": nnz, "method": method, "parts": parts,
            "total_bytes": float(sum(parts.values())), "seconds": float(seconds)}


def estimate_resources(model: Any, config: Any) -> dict[str, str]:
    """Plain-text estimates (one process, scipy backend); LU fill-in is not predicted."""
    numbers = resource_numbers(model, config)
    parts = numbers["parts"]
    info = {
        "states": f"{numbers['states']}",
        "nonzeros": f"{numbers['nonzeros']}",
        "conserving": "yes" if model.conserving else "no (sub-generator)",
        "matrix (CSR)": _bytes(parts["matrix (CSR)"]),
        "method": numbers["method"],
    }
    if numbers["method"] == "dense":
        info["dense eigensolver"] = _bytes(parts["dense eigensolver"])
    else:
        info["Arnoldi basis (max)"] = _bytes(parts["Arnoldi basis (max)"])
        info["LU of W - sigma I"] = "fill-in not predicted (grows fast in 3D)"
    if "stored vectors" in parts:
        info["stored vectors"] = _bytes(parts["stored vectors"])
    info["stationary vector"] = _bytes(parts["stationary vector"])
    return info

"""Stage ``assemble``: build the generator from the model's row blocks and check it."""

from __future__ import annotations

import numpy as np

from pipeline.progress import log, warn
from pipeline.stages.base import RunContext, StageOutput
from pipeline.store import ArraySpec, GroupData

NAME = "assemble"
CONFIG_SECTIONS = ("model", "store.matrix")
UPSTREAM: str | None = None
COLLECTIVE = True  # every MPI rank takes part (its own rows)


def run(ctx: RunContext) -> StageOutput:
    model = ctx.model
    for note in model.warnings():
        warn(f"{note}")
    operator = ctx.backend.assemble(model)
    ctx.operator = operator
    check = operator.check
    rate = operator.nnz / operator.seconds if operator.seconds > 0 else None
    log(f"assemble: {operator.n_states} states, {operator.nnz} nonzeros in "
        f"{operator.seconds:.2f} s")
    attrs = {
        "n_states": operator.n_states,
        "nnz": operator.nnz,
        "conserving": check.conserving,
        "norm1": check.norm1,
        "max_exit_rate": check.max_exit_rate,
        "column_sum_defect": check.column_sum_defect,
        "column_sum_tolerance": check.tolerance,
        "leak_rate_max": check.leak_rate_max,
        "seconds": operator.seconds,
        "nnz_per_second": rate,
        "backend": ctx.backend.name,
        "warnings": model.warnings(),
        **operator.info,
    }
    groups = {"assemble": GroupData(attrs=attrs)}
    if ctx.config.store.matrix:
        groups["matrix"] = matrix_group(operator)
    return StageOutput(groups, record={"seconds": operator.seconds})


def matrix_group(operator) -> GroupData:
    """The generator as CSR arrays (the backend's own when it holds a scipy matrix, else
    rebuilt from the model's row blocks); read back by :class:`StoredGenerator`."""
    import scipy.sparse as sp

    handle = operator.handle if isinstance(operator.handle, dict) else {}
    W = handle.get("W")
    if "rows" in handle and not sp.issparse(W):
        return _distributed_matrix_group(operator)
    if not (sp.issparse(W) and W.format == "csr"):
        from pipeline.models.stored import csr_from_model

        indptr, indices, data = csr_from_model(operator.model)
    else:
        indptr, indices, data = W.indptr, W.indices, W.data
    return GroupData(
        arrays={
            "indptr": ArraySpec(np.asarray(indptr, dtype=np.int64), ("row_pointer",)),
            "indices": ArraySpec(indices, ("entry",)),
            "data": ArraySpec(np.asarray(data, dtype=np.float64), ("entry",)),
        },
        attrs={"format": "csr", "n_states": operator.n_states, "nnz": operator.nnz,
               "conserving": operator.check.conserving,
               "convention": "W[i, j] = rate j -> i; row i = entries indptr[i]:indptr[i+1]"},
    )


def _distributed_matrix_group(operator) -> GroupData:
    """Each rank's own rows of W (the slepc backend's local CSR), written rank after rank
    (their entry ranges do not fall on chunk boundaries), so no rank holds all of W."""
    from pipeline.parallel import world

    parallel = world()
    start, stop = operator.handle["rows"]
    indptr, indices, data = operator.handle["W"].getValuesCSR()
    counts = parallel.allgather(int(indptr[-1]))
    before = int(sum(counts[: parallel.rank]))
    total = int(sum(counts))
    n = operator.n_states
    # Rank 0 writes indptr[0] = 0 too; every rank writes indptr[start + 1 : stop + 1].
    pointers = np.asarray(indptr[0 if start == 0 else 1 :], dtype=np.int64) + before
    first = 0 if start == 0 else start + 1
    return GroupData(
        arrays={
            "indptr": ArraySpec(pointers, ("row_pointer",), shape=(n + 1,), offset=first,
                                ordered=True),
            "indices": ArraySpec(np.asarray(indices), ("entry",), shape=(total,),
                                 offset=before, ordered=True),
            "data": ArraySpec(np.asarray(data, dtype=np.float64), ("entry",), shape=(total,),
                              offset=before, ordered=True),
        },
        attrs={"format": "csr", "n_states": n, "nnz": total,
               "conserving": operator.check.conserving,
               "convention": "W[i, j] = rate j -> i; row i = entries indptr[i]:indptr[i+1]"},
    )

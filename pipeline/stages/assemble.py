"""Stage ``assemble``: build the generator from the model's row blocks and check it."""

from __future__ import annotations

from pipeline.progress import log, warn
from pipeline.stages.base import RunContext, StageOutput
from pipeline.store import GroupData

NAME = "assemble"
CONFIG_SECTIONS = ("model",)
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
    return StageOutput({"assemble": GroupData(attrs=attrs)}, record={"seconds": operator.seconds})

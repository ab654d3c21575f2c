"""Stage ``evolve``: ``p(t) = exp(tW) p0`` at the requested times (Krylov action).

Without an ``[evolve]`` table the stage commits an ``evolution`` group that says so
(``requested = false``) and computes nothing, so a full run stays complete and a later
config with the table reruns just this stage. ``p(t)`` is stored on a ``time`` axis up to
``evolve.full_limit`` states; the observables (total probability, mean and variance of each
coordinate) always. With ``evolve.modes = k`` the mode expansion over the ``k`` slowest modes
(left and right eigenvectors) is stored too, with its L1 distance to the Krylov result at each
time: a check of both (they agree once the neglected modes have decayed).

Collective: under MPI each rank starts from its rows of ``p0``, the backend evolves the
distributed vector, the moments and certificates are reductions, and each rank writes its
state chunks of ``[time, state]``.
"""

from __future__ import annotations

import time
from typing import Any

import numpy as np

from pipeline.analysis.evolution import (
    coordinate_moments,
    law_from_file,
    point_law,
    state_index,
)
from pipeline.errors import StoreError
from pipeline.parallel import world
from pipeline.progress import log
from pipeline.stages.base import RunContext, StageOutput, state_array
from pipeline.store import ArraySpec, GroupData

NAME = "evolve"
CONFIG_SECTIONS = ("evolve",)
UPSTREAM = "solve"
COLLECTIVE = True  # every MPI rank takes part (its own rows)


def run(ctx: RunContext) -> StageOutput:
    settings = ctx.config.evolve
    if settings is None:
        return StageOutput({"evolution": GroupData(attrs={
            "requested": False, "note": "no [evolve] table in the config"})})
    started = time.perf_counter()
    if ctx.operator is None:
        ctx.operator = ctx.backend.assemble(ctx.model)
    operator, model, backend = ctx.operator, ctx.model, ctx.backend
    n = operator.n_states
    rows = backend.local_rows(operator)  # None: this process holds every state
    start, stop = rows or (0, n)
    parallel = world()
    p0, start_text = _start_law(ctx, settings.start, n, rows)
    times = np.asarray(settings.times, dtype=np.float64)
    laws = backend.evolve(operator, p0, times)  # [time, local state]
    labels = model.state_labels(start, stop) if hasattr(model, "shape") else {}
    moments = coordinate_moments(laws, labels.get("coordinate"), rows=rows)
    total = moments["total_probability"]
    arrays: dict[str, Any] = {"time": ArraySpec(times, ("time",)),
                              "total_probability": ArraySpec(total, ("time",))}
    for name in ("mean_coordinate", "variance_coordinate"):
        if name in moments:
            arrays[name] = ArraySpec(moments[name], ("time", "axis"))
    full = n <= settings.full_limit
    expansion_attrs: dict[str, Any] = {}
    if settings.modes:
        expanded, used = backend.mode_expansion(operator, settings.modes, p0, times,
                                                dense_limit=ctx.config.solve.dense_limit)
        difference = parallel.sum(np.ascontiguousarray(np.abs(expanded - laws).sum(axis=1)))
        arrays["mode_expansion_difference"] = ArraySpec(difference, ("time",))
        expansion_attrs = {"mode_expansion_modes": int(used.size),
                           "mode_expansion_definition": "sum_x |p_modes(t) - p_krylov(t)|"}
        if full:
            arrays["mode_expansion"] = state_array(expanded, ("time", "state"), rows, n)
    if full:
        arrays["probability"] = state_array(laws, ("time", "state"), rows, n)
    # Certificates: probability is conserved (or only lost, for a sub-generator) and stays
    # nonnegative up to rounding.
    if operator.check.conserving:
        conservation = float(np.abs(total - 1.0).max(initial=0.0))
    else:
        conservation = float(np.maximum(np.diff(total), 0.0).max(initial=0.0))
    negative = parallel.sum(np.ascontiguousarray(-np.minimum(laws, 0.0).sum(axis=1)))
    attrs = {
        "requested": True,
        "start": start_text,
        "method": backend.evolve_method(operator),
        "ranks": parallel.size,
        "full_probability": full,
        "conservation_defect": conservation,
        "conservation_definition": ("max |sum p(t) - 1| (conserving) or the largest gain of "
                                    "total probability between times (sub-generator)"),
        "negative_mass": float(negative.max(initial=0.0)),
        "seconds": time.perf_counter() - started,
        **expansion_attrs,
    }
    log(f"evolve: {times.size} times, conservation defect {conservation:.1e}")
    return StageOutput({"evolution": GroupData(arrays=arrays, attrs=attrs)},
                       record={"seconds": attrs["seconds"]})


def _start_law(ctx: RunContext, start, n: int,
               rows: tuple[int, int] | None) -> tuple[np.ndarray, str]:
    """``p0`` (the local ``rows`` of it, or all states) and how it was given."""
    first, last = rows or (0, n)
    if start == "stationary":
        group = ctx.store.group(ctx.run, "stationary", required=False)
        if group is None or "distribution" not in group:
            raise StoreError("evolve.start: 'stationary' needs a stored single stationary law "
                             "(conserving W with solve.stationary = true)")
        return group["distribution"][first:last], "stationary"
    if isinstance(start, str):
        return law_from_file(start, n, "evolve.start", rows=rows), start
    index = state_index(ctx.model, start, "evolve.start")
    return point_law(n, index, rows=rows), f"state {index}"

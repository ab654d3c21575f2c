"""Stage ``evolve``: ``p(t) = exp(tW) p0`` at the requested times (Krylov action).

Without an ``[evolve]`` table the stage commits an ``evolution`` group that says so
(``requested = false``) and computes nothing, so a full run stays complete and a later
config with the table reruns just this stage. ``p(t)`` is stored on a ``time`` axis up to
``evolve.full_limit`` states; the observables (total probability, mean and variance of each
coordinate) always. With ``evolve.modes = k`` the mode expansion over the ``k`` slowest modes
(left and right eigenvectors) is stored too, with its L1 distance to the Krylov result at each
time: a check of both (they agree once the neglected modes have decayed).
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
from pipeline.progress import log
from pipeline.stages.base import RunContext, StageOutput
from pipeline.store import ArraySpec, GroupData

NAME = "evolve"
CONFIG_SECTIONS = ("evolve",)
UPSTREAM = "solve"
#: not yet under MPI: the runner commits a skip note instead (see runner.py)
MPI_READY = False


def run(ctx: RunContext) -> StageOutput:
    settings = ctx.config.evolve
    if settings is None:
        return StageOutput({"evolution": GroupData(attrs={
            "requested": False, "note": "no [evolve] table in the config"})})
    started = time.perf_counter()
    if ctx.operator is None:
        ctx.operator = ctx.backend.assemble(ctx.model)
    operator, model = ctx.operator, ctx.model
    n = operator.n_states
    p0, start_text = _start_law(ctx, settings.start, n)
    times = np.asarray(settings.times, dtype=np.float64)
    laws = ctx.backend.evolve(operator, p0, times)
    labels = model.state_labels(0, n) if hasattr(model, "shape") else {}
    moments = coordinate_moments(laws, labels.get("coordinate"))
    total = moments["total_probability"]
    arrays: dict[str, Any] = {"time": ArraySpec(times, ("time",)),
                              "total_probability": ArraySpec(total, ("time",))}
    for name in ("mean_coordinate", "variance_coordinate"):
        if name in moments:
            arrays[name] = ArraySpec(moments[name], ("time", "axis"))
    expansion_attrs: dict[str, Any] = {}
    if settings.modes:
        expanded, used = ctx.backend.mode_expansion(operator, settings.modes, p0, times,
                                                    dense_limit=ctx.config.solve.dense_limit)
        difference = np.abs(expanded - laws).sum(axis=1)
        arrays["mode_expansion_difference"] = ArraySpec(difference, ("time",))
        expansion_attrs = {"mode_expansion_modes": int(used.size),
                           "mode_expansion_definition": "sum_x |p_modes(t) - p_krylov(t)|"}
        if n <= settings.full_limit:
            arrays["mode_expansion"] = ArraySpec(expanded, ("time", "state"))
    full = n <= settings.full_limit
    if full:
        arrays["probability"] = ArraySpec(laws, ("time", "state"))
    # Certificates: probability is conserved (or only lost, for a sub-generator) and stays
    # nonnegative up to rounding.
    if operator.check.conserving:
        conservation = float(np.abs(total - 1.0).max(initial=0.0))
    else:
        conservation = float(np.maximum(np.diff(total), 0.0).max(initial=0.0))
    attrs = {
        "requested": True,
        "start": start_text,
        "method": f"{ctx.backend.name}: Krylov action of exp(tW) (expm_multiply, "
                  "Al-Mohy and Higham 2011)",
        "full_probability": full,
        "conservation_defect": conservation,
        "conservation_definition": ("max |sum p(t) - 1| (conserving) or the largest gain of "
                                    "total probability between times (sub-generator)"),
        "negative_mass": float(-np.minimum(laws, 0.0).sum(axis=1).max(initial=0.0)),
        "seconds": time.perf_counter() - started,
        **expansion_attrs,
    }
    log(f"evolve: {times.size} times, conservation defect {conservation:.1e}")
    return StageOutput({"evolution": GroupData(arrays=arrays, attrs=attrs)},
                       record={"seconds": attrs["seconds"]})


def _start_law(ctx: RunContext, start, n: int) -> tuple[np.ndarray, str]:
    if start == "stationary":
        group = ctx.store.group(ctx.run, "stationary", required=False)
        if group is None or "distribution" not in group:
            raise StoreError("evolve.start: 'stationary' needs a stored single stationary law "
                             "(conserving W with solve.stationary = true)")
        return group["distribution"][:], "stationary"
    if isinstance(start, str):
        return law_from_file(start, n, "evolve.start"), start
    index = state_index(ctx.model, start, "evolve.start")
    return point_law(n, index), f"state {index}"

"""Stage ``analyze``: what the spectrum means.

Relaxation (gap, relaxation time, oscillation period, whether the gap is resolved),
communicating classes, stationary currents per model channel with the entropy production
and the detailed-balance defect (conserving ``W``), and absorption (sub-generators): escape
rate, quasi-stationary law, mean absorption times and splitting probabilities per exit.

Collective: under MPI every rank reads its own rows of the stored laws and vectors, the
backend reduces the sums, and each rank writes its rows of the state arrays.
"""

from __future__ import annotations

import math
import time
from typing import Any

import numpy as np

from pipeline.analysis.absorption import quasi_stationary
from pipeline.analysis.evolution import state_index
from pipeline.analysis.relaxation import relaxation_summary
from pipeline.parallel import world
from pipeline.progress import log
from pipeline.stages.base import RunContext, StageOutput, state_array
from pipeline.store import ArraySpec, GroupData

NAME = "analyze"
CONFIG_SECTIONS = ("analyze",)
UPSTREAM = "solve"
COLLECTIVE = True  # every MPI rank takes part (its own rows)

ENTROPY_SOURCE = "Schnakenberg 1976, Rev. Mod. Phys. 48, 571 (entropy production, eq. 7.6)"


def run(ctx: RunContext) -> StageOutput:
    started = time.perf_counter()
    settings = ctx.config.analyze
    backend, store, run_name = ctx.backend, ctx.store, ctx.run
    if ctx.operator is None:
        ctx.operator = backend.assemble(ctx.model)
    operator = ctx.operator
    conserving = operator.check.conserving
    spectrum = store.group(run_name, "spectrum")
    values = spectrum["eigenvalues"][:]
    errors = spectrum["error_estimates"][:] if "error_estimates" in spectrum else None
    rows = backend.local_rows(operator)  # None: this process holds every state
    start, stop = rows or (0, operator.n_states)
    attrs: dict[str, Any] = {"backend": backend.name, "ranks": world().size,
                             "conserving": conserving, "norm1": operator.check.norm1}
    attrs["relaxation"] = relaxation_summary(values, errors, conserving, operator.check.norm1)
    arrays: dict[str, ArraySpec] = {}

    classes = backend.communicating_classes(operator)
    labels = classes.labels_of(start, stop)
    transient = int(world().sum(int((~classes.closed[labels]).sum())))
    attrs["classes"] = {"count": classes.count, "closed": int(classes.closed.sum()),
                        "transient_states": transient,
                        "method": "strongly connected components of the graph j -> i"}
    arrays["class_of_state"] = state_array(labels, ("state",), rows, operator.n_states)
    arrays["class_closed"] = ArraySpec(classes.closed, ("class",))

    if conserving:
        stationary = store.group(run_name, "stationary", required=False)
        if stationary is not None and "distribution" in stationary:
            _currents(ctx, stationary["distribution"][start:stop], settings, attrs, arrays)
        elif stationary is not None and "class_distributions" in stationary:
            _class_currents(ctx, stationary, (start, stop), settings, attrs, arrays)
        else:
            attrs["currents"] = {"computed": False, "note": "no stationary law stored"}
    else:
        _absorption(ctx, spectrum, rows, settings, attrs, arrays)
    attrs["seconds"] = time.perf_counter() - started
    return StageOutput({"analysis": GroupData(arrays=arrays, attrs=attrs)},
                       record={"seconds": attrs["seconds"]})


def _currents(ctx: RunContext, p: np.ndarray, settings, attrs, arrays) -> None:
    model, operator = ctx.model, ctx.operator
    flows = ctx.backend.currents(operator, p)
    names = list(model.channel_names())
    arrays["channel_flux"] = ArraySpec(flows.channel_flux, ("channel",))
    arrays["channel_current"] = ArraySpec(flows.channel_current, ("channel",))
    defect = flows.balance_defect
    summary: dict[str, Any] = {
        "computed": True,
        "channels": names,
        "entropy_production": flows.entropy_production,
        "entropy_source": ENTROPY_SOURCE,
        "balance_defect": defect,
        "balance_defect_definition": "max |J_ij| / max W_ij p_j",
        "detailed_balance": bool(defect <= settings.balance_tolerance),
        "balance_tolerance": settings.balance_tolerance,
    }
    moves = model.channel_displacements()
    if moves is not None:
        drift = flows.channel_flux @ moves
        arrays["drift"] = ArraySpec(drift, ("axis",))
        summary["drift"] = drift.tolist()
    attrs["currents"] = summary
    log(f"analyze: entropy production {flows.entropy_production:.6g}, detailed-balance "
        f"defect {defect:.2e}")


def _class_currents(ctx: RunContext, stationary, rows: tuple[int, int], settings, attrs,
                    arrays) -> None:
    """Currents under the stationary law of each closed class: ``[class, channel]``
    (``rows``: the states whose part of each law this process reads)."""
    laws, labels = stationary["class_distributions"], stationary["class_labels"][:]
    fluxes, currents, per_class = [], [], []
    for row, label in enumerate(labels):  # a loop over closed classes
        flows = ctx.backend.currents(ctx.operator, laws[row, rows[0]:rows[1]])
        fluxes.append(flows.channel_flux)
        currents.append(flows.channel_current)
        per_class.append({"class": int(label), "entropy_production": flows.entropy_production,
                          "balance_defect": flows.balance_defect,
                          "detailed_balance": bool(flows.balance_defect
                                                   <= settings.balance_tolerance)})
    arrays["class_channel_flux"] = ArraySpec(np.array(fluxes), ("class", "channel"))
    arrays["class_channel_current"] = ArraySpec(np.array(currents), ("class", "channel"))
    attrs["currents"] = {"computed": False, "per_class": per_class,
                         "channels": list(ctx.model.channel_names()),
                         "entropy_source": ENTROPY_SOURCE,
                         "note": "several closed classes: currents under each class's law"}


def _absorption(ctx: RunContext, spectrum, rows: tuple[int, int] | None, settings, attrs,
                arrays) -> None:
    """Escape rate, quasi-stationary law, mean absorption times and splitting probabilities
    (``rows``: the states this process holds, None for all); sums over states are
    reductions over the ranks."""
    model, operator, backend = ctx.model, ctx.operator, ctx.backend
    n = operator.n_states
    start, stop = rows or (0, n)
    total = world().sum
    if "vectors" in spectrum:
        slowest, method = spectrum["vectors"][start:stop, 0], "stored slowest right eigenvector"
    else:
        solve = ctx.config.solve
        modes = backend.slowest_modes(operator, 1, method=solve.method,
                                      tolerance=solve.tolerance, vectors=True,
                                      dense_limit=solve.dense_limit,
                                      max_search=solve.max_search)
        slowest, method = modes.vectors[:, 0], f"slowest right eigenvector ({modes.method})"
    law, negative = quasi_stationary(slowest, total=total)
    arrays["quasi_stationary"] = state_array(law, ("state",), rows, n)
    escape = attrs["relaxation"]["gap"]
    exits = model.exit_rates(start, stop)
    rhs = np.column_stack([-np.ones(stop - start), -exits])
    solution, residuals = backend.solve_transposed(operator, rhs)
    tau, splitting = solution[:, 0], solution[:, 1:]
    arrays["mean_absorption_time"] = state_array(tau, ("state",), rows, n)
    mean_time = float(total(float(law @ tau)))
    summary: dict[str, Any] = {
        "escape_rate": escape,
        "quasi_stationary_method": method,
        "quasi_stationary_negative_mass": negative,
        "mean_time_from_quasi_stationary": mean_time,
        "mean_time_residual": float(residuals[0]),
        "exits": list(model.exit_names()),
        "source": "Norris 1997, Markov Chains, thm. 3.3.1 and 3.3.3 (backward equations)",
    }
    # From the quasi-stationary law the absorption time is exponential with rate equal to
    # the escape rate, so its mean is 1 / escape rate (Darroch and Seneta 1967).
    if escape:
        summary["quasi_stationary_time_defect"] = abs(mean_time * escape - 1.0)
    if splitting.shape[1]:
        arrays["splitting"] = state_array(splitting, ("state", "exit"), rows, n)
        summary["splitting_residual"] = float(residuals[1:].max())
        summary["splitting_sum_defect"] = world().max(
            float(np.abs(splitting.sum(axis=1) - 1).max(initial=0.0)))
        summary["splitting_from_quasi_stationary"] = total(
            np.ascontiguousarray(law @ splitting)).tolist()
    if settings.start is not None:
        index = state_index(model, settings.start, "analyze.start")
        owned = start <= index < stop  # the owner rank contributes, the others add zeros
        summary["start_state"] = index
        summary["mean_time_from_start"] = float(total(float(tau[index - start])
                                                      if owned else 0.0))
        if splitting.shape[1]:
            mine = splitting[index - start] if owned else np.zeros(splitting.shape[1])
            summary["splitting_from_start"] = total(np.ascontiguousarray(mine)).tolist()
    attrs["absorption"] = summary
    log(f"analyze: escape rate {escape:.6g}, mean absorption time from the quasi-stationary "
        f"law {mean_time:.6g} (1/escape rate {1 / escape if escape else math.inf:.6g})")

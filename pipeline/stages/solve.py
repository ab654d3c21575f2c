"""Stage ``solve``: the slowest modes and the stationary distribution."""

from __future__ import annotations

import time

import numpy as np

from pipeline.errors import SolverError
from pipeline.observables import stationary_expectations
from pipeline.parallel import world
from pipeline.progress import log, warn
from pipeline.stages.base import RunContext, StageOutput, state_array
from pipeline.store import ArraySpec, GroupData

NAME = "solve"
CONFIG_SECTIONS = ("solve",)
UPSTREAM = "assemble"
COLLECTIVE = True  # every MPI rank takes part (its own rows)


def stored_generator(ctx: RunContext):
    """The committed ``RUN/matrix`` of the current assemble fingerprint as a model, or None
    (``store.matrix`` off, or no complete matrix from this config)."""
    if not ctx.config.store.matrix or not ctx.store.has_run(ctx.run):
        return None
    group = ctx.store.group(ctx.run, "matrix", required=False)
    if group is None or group.attrs.get("fingerprint") != ctx.fingerprints.get("assemble"):
        return None
    from pipeline.models.stored import StoredGenerator

    return StoredGenerator(group["indptr"], group["indices"], group["data"], ctx.model,
                           fingerprint=str(group.attrs["fingerprint"]))


#: detailed balance for solve.symmetrize: max |J_ij| / max W_ij p_j below this
SYMMETRIC_DEFECT = 1e-10


def run(ctx: RunContext) -> StageOutput:
    settings = ctx.config.solve
    backend = ctx.backend
    started = time.perf_counter()
    if ctx.operator is None:
        stored = stored_generator(ctx)
        if stored is not None:
            log("solve: reading the stored generator (RUN/matrix), not the model")
            ctx.operator = backend.assemble(stored)
        else:
            log("solve: building the operator from the model (assemble results are reused)")
            ctx.operator = backend.assemble(ctx.model)
    operator = ctx.operator
    classes = _closed_classes(ctx) if operator.check.conserving else None
    if classes is not None:
        operator.irreducible = classes.count == 1
    modes = _symmetrized_modes(ctx, classes) if settings.symmetrize != "never" else None
    if modes is None:
        modes = backend.slowest_modes(
            operator,
            settings.modes,
            method=settings.method,
            tolerance=settings.tolerance,
            vectors=settings.vectors,
            dense_limit=settings.dense_limit,
            max_search=settings.max_search,
        )
    if not modes.certified:
        warn(f"{modes.certificate.get('note')}")
    if not modes.group_complete:
        log(f"note: mode {settings.modes - 1} is not the last of its group of equal real "
            "parts; raise solve.modes to keep the whole multiplicity")
    spectrum = GroupData(
        arrays={
            "eigenvalues": ArraySpec(modes.values.astype(np.complex128), ("mode",)),
            "residuals": ArraySpec(modes.residuals.astype(np.float64), ("mode",)),
        },
        attrs={
            "backend": backend.name,
            "method": modes.method,
            "certified": modes.certified,
            "certificate": modes.certificate,
            "group_complete": modes.group_complete,
            "requested_modes": settings.modes,
            "seconds": modes.seconds,
            "ordering": "decreasing real part, then increasing imaginary part",
            "residual_definition": "||W v - lambda v||_2 / ||W||_1, ||v||_2 = 1",
            "error_estimate_definition": "condition * residual * ||W||_1 (rate units)",
            **modes.info,
        },
    )
    if modes.condition is not None:
        spectrum.arrays["condition"] = ArraySpec(modes.condition.astype(np.float64), ("mode",))
        spectrum.arrays["error_estimates"] = ArraySpec(
            modes.error_estimates.astype(np.float64), ("mode",))
        worst = float(np.max(modes.error_estimates / operator.check.norm1, initial=0.0))
        if not worst <= 1e-6:
            warn(f"eigenvalue error estimates reach {worst:.1e} x ||W||_1 "
                "(ill-conditioned, non-normal generator): small residuals do not make these "
                "eigenvalues accurate")
    if modes.vectors is not None:
        spectrum.arrays["vectors"] = state_array(modes.vectors, ("state", "mode"),
                                                  modes.vector_rows, operator.n_states)
    if not operator.check.conserving and modes.values.size:
        # 1^T W v_0 = lambda_0 1^T v_0: the slowest mode (the quasi-stationary state) loses
        # probability at rate -Re lambda_0 per unit mass.
        spectrum.attrs["quasi_stationary_outflow"] = float(-modes.values[0].real)
    groups = {"spectrum": spectrum}
    several = classes is not None and int(classes.closed.sum()) > 1
    if settings.stationary and several:
        groups["stationary"] = _class_stationary(ctx, classes)
    elif settings.stationary and operator.check.conserving:
        result = backend.stationary(operator, dense_limit=settings.dense_limit)
        observed = stationary_expectations(ctx.model, result.distribution, rows=result.rows)
        groups["stationary"] = GroupData(
            arrays={"distribution": state_array(result.distribution, ("state",),
                                                 result.rows, operator.n_states),
                    **{name: ArraySpec(values, (dim,)) for name, (dim, values, _) in
                       observed.items()}},
            attrs={
                "backend": backend.name,
                "method": result.method,
                "residual": result.residual,
                "negative_mass": result.negative_mass,
                "sum": float(world().sum(float(np.sum(result.distribution)))),
                "seconds": result.seconds,
                "residual_definition": "||W p||_1 / ||W||_1, sum(p) = 1",
                "observables": {name: meaning for name, (_, _, meaning) in observed.items()},
                **result.info,
            },
        )
    elif settings.stationary:
        log("solve: W is a sub-generator (absorbing boundary): no stationary distribution")
    seconds = time.perf_counter() - started
    return StageOutput(groups, record={"seconds": seconds, "certified": modes.certified})


def _closed_classes(ctx: RunContext):
    """Communicating classes, found before solving; refuses several closed classes when the
    config asks for a single stationary law."""
    classes = ctx.backend.communicating_classes(ctx.operator)
    closed = int(classes.closed.sum())
    if closed > 1:
        log(f"solve: W has {closed} closed classes: one stationary law per class")
        if ctx.config.solve.stationary and ctx.config.solve.closed_classes == "single":
            raise SolverError(f"solve.closed_classes: W has {closed} closed classes, so the "
                              "stationary law is not unique; set solve.closed_classes = "
                              "'per-class' (or solve.stationary = false)")
    return classes


def _class_stationary(ctx: RunContext, classes) -> GroupData:
    """One stationary law per closed class, as ``class_distributions [class, state]``
    (zero outside the class) with the class label of each row. Under MPI each rank solves
    its part of every class (collectively) and writes the state chunks it owns."""
    backend, operator = ctx.backend, ctx.operator
    closed = np.flatnonzero(classes.closed)
    n = operator.n_states
    rows = backend.local_rows(operator)  # None: this process holds every state
    start, stop = rows or (0, n)
    labels = classes.labels_of(start, stop)
    laws = np.zeros((closed.size, stop - start))
    residuals, methods = [], []
    for row, label in enumerate(closed):  # a loop over closed classes
        local = np.flatnonzero(labels == label)
        result = backend.class_stationary(operator, start + local,
                                          dense_limit=ctx.config.solve.dense_limit)
        laws[row, local] = result.distribution
        residuals.append(result.residual)
        methods.append(result.method)
    return GroupData(
        arrays={"class_distributions": state_array(laws, ("class", "state"), rows, n),
                "class_labels": ArraySpec(closed.astype(np.int64), ("class",))},
        attrs={"backend": backend.name, "method": "; ".join(sorted(set(methods))),
               "closed_classes": int(closed.size), "residuals": residuals,
               "residual": float(max(residuals)),
               "residual_definition": "||W_c p_c||_1 / ||W||_1 on each closed class c"},
    )


def _symmetrized_modes(ctx: RunContext, classes):
    """The symmetrized solve when the chain is reversible (solve.symmetrize), else None."""
    settings, operator, backend = ctx.config.solve, ctx.operator, ctx.backend
    reason = None
    if not operator.check.conserving:
        reason = "W is a sub-generator"
    elif classes is not None and classes.count > 1:
        reason = "W is not irreducible"
    if reason is None:
        p = backend.stationary(operator, dense_limit=settings.dense_limit).distribution
        defect = backend.currents(operator, p).balance_defect
        if defect > SYMMETRIC_DEFECT:
            reason = f"detailed balance fails (defect {defect:.1e} > {SYMMETRIC_DEFECT:g})"
    if reason is not None:
        if settings.symmetrize == "always":
            raise SolverError(f"solve.symmetrize: 'always' needs a reversible chain but {reason};"
                              " set solve.symmetrize = 'auto' or 'never'")
        log(f"solve: not symmetrized: {reason}")
        return None
    log(f"solve: detailed balance holds (defect {defect:.1e}): symmetrized solve")
    modes = backend.symmetric_slowest_modes(operator, settings.modes,
                                            tolerance=settings.tolerance,
                                            vectors=settings.vectors,
                                            dense_limit=settings.dense_limit)
    modes.info["balance_defect"] = defect
    return modes

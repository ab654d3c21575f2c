"""Stage ``verify``: compare stored results with exact results and certificates.

Reads everything back from the store (so it also checks what users will load). Each check
names its source; the stage passes only if every check does.
"""

from __future__ import annotations

import numpy as np

from pipeline.stages.base import RunContext, StageOutput
from pipeline.store import GroupData
from pipeline.verification.analysis_checks import analysis_checks
from pipeline.verification.checks import Check, compare_multisets, spectral_gap

NAME = "verify"
CONFIG_SECTIONS = ("verify",)
UPSTREAM = "solve"
COLLECTIVE = False  # reads the store: rank 0 runs it, the others share the outcome

RESIDUAL_SOURCE = "common practice: backward error of an eigenpair, ||Wv - lv|| / ||W||"
GENERATOR_SOURCE = "definition of a generator: columns sum to 0 (<= 0 with absorption)"
ZERO_MODE_SOURCE = "a conserving generator has eigenvalue 0 (Perron-Frobenius; common practice)"
CONDITION_SOURCE = ("Wilkinson 1965, The Algebraic Eigenvalue Problem, ch. 2: error <= "
                    "condition x backward error; relative to ||W||_1")
ITERATION_SOURCE = ("a posteriori bound of a contraction, ||p - p_k||_1 <= rho/(1 - rho) "
                    "||p_k - p_(k-1)||_1 (from memory)")
CHUNK = 1 << 20


def run(ctx: RunContext) -> StageOutput:
    settings = ctx.config.verify
    store, run_name = ctx.store, ctx.run
    assembled = dict(store.group(run_name, "assemble").attrs)
    spectrum = store.group(run_name, "spectrum")
    values = spectrum["eigenvalues"][:]
    residuals = spectrum["residuals"][:]
    spectrum_attrs = dict(spectrum.attrs)
    norm1 = float(assembled["norm1"])
    conserving = bool(assembled["conserving"])
    exact = ctx.model.exact()
    checks: list[Check] = []

    defect = float(assembled["column_sum_defect"]) / max(norm1, 1e-300)
    checks.append(Check("generator.conservation", GENERATOR_SOURCE, defect, 0.0, 1e-12,
                        defect <= 1e-12))
    max_residual = float(residuals.max(initial=0.0))
    checks.append(Check("spectrum.residuals", RESIDUAL_SOURCE, max_residual, 0.0,
                        settings.residual_tolerance, max_residual <= settings.residual_tolerance))
    if "error_estimates" in spectrum:
        estimates = spectrum["error_estimates"][:]
        worst = float(np.max(estimates, initial=0.0)) / norm1
        checks.append(Check("spectrum.error_estimates", CONDITION_SOURCE, worst, 0.0,
                            settings.tolerance, worst <= settings.tolerance))
    if conserving and values.size:
        zero = abs(complex(values[0])) / norm1
        checks.append(Check("spectrum.stationary_mode", ZERO_MODE_SOURCE, zero, 0.0,
                            settings.tolerance, zero <= settings.tolerance))

    exact_values = exact.slowest_eigenvalues(values.size) if exact is not None else None
    certified = bool(spectrum_attrs.get("certified"))
    if exact_values is not None:
        source = "; ".join(exact.spectrum_sources)
        # Exact values tied with the last one finish its group and may stay unmatched; no
        # other may. Ties to 1e-8 ||W||_1, which bounds the ordering tolerance (README:
        # max(1e-8 spread, 1e-12 ||W||_1), real parts lie in [-||W||_1, 0]), or to the
        # matching tolerance.
        tie = max(1e-8 * norm1, settings.tolerance * norm1)
        distance = compare_multisets(values, exact_values, tie) / norm1
        checks.append(Check("spectrum.slowest_set", source, distance, 0.0, settings.tolerance,
                            distance <= settings.tolerance))
        gap = spectral_gap(values, conserving)
        exact_gap = spectral_gap(exact_values, conserving)
        if gap is not None and exact_gap is not None and exact_gap > 0:
            relative = abs(gap - exact_gap) / exact_gap
            checks.append(Check("spectrum.gap", source, gap, exact_gap, settings.gap_tolerance,
                                relative <= settings.gap_tolerance))
        matched = distance <= settings.tolerance
        checks.append(Check(
            "spectrum.completeness",
            "certificate of the solver; here also the exact spectrum",
            spectrum_attrs.get("certificate", {}).get("kind"),
            "certified or equal to the exact slowest set",
            None,
            certified or matched,
        ))
    else:
        known_gap = exact.gap() if exact is not None and hasattr(exact, "gap") else None
        gap = spectral_gap(values, conserving)
        if known_gap is not None and gap is not None and known_gap > 0:
            # Only the gap is known exactly (not the rest of the slowest set).
            relative = abs(gap - known_gap) / known_gap
            checks.append(Check("spectrum.gap", "; ".join(exact.spectrum_sources), gap,
                                known_gap, settings.gap_tolerance,
                                relative <= settings.gap_tolerance))
        checks.append(Check(
            "spectrum.completeness",
            "certificate of the solver (no exact spectrum for this model)",
            spectrum_attrs.get("certificate", {}).get("kind"),
            "certified",
            None,
            certified,
        ))

    stationary = store.group(run_name, "stationary", required=False)
    if stationary is not None and "class_distributions" in stationary:
        residual = float(stationary.attrs["residual"])
        checks.append(Check("stationary.class_residuals",
                            "common practice: ||W_c p_c||_1 / ||W||_1 per closed class",
                            residual, 0.0, settings.residual_tolerance,
                            residual <= settings.residual_tolerance))
        stationary = None
    if stationary is not None:
        attrs = dict(stationary.attrs)
        residual = float(attrs["residual"])
        checks.append(Check("stationary.residual", "common practice: ||W p||_1 / ||W||_1",
                            residual, 0.0, settings.residual_tolerance,
                            residual <= settings.residual_tolerance))
        if "error_estimate" in attrs:  # an iterative solve: how far it may be from converged
            estimate = float(attrs["error_estimate"])
            checks.append(Check("stationary.convergence", ITERATION_SOURCE, estimate, 0.0,
                                settings.tolerance, estimate <= settings.tolerance))
        distribution = stationary["distribution"]
        total, minimum = _sum_and_min(distribution)
        checks.append(Check("stationary.normalization", "a probability sums to 1",
                            total, 1.0, 1e-12, abs(total - 1.0) <= 1e-12))
        negative = float(attrs.get("negative_mass", 0.0))
        checks.append(Check("stationary.negative_mass",
                            "a probability is >= 0 (mass clipped from rounding noise)",
                            negative, 0.0, settings.tolerance,
                            negative <= settings.tolerance and minimum >= 0))
        if exact is not None and exact.has_stationary:
            difference = _l1_difference(distribution, exact)
            source = "; ".join(exact.stationary_sources)
            checks.append(Check("stationary.exact", source, difference, 0.0, settings.tolerance,
                                difference <= settings.tolerance))
        known = exact.observables() if exact is not None and hasattr(exact, "observables") else {}
        for name, reference in known.items():
            if name not in stationary:
                continue
            stored = stationary[name][:]
            difference = float(np.abs(stored - reference).max(initial=0.0)) / norm1
            checks.append(Check(f"stationary.{name}", "; ".join(exact.observable_sources),
                                difference, 0.0, settings.tolerance,
                                difference <= settings.tolerance))
    checks.extend(analysis_checks(store, run_name, settings))
    passed = all(check.passed for check in checks)
    group = GroupData(attrs={"passed": passed, "checks": [c.as_dict() for c in checks],
                             "norm1": norm1})
    return StageOutput({"verify": group}, record={"passed": passed}, passed=passed)


def _sum_and_min(distribution) -> tuple[float, float]:
    total, minimum = 0.0, np.inf
    for start in range(0, distribution.shape[0], CHUNK):
        piece = distribution[start : start + CHUNK]
        total += float(np.sum(piece))
        minimum = min(minimum, float(piece.min(initial=np.inf)))
    return total, minimum


def _l1_difference(distribution, exact) -> float:
    """``sum_x |p(x) - p_exact(x)|``, streamed over chunks of states."""
    total = 0.0
    for start in range(0, distribution.shape[0], CHUNK):
        stop = min(start + CHUNK, distribution.shape[0])
        total += float(np.abs(distribution[start:stop] - exact.stationary(start, stop)).sum())
    return total

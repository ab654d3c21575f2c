"""Checks of the ``analyze`` and ``evolve`` results (read back from the store by verify)."""

from __future__ import annotations

from typing import Any

from pipeline.verification.checks import Check

__all__ = ["analysis_checks"]

BACKWARD_SOURCE = ("Norris 1997, Markov Chains, thm. 3.3.1/3.3.3: W^T tau = -1, W^T pi_e = -r_e;"
                   " relative residual (common practice)")
SPLITTING_SOURCE = "absorption is certain from a transient state: sum_e pi_e = 1 (Norris 1997)"
QSD_SOURCE = ("Darroch and Seneta 1967, J. Appl. Prob. 4, 192: from the quasi-stationary law "
              "the absorption time is exponential with the escape rate, mean 1 / rate")
ENTROPY_SOURCE = "Schnakenberg 1976, Rev. Mod. Phys. 48, 571: entropy production >= 0"
CONSERVATION_SOURCE = "exp(tW) of a generator conserves probability and positivity"


def analysis_checks(store: Any, run: str, settings: Any) -> list[Check]:
    checks: list[Check] = []
    analysis = store.group(run, "analysis", required=False)
    if analysis is not None:
        attrs = dict(analysis.attrs)
        absorption = attrs.get("absorption")
        if absorption:
            residual = float(absorption["mean_time_residual"])
            checks.append(Check("absorption.mean_time_residual", BACKWARD_SOURCE, residual,
                                0.0, settings.residual_tolerance,
                                residual <= settings.residual_tolerance))
            if "splitting_sum_defect" in absorption:
                defect = float(absorption["splitting_sum_defect"])
                checks.append(Check("absorption.splitting_sum", SPLITTING_SOURCE, defect, 0.0,
                                    settings.residual_tolerance,
                                    defect <= settings.residual_tolerance))
            if "quasi_stationary_time_defect" in absorption:
                defect = float(absorption["quasi_stationary_time_defect"])
                checks.append(Check("absorption.quasi_stationary_time", QSD_SOURCE, defect, 0.0,
                                    settings.gap_tolerance, defect <= settings.gap_tolerance))
        currents = attrs.get("currents", {})
        if currents.get("computed"):
            entropy = float(currents["entropy_production"])
            floor = -settings.tolerance * float(attrs.get("norm1", 1.0))
            checks.append(Check("currents.entropy_production_sign", ENTROPY_SOURCE, entropy,
                                0.0, settings.tolerance, entropy >= floor))
    evolution = store.group(run, "evolution", required=False)
    if evolution is not None and evolution.attrs.get("requested"):
        defect = float(evolution.attrs["conservation_defect"])
        negative = float(evolution.attrs["negative_mass"])
        worst = max(defect, negative)
        checks.append(Check("evolution.conservation", CONSERVATION_SOURCE, worst, 0.0,
                            settings.tolerance, worst <= settings.tolerance))
    return checks

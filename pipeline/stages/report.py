"""Stage ``report``: a short summary table of a run, built from the store.

:func:`summarize` is also what ``gapline show STORE RUN`` prints.
"""

from __future__ import annotations

import math
from pathlib import Path

from pipeline.stages.base import RunContext, StageOutput
from pipeline.store import GroupData, Store
from pipeline.verification.checks import spectral_gap

NAME = "report"
CONFIG_SECTIONS: tuple[str, ...] = ()
UPSTREAM = "verify"
COLLECTIVE = False  # reads the store: rank 0 runs it, the others share the outcome
SHOWN_MODES = 12


def run(ctx: RunContext) -> StageOutput:
    text = summarize(ctx.store, ctx.run)
    print(text, flush=True)
    return StageOutput({"report": GroupData(attrs={"summary": text})})


def summarize(store: Store, run: str) -> str:
    attrs = store.run_attrs(run)
    model = attrs.get("model", {})
    lines = [f"run {run}: {model_line(model)}"]
    assembled = store.group(run, "assemble", required=False)
    if assembled is not None:
        a = assembled.attrs
        lines.append(f"  states {a['n_states']}, nonzeros {a['nnz']}, ||W||_1 = "
                     f"{a['norm1']:.6g}, {'conserving' if a['conserving'] else 'sub-generator'}")
        for note in a.get("warnings", []):
            lines.append(f"  warning: {note}")
    spectrum = store.group(run, "spectrum", required=False)
    if spectrum is None:
        lines.append("  spectrum: not computed (or interrupted)")
        return "\n".join(lines)
    s = dict(spectrum.attrs)
    values = spectrum["eigenvalues"][:]
    residuals = spectrum["residuals"][:]
    lines.append(f"  backend {s['backend']}: {s['method']}")
    lines.append("  completeness: " + ("certified" if s["certified"] else "NOT certified")
                 + f" ({s['certificate'].get('note', '')})")
    conserving = bool(assembled.attrs["conserving"]) if assembled is not None else True
    gap = spectral_gap(values, conserving)
    if gap is not None:
        label = "spectral gap" if conserving else "decay rate"
        relaxation = 1.0 / gap if gap > 0 else math.inf
        lines.append(f"  {label} {gap:.10g}   relaxation time {relaxation:.6g}")
    lines.append("   mode          Re(lambda)          Im(lambda)    residual")
    for index in range(min(values.size, SHOWN_MODES)):
        value = values[index]
        lines.append(f"  {index:5d}  {value.real:18.10e}  {value.imag:18.10e}  "
                     f"{residuals[index]:10.2e}")
    if values.size > SHOWN_MODES:
        lines.append(f"  ... {values.size - SHOWN_MODES} more modes in the store")
    stationary = store.group(run, "stationary", required=False)
    if stationary is not None:
        st = stationary.attrs
        lines.append(f"  stationary: residual {st['residual']:.2e}, {st['method']}")
    lines.extend(analysis_lines(store, run))
    verify = store.group(run, "verify", required=False)
    if verify is not None:
        checks = verify.attrs["checks"]
        passed = sum(1 for c in checks if c["passed"])
        verdict = "PASSED" if verify.attrs["passed"] else "FAILED"
        lines.append(f"  verify: {verdict} ({passed}/{len(checks)} checks)")
        for check in checks:
            mark = "ok " if check["passed"] else "BAD"
            lines.append(f"    {mark} {check['name']:<26} {_number(check['value']):>12} "
                         f"(reference {_number(check['reference'])}, tolerance "
                         f"{_number(check['tolerance'])})")
    return "\n".join(lines)


def analysis_lines(store: Store, run: str) -> list[str]:
    """Relaxation, classes, currents, absorption and evolution lines of ``gapline show``."""
    lines: list[str] = []
    analysis = store.group(run, "analysis", required=False)
    if analysis is not None:
        a = dict(analysis.attrs)
        r = a.get("relaxation", {})
        if r.get("gap") is not None:
            period = (f"oscillation period {_number(r['period'])}" if r.get("period")
                      else "slowest mode real")
            resolved = {True: "resolved", False: "NOT resolved", None: "no next mode"}[
                r.get("resolved")]
            lines.append(f"  relaxation: gap {r['gap']:.10g}, relaxation time "
                         f"{_number(r['relaxation_time'])}, {period}, separation to the next "
                         f"mode {_number(r.get('separation'))} ({resolved})")
        c = a.get("classes", {})
        lines.append(f"  classes: {c.get('count')} communicating, {c.get('closed')} closed, "
                     f"{c.get('transient_states')} transient states")
        currents = a.get("currents", {})
        if currents.get("computed"):
            values = analysis["channel_current"][:]
            shown = ", ".join(f"{name} {value:.6g}"
                              for name, value in zip(currents["channels"], values, strict=False))
            lines.append(f"  currents per channel: {shown}")
            if "drift" in currents:
                lines.append("  drift per axis: "
                             + ", ".join(f"{v:.6g}" for v in currents["drift"]))
            verdict = "holds" if currents["detailed_balance"] else "fails"
            entropy = _precise(currents["entropy_production"])
            lines.append(f"  entropy production {entropy} per unit "
                         f"time; detailed balance {verdict} (defect "
                         f"{currents['balance_defect']:.2e})")
        for entry in currents.get("per_class", []):
            verdict = "holds" if entry["detailed_balance"] else "fails"
            lines.append(f"  closed class {entry['class']}: entropy production "
                         f"{_precise(entry['entropy_production'])}; detailed balance {verdict}")
        absorption = a.get("absorption")
        if absorption:
            lines.append(f"  absorption: escape rate {_number(absorption['escape_rate'])}, "
                         "mean time from the quasi-stationary law "
                         f"{absorption['mean_time_from_quasi_stationary']:.6g}")
            if "mean_time_from_start" in absorption:
                lines.append(f"    from state {absorption['start_state']}: mean time "
                             f"{absorption['mean_time_from_start']:.6g}")
            if "splitting_from_start" in absorption:
                lines.append("    exit probabilities: " + ", ".join(
                    f"{name} {value:.4g}" for name, value in
                    zip(absorption["exits"], absorption["splitting_from_start"], strict=False)))
    evolution = store.group(run, "evolution", required=False)
    if evolution is not None and evolution.attrs.get("requested"):
        e = dict(evolution.attrs)
        times = evolution["time"][:]
        lines.append(f"  evolution from {e['start']}: {times.size} times up to "
                     f"{times[-1]:.6g}, conservation defect {e['conservation_defect']:.1e}")
    return lines


def model_line(model: dict) -> str:
    if model.get("model") == "lattice":
        shape = "x".join(str(s) for s in model.get("shape", []))
        kinds = ", ".join(model.get("boundary", []))
        extra = " with disorder" if model.get("disorder") else ""
        return f"lattice {shape} ({kinds}){extra}"
    kind = model.get("model")
    if kind == "exclusion":
        if model.get("boundary") == "periodic":
            return f"exclusion ring L={model.get('sites')} N={model.get('particles')}"
        return f"exclusion segment L={model.get('sites')}"
    if kind == "reactions":
        return f"reactions {'+'.join(model.get('species', []))} bounds {model.get('bounds')}"
    if kind in ("network", "matrix"):
        return f"{kind} {Path(str(model.get('file', '?'))).name}"
    return str(kind or "?")


def _precise(value) -> str:
    """10 significant digits; stored infinities ("inf": a transition without its reverse
    makes the entropy production infinite) are shown as they are."""
    return f"{value:.10g}" if isinstance(value, int | float) else str(value)


def _number(value) -> str:
    if value is None:
        return "-"
    if isinstance(value, bool) or isinstance(value, str):
        return str(value)
    if isinstance(value, int | float):
        return f"{value:.3g}"
    return str(value)

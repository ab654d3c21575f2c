"""Figures of stored results (matplotlib, Agg): PNG files plus one HTML page.

``gapline report STORE [RUN|SWEEP]`` draws, for a run: the computed modes in the complex
plane with the exact ones overlaid when the model knows them; the stationary distribution
as a profile (1D lattice, or states in order) or a heat map (2D; the marginal of the first
two axes in higher dimensions); the density profile when an ``analyze`` stage stored one.
For a collected sweep: the gap against size on log-log axes with the fitted exponent.
Rates are in 1/time, times in the model's time unit (the inverse of its rate unit).
"""

from __future__ import annotations

import html
import json
import math
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import StoreError
from pipeline.store import Store
from pipeline.sweep import SWEEPS_GROUP
from pipeline.verification.checks import spectral_gap

__all__ = ["write_report"]

MAX_PLOTTED_STATES = 1 << 22  # larger stationary vectors are not drawn
FIGURE_SIZE = (6.4, 4.8)
DPI = 110


def _pyplot():
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    plt.rcParams.update({"font.size": 11, "axes.titlesize": 11, "axes.grid": True,
                         "grid.alpha": 0.3})
    return plt


def _exact_modes(attrs: dict[str, Any], count: int) -> tuple[np.ndarray, str] | None:
    """Exact slowest eigenvalues of the run's model (from its stored config), or None."""
    from pipeline.config import parse_config
    from pipeline.errors import GaplineError
    from pipeline.models import build_model

    try:
        config = parse_config(attrs["config"])
        exact = build_model(config.model).exact()
    except (GaplineError, KeyError, TypeError):
        return None
    if exact is None:
        return None
    values = exact.slowest_eigenvalues(count)
    if values is None:
        return None
    return np.asarray(values)[:count], "; ".join(exact.spectrum_sources)


def _modes_figure(store: Store, run: str, attrs: dict[str, Any], out: Path) -> dict | None:
    spectrum = store.group(run, "spectrum", required=False)
    if spectrum is None:
        return None
    plt = _pyplot()
    values = spectrum["eigenvalues"][:]
    s = dict(spectrum.attrs)
    fig, ax = plt.subplots(figsize=FIGURE_SIZE, dpi=DPI)
    ax.scatter(values.real, values.imag, s=46, facecolors="none", edgecolors="tab:blue",
               linewidths=1.6, label=f"computed ({s['backend']}, {s['method']})", zorder=3)
    exact = _exact_modes(attrs, values.size)
    caption = f"{values.size} slowest modes"
    if exact is not None:
        reference, source = exact
        ax.scatter(reference.real, reference.imag, s=12, color="tab:red", marker="x",
                   label="exact", zorder=4)
        caption += f"; exact modes from: {source}"
    ax.axvline(0.0, color="0.4", linewidth=0.8)
    ax.axhline(0.0, color="0.4", linewidth=0.8)
    ax.set_xlabel("Re λ (1/time)")
    ax.set_ylabel("Im λ (1/time)")
    ax.set_title(f"{run}: slowest modes" + ("" if s.get("certified") else " (NOT certified)"))
    reach = float(np.max(np.abs(values.imag), initial=0.0))
    if reach > 0:
        ax.set_ylim(-1.15 * reach, 1.15 * reach)
    ax.margins(x=0.08)
    ax.legend(loc="upper center", bbox_to_anchor=(0.5, -0.13), ncol=2, fontsize=9,
              frameon=False)
    fig.tight_layout()
    path = out / f"{run}-modes.png"
    fig.savefig(path)
    plt.close(fig)
    return {"file": path.name, "caption": caption}


def _stationary_figure(store: Store, run: str, attrs: dict[str, Any], out: Path) -> dict | None:
    group = store.group(run, "stationary", required=False)
    if group is None or group["distribution"].shape[0] > MAX_PLOTTED_STATES:
        return None
    plt = _pyplot()
    p = group["distribution"][:]
    model = attrs.get("model", {})
    shape = tuple(int(v) for v in model.get("shape", [])) or (p.size,)
    if math.prod(shape) != p.size:
        shape = (p.size,)
    fig, ax = plt.subplots(figsize=FIGURE_SIZE, dpi=DPI)
    if len(shape) == 1:
        sites = np.arange(p.size)
        ax.plot(sites, p, color="tab:blue", linewidth=1.4)
        if p.size <= 64:
            ax.plot(sites, p, "o", color="tab:blue", markersize=3)
        ax.set_xlabel("site x" if model.get("shape") else "state index")
        ax.set_ylabel("stationary probability p(x)")
        ax.set_ylim(bottom=0, top=max(float(p.max()) * 1.15, 1e-300))
        caption = "stationary distribution (profile)"
    else:
        grid = p.reshape(shape)
        if len(shape) > 2:
            grid = grid.sum(axis=tuple(range(2, len(shape))))
        image = ax.imshow(grid, origin="lower", aspect="auto", cmap="viridis",
                          interpolation="nearest")
        ax.set_xlabel("site along axis 1")
        ax.set_ylabel("site along axis 0")
        label = "p(x0, x1)" if len(shape) == 2 else "marginal p(x0, x1)"
        fig.colorbar(image, ax=ax, label=f"stationary probability {label}")
        ax.grid(False)
        caption = ("stationary distribution (heat map" +
                   (")" if len(shape) == 2 else f", summed over axes 2..{len(shape) - 1})"))
    ax.set_title(f"{run}: stationary distribution (residual {group.attrs['residual']:.1e})")
    fig.tight_layout()
    path = out / f"{run}-stationary.png"
    fig.savefig(path)
    plt.close(fig)
    return {"file": path.name, "caption": caption}


def _density_figure(store: Store, run: str, out: Path) -> dict | None:
    """Density profile of an exclusion model, when the analyze stage stored one."""
    group = store.group(run, "analyze", required=False)
    if group is None:
        return None
    name = next((key for key, _ in group.arrays() if "density" in key), None)
    if name is None or group[name].ndim != 1:
        return None
    plt = _pyplot()
    density = group[name][:]
    fig, ax = plt.subplots(figsize=FIGURE_SIZE, dpi=DPI)
    ax.plot(np.arange(density.size), density, "o-", color="tab:green", markersize=3)
    ax.set_xlabel("site")
    ax.set_ylabel("mean occupation (particles per site)")
    ax.set_ylim(0, max(1.0, float(np.nanmax(density)) * 1.1))
    ax.set_title(f"{run}: stationary density profile")
    fig.tight_layout()
    path = out / f"{run}-density.png"
    fig.savefig(path)
    plt.close(fig)
    return {"file": path.name, "caption": f"density profile ({name}, analyze stage)"}


def _gap_figure(dataset, sweep: str, out: Path) -> dict | None:
    if "size" not in dataset.coords:
        return None
    plt = _pyplot()
    sizes = np.asarray(dataset["size"].values, dtype=float)
    gaps = np.asarray(dataset["gap"].values, dtype=float)
    good = np.isfinite(gaps) & (gaps > 0)
    if good.sum() < 2:
        return None
    fig, ax = plt.subplots(figsize=FIGURE_SIZE, dpi=DPI)
    ax.loglog(sizes[good], gaps[good], "o", color="tab:blue", markersize=7,
              label="computed gap")
    caption = "spectral gap against system size"
    fits = dataset.attrs.get("gap_fit")
    fit = fits[0] if isinstance(fits, list) and fits else fits
    if isinstance(fit, dict):
        line = np.geomspace(fit["fit_range"][0], fit["fit_range"][1], 100)
        ax.loglog(line, fit["amplitude"] * line ** (-fit["z"]), "-", color="tab:red",
                  label=f"fit: gap ∝ L^(-z), z = {fit['z']:.4f} ± {fit['z_stderr']:.1g}")
        caption += (f"; least squares on log-log, sizes {fit['fit_range'][0]:g}.."
                    f"{fit['fit_range'][1]:g}, z = {fit['z']:.5f} ± {fit['z_stderr']:.2g} "
                    "(standard error)")
    from matplotlib.ticker import NullFormatter, NullLocator, ScalarFormatter

    ax.xaxis.set_minor_locator(NullLocator())
    ax.xaxis.set_minor_formatter(NullFormatter())
    ax.set_xticks(np.unique(sizes[good]))
    ax.xaxis.set_major_formatter(ScalarFormatter())
    ax.set_xlabel("system size L (sites)")
    ax.set_ylabel("spectral gap (1/time)")
    ax.set_title(f"sweep {sweep}: gap against size")
    ax.legend(loc="best", fontsize=9)
    ax.grid(True, which="both", alpha=0.3)
    fig.tight_layout()
    path = out / f"{sweep}-gap-vs-size.png"
    fig.savefig(path)
    plt.close(fig)
    return {"file": path.name, "caption": caption}


def _run_section(store: Store, run: str, out: Path) -> dict:
    attrs = store.run_attrs(run)
    figures = [f for f in (_modes_figure(store, run, attrs, out),
                           _stationary_figure(store, run, attrs, out),
                           _density_figure(store, run, out)) if f is not None]
    from pipeline.stages.report import model_line

    rows = [("model", model_line(attrs.get("model", {}))),
            ("states", attrs.get("model", {}).get("n_states", "?"))]
    spectrum = store.group(run, "spectrum", required=False)
    if spectrum is not None:
        conserving = bool(attrs.get("model", {}).get("conserving", True))
        gap = spectral_gap(spectrum["eigenvalues"][:], conserving)
        if gap is not None:
            rows.append(("spectral gap (1/time)" if conserving else "decay rate (1/time)",
                         f"{gap:.10g}"))
            rows.append(("relaxation time (time)", f"{1 / gap:.6g}" if gap > 0 else "inf"))
        rows.append(("certified", "yes" if spectrum.attrs["certified"] else "NO"))
    verify = store.group(run, "verify", required=False)
    if verify is not None:
        rows.append(("verify", "passed" if verify.attrs["passed"] else "FAILED"))
    return {"title": f"run {run}", "rows": rows, "figures": figures}


def _sweep_section(store: Store, sweep: str, out: Path) -> dict:
    import xarray as xr

    dataset = xr.open_zarr(str(store.path), group=f"{SWEEPS_GROUP}/{sweep}/collected",
                           consolidated=False)
    figures = [f for f in (_gap_figure(dataset, sweep, out),) if f is not None]
    rows = [("tasks", f"{dataset.attrs['complete']} of {dataset.attrs['tasks']} complete"),
            ("swept", ", ".join(dataset.attrs["parameters"]))]
    for key in ("gap_fit", "gap_fit_corrected"):
        fit = dataset.attrs.get(key)
        for item in fit if isinstance(fit, list) else ([fit] if fit else []):
            rows.append((key, f"z = {item['z']:.6f} ± {item['z_stderr']:.2g}, sizes "
                              f"{item['fit_range'][0]:g}..{item['fit_range'][1]:g}"))
    return {"title": f"sweep {sweep}", "rows": rows, "figures": figures}


def _collected_sweeps(store: Store) -> list[str]:
    base = store.path / SWEEPS_GROUP
    if not base.is_dir():
        return []
    return sorted(p.name for p in base.iterdir() if (p / "collected" / "zarr.json").exists())


def write_report(store_path: str, name: str | None = None, out: str | None = None) -> Path:
    """Draw the figures of ``name`` (a run, a collected sweep, or everything) into ``out``
    (default ``STORE.report/NAME``) and write ``index.html`` there; returns its path."""
    store = Store(store_path)
    sweeps = _collected_sweeps(store)
    if name is None:
        runs, chosen = store.runs(), sweeps
    elif name in sweeps:
        runs, chosen = [], [name]
    elif store.has_run(name):
        runs, chosen = [name], []
    else:
        raise StoreError(f"{name!r}: neither a run nor a collected sweep of "
                         f"{str(store.path)!r}; runs: {', '.join(store.runs()) or 'none'}; "
                         f"collected sweeps: {', '.join(sweeps) or 'none'} ('gapline collect')")
    folder = Path(out) if out else Path(f"{store.path}.report") / (name or "all")
    folder.mkdir(parents=True, exist_ok=True)
    sections = [_sweep_section(store, s, folder) for s in chosen]
    sections += [_run_section(store, r, folder) for r in runs]
    page = folder / "index.html"
    page.write_text(_html(str(store.path), sections), encoding="utf-8")
    return page


def _html(store: str, sections: list[dict]) -> str:
    parts = ["<!DOCTYPE html>", "<html lang=\"en\"><head><meta charset=\"utf-8\">",
             f"<title>gapline report: {html.escape(store)}</title>",
             "<style>body{font-family:sans-serif;max-width:72em;margin:2em auto;}"
             "table{border-collapse:collapse;margin:.5em 0}td{padding:.2em .8em;"
             "border-bottom:1px solid #ddd}figure{display:inline-block;margin:.5em}"
             "figcaption{max-width:40em;font-size:90%}</style></head><body>",
             f"<h1>gapline report: {html.escape(store)}</h1>",
             "<p>Rates (eigenvalues, gaps) in 1/time; times in the model's time unit.</p>"]
    for section in sections:
        parts.append(f"<h2>{html.escape(section['title'])}</h2><table>")
        for key, value in section["rows"]:
            text = value if isinstance(value, str) else json.dumps(value)
            parts.append(f"<tr><td>{html.escape(str(key))}</td><td>{html.escape(text)}</td></tr>")
        parts.append("</table>")
        for figure in section["figures"]:
            parts.append(f"<figure><img src=\"{html.escape(figure['file'])}\" alt=\""
                         f"{html.escape(figure['caption'])}\"><figcaption>"
                         f"{html.escape(figure['caption'])}</figcaption></figure>")
    parts.append("</body></html>")
    return "\n".join(parts) + "\n"

"""Collect a sweep into one xarray dataset, with the power-law fit of the gap against size.

The dataset (``STORE/_sweeps/SWEEP/collected``, read with ``xr.open_zarr(STORE,
group="_sweeps/SWEEP/collected", consolidated=False)``) has one row per task:

* coordinates ``task`` (index), ``run`` (run name), one per swept field (named by its path,
  e.g. ``model.size``; list values as text) and ``size`` (the linear size, when a size field
  is swept);
* ``eigenvalues``, ``residuals`` ``[task, mode]`` (NaN past a task's mode count or for a task
  without results), ``gap``, ``relaxation_time``, ``n_states``, ``certified``, ``status``
  (``complete``: every stage committed whole; ``failed``; ``incomplete``
  (interrupted) or ``missing``), ``verified``;
* every scalar current the ``analyze`` stage stored (attributes or 0-d arrays whose name
  holds ``current``), when that stage ran.

Attributes: ``sweep``, ``parameters`` and, when a size is swept, ``gap_fit`` (plain power
law) and ``gap_fit_corrected`` (with the leading ``L^-2`` correction), each with ``z``,
``z_stderr`` and ``fit_range`` (see :mod:`pipeline.fit`). Only complete, current tasks with
a positive gap enter the fits and the numeric columns; the others keep their status.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import uuid
from dataclasses import dataclass
from typing import Any

import numpy as np

from pipeline.errors import GaplineError, StoreError
from pipeline.fit import fit_power_law
from pipeline.store import STAGING, Store, run_name_problem
from pipeline.sweep import SWEEPS_GROUP
from pipeline.verification.checks import spectral_gap

__all__ = ["CORRECTION_OMEGA", "Collection", "collect_sweep", "describe_collection"]

#: exponent of the finite-size correction in the corrected fit: the ring and chain gaps are
#: analytic in 1/L^2 (2(1 - cos(2 pi/L)) = (2 pi/L)^2 (1 - (2 pi/L)^2/12 + ...)).
CORRECTION_OMEGA = 2.0
SIZE_FIELDS = re.compile(r"^model\.(size|sites|length)(\[\d+\])?$")


@dataclass
class Collection:
    sweep: str
    path: str  # group of the dataset in the store
    dataset: Any  # xarray.Dataset


def _sweep_runs(store: Store, sweep: str) -> list[dict[str, Any]]:
    """The tasks of ``sweep``: the driver's task list when recorded, else the runs whose
    ``sweep`` attribute names it (tasks run by batch arrays)."""
    import zarr

    location = store.path / SWEEPS_GROUP / sweep
    tasks: dict[int, dict[str, Any]] = {}
    if (location / "zarr.json").exists():
        group = zarr.open_group(str(location), mode="r", zarr_format=3)
        for task in group.attrs.get("tasks", []):
            tasks[int(task["index"])] = dict(task)
    for run in store.runs():
        info = store.run_attrs(run).get("sweep")
        if isinstance(info, dict) and info.get("name") == sweep:
            tasks.setdefault(int(info["index"]), {"index": int(info["index"]), "run": run,
                                                  "parameters": info.get("parameters", {})})
    if not tasks:
        known = sorted({(store.run_attrs(r).get("sweep") or {}).get("name") for r in
                        store.runs()} - {None})
        raise StoreError(f"sweep {sweep!r}: no tasks in store {str(store.path)!r}; sweeps: "
                         + (", ".join(known) or "none") + " (run 'gapline sweep CONFIG')")
    return [tasks[index] for index in sorted(tasks)]


def _status(store: Store, run: str) -> str:
    """'complete' when every stage is committed with complete groups (the stages decide, not
    the task's label: a task killed after its last commit is complete); otherwise
    'failed' (with an error in the run's sweep attribute), 'incomplete' or 'missing'."""
    from pipeline.stages import STAGE_NAMES

    if not store.has_run(run):
        return "missing"
    attrs = store.run_attrs(run)
    stages = attrs.get("stages", {})
    whole = all(name in stages for name in STAGE_NAMES) and all(
        store.group_status(run, group) == "complete"
        for record in stages.values() for group in record.get("groups", []))
    if whole:
        return "complete"
    label = (attrs.get("sweep") or {}).get("status")
    return "failed" if label == "failed" else "incomplete"


def _linear_size(key: str, value: Any) -> float | None:
    if not SIZE_FIELDS.match(key):
        return None
    if isinstance(value, list):
        if value and all(isinstance(v, int) for v in value) and len(set(value)) == 1:
            return float(value[0])
        return None
    return float(value) if isinstance(value, int | float) else None


def _scalar_currents(store: Store, run: str) -> dict[str, float]:
    group = store.group(run, "analyze", required=False)
    if group is None:
        return {}
    found: dict[str, float] = {}
    for key, value in dict(group.attrs).items():
        if "current" in key and isinstance(value, int | float) and not isinstance(value, bool):
            found[key] = float(value)
    for key, array in group.arrays():
        if "current" in key and array.ndim == 0 and np.isrealobj(array[()]):
            found[key] = float(array[()])
    return found


def collect_sweep(store_path: str, sweep: str) -> Collection:
    """Build the sweep's dataset, fit the gap against size, write it into the store."""
    import xarray as xr

    if run_name_problem(sweep) is not None:
        raise GaplineError(f"SWEEP {sweep!r}: not a sweep name; see 'gapline show STORE'")
    store = Store(store_path)
    tasks = _sweep_runs(store, sweep)
    parameters = list(tasks[0]["parameters"])
    rows = []
    for task in tasks:
        run = task["run"]
        status = _status(store, run)
        row: dict[str, Any] = {"run": run, "status": status, "values": np.empty(0, complex),
                               "residuals": np.empty(0), "gap": np.nan, "n_states": -1,
                               "certified": False, "verified": "-", "currents": {}}
        if status == "complete":
            attrs = store.run_attrs(run)
            spectrum = store.group(run, "spectrum")
            conserving = bool(attrs.get("model", {}).get("conserving", True))
            row["values"] = spectrum["eigenvalues"][:]
            row["residuals"] = spectrum["residuals"][:]
            gap = spectral_gap(row["values"], conserving)
            row["gap"] = np.nan if gap is None else float(gap)
            row["n_states"] = int(attrs.get("model", {}).get("n_states", -1))
            row["certified"] = bool(spectrum.attrs.get("certified"))
            verify = store.group(run, "verify", required=False)
            if verify is not None:
                row["verified"] = "passed" if verify.attrs["passed"] else "FAILED"
            row["currents"] = _scalar_currents(store, run)
        rows.append(row)
    modes = max((row["values"].size for row in rows), default=0)
    eigenvalues = np.full((len(rows), modes), np.nan + 1j * np.nan)
    residuals = np.full((len(rows), modes), np.nan)
    for i, row in enumerate(rows):
        eigenvalues[i, : row["values"].size] = row["values"]
        residuals[i, : row["residuals"].size] = row["residuals"]
    gaps = np.array([row["gap"] for row in rows], dtype=float)
    with np.errstate(divide="ignore"):
        relaxation = np.where(gaps > 0, 1.0 / gaps, np.nan)
    coords: dict[str, Any] = {"task": [t["index"] for t in tasks],
                              "run": ("task", np.array([t["run"] for t in tasks], dtype=object))}
    sizes = None
    for key in parameters:
        values = [t["parameters"].get(key) for t in tasks]
        if all(isinstance(v, int | float | str) and not isinstance(v, bool) for v in values):
            coords[key] = ("task", values)
        else:
            coords[key] = ("task", [json.dumps(v) for v in values])
        linear = [_linear_size(key, v) for v in values]
        if sizes is None and all(v is not None for v in linear):
            sizes = np.array(linear, dtype=float)
    if sizes is not None:
        coords["size"] = ("task", sizes)
    data_vars: dict[str, Any] = {
        "eigenvalues": (("task", "mode"), eigenvalues,
                        {"units": "1/time", "ordering": "slowest first"}),
        "residuals": (("task", "mode"), residuals, {"definition": "||W v - l v|| / ||W||_1"}),
        "gap": ("task", gaps, {"units": "1/time",
                               "definition": "-Re l_1 (conserving) or -Re l_0 (decay rate)"}),
        "relaxation_time": ("task", relaxation, {"units": "time", "definition": "1 / gap"}),
        "n_states": ("task", np.array([row["n_states"] for row in rows], dtype=np.int64)),
        "certified": ("task", np.array([row["certified"] for row in rows], dtype=bool)),
        "status": ("task", np.array([row["status"] for row in rows], dtype=object)),
        "verified": ("task", np.array([row["verified"] for row in rows], dtype=object)),
    }
    current_names = sorted({name for row in rows for name in row["currents"]})
    for name in current_names:
        data_vars[name] = ("task", np.array([row["currents"].get(name, np.nan) for row in rows]),
                           {"units": "1/time", "source": "analyze stage"})
    dataset = xr.Dataset(data_vars, coords=coords)
    dataset.attrs.update({"sweep": sweep, "parameters": parameters,
                          "tasks": len(tasks),
                          "complete": int(sum(row["status"] == "complete" for row in rows))})
    if sizes is not None:
        dataset.attrs.update(_fits(tasks, parameters, sizes, gaps, rows))
    path = f"{SWEEPS_GROUP}/{sweep}/collected"
    _write_dataset(store, dataset, path)
    return Collection(sweep=sweep, path=path, dataset=dataset)


def _tied_to_size(tasks, key: str, size_key: str) -> bool:
    """True when ``key`` changes with the size and only with it (zipped with it, e.g. the
    particle number of an exclusion ring at fixed filling): not a separate fit family."""
    pairs = {json.dumps(task["parameters"].get(size_key)): json.dumps(task["parameters"].get(key))
             for task in tasks}
    sizes = {json.dumps(task["parameters"].get(size_key)) for task in tasks}
    values = {json.dumps(task["parameters"].get(key)) for task in tasks}
    consistent = all(pairs[json.dumps(task["parameters"].get(size_key))]
                     == json.dumps(task["parameters"].get(key)) for task in tasks)
    return consistent and len(values) == len(sizes) > 1


def _fits(tasks, parameters, sizes, gaps, rows) -> dict[str, Any]:
    """Fits of gap against size, one per combination of the other swept fields."""
    size_key = next(key for key in parameters if SIZE_FIELDS.match(key))
    others = [key for key in parameters if key != size_key
              and not _tied_to_size(tasks, key, size_key)]
    groups: dict[str, list[int]] = {}
    for i, task in enumerate(tasks):
        if rows[i]["status"] == "complete" and gaps[i] > 0:
            label = json.dumps({k: task["parameters"].get(k) for k in others}, sort_keys=True)
            groups.setdefault(label, []).append(i)
    plain, corrected = [], []
    for label, members in groups.items():
        fixed = json.loads(label)
        if len(members) >= 3:
            fit = fit_power_law(sizes[members], gaps[members])
            plain.append({**fit.as_dict(), "fixed": fixed})
        if len(members) >= 4:
            fit = fit_power_law(sizes[members], gaps[members], omega=CORRECTION_OMEGA)
            corrected.append({**fit.as_dict(), "fixed": fixed})
    note = ("least squares on log(gap) = log A - z log L (+ c L^-2 in gap_fit_corrected); "
            "z_stderr is the standard error of the slope; fit_range = [smallest, largest] "
            "size used")
    result: dict[str, Any] = {"fit_note": note}
    if plain:
        result["gap_fit"] = plain[0] if len(plain) == 1 and not others else plain
    if corrected:
        result["gap_fit_corrected"] = (corrected[0] if len(corrected) == 1 and not others
                                       else corrected)
    return result


def _write_dataset(store: Store, dataset, path: str) -> None:
    """Write the dataset to a staging group, then move it into place by renames: a reader
    sees the old dataset or the new one, never a half-written one."""
    staging = store.path / STAGING / f"collect-{uuid.uuid4().hex[:8]}"
    staging.parent.mkdir(parents=True, exist_ok=True)
    encoded = dataset.copy()
    encoded.attrs = {k: json.loads(json.dumps(v, default=_json_default))
                     for k, v in dataset.attrs.items()}
    encoded.to_zarr(str(staging), mode="w", consolidated=False, zarr_format=3)
    final = store.path / path
    final.parent.mkdir(parents=True, exist_ok=True)
    trash = None
    if final.exists():
        trash = store.path / STAGING / f"replaced-{uuid.uuid4().hex[:8]}-collected"
        os.rename(final, trash)
    os.rename(staging, final)
    if trash is not None:
        shutil.rmtree(trash, ignore_errors=True)


def _json_default(value: Any) -> Any:
    if isinstance(value, np.generic):
        return value.item()
    if isinstance(value, np.ndarray):
        return value.tolist()
    raise TypeError(type(value).__name__)


def _fit_line(label: str, fit: dict[str, Any]) -> str:
    low, high = fit["fit_range"]
    fixed = ", ".join(f"{k}={v}" for k, v in fit.get("fixed", {}).items())
    extra = f" [{fixed}]" if fixed else ""
    correction = f", with c L^-{fit['omega']:g}" if fit.get("omega") is not None else ""
    return (f"  {label}: z = {fit['z']:.6f} +/- {fit['z_stderr']:.2g} (standard error; "
            f"{fit['points']} sizes {low:g}..{high:g}{correction}){extra}")


def describe_collection(collection: Collection) -> str:
    ds = collection.dataset
    lines = [f"sweep {collection.sweep}: {ds.attrs['complete']}/{ds.attrs['tasks']} tasks "
             f"complete -> {collection.path}"]
    header = f"  {'task':>4} {'run':<32} {'status':<10} {'gap (1/time)':>14} " \
             f"{'relaxation time':>16}"
    lines.append(header)
    for i in range(ds.sizes["task"]):
        gap = float(ds["gap"][i])
        relax = float(ds["relaxation_time"][i])
        lines.append(f"  {int(ds['task'][i]):>4} {str(ds['run'][i].values):<32} "
                     f"{str(ds['status'][i].values):<10} {gap:>14.6e} {relax:>16.6g}")
    for key, label in (("gap_fit", "gap ~ L^-z"), ("gap_fit_corrected", "corrected")):
        fits = ds.attrs.get(key)
        for fit in fits if isinstance(fits, list) else ([fits] if fits else []):
            lines.append(_fit_line(label, fit))
    return "\n".join(lines)

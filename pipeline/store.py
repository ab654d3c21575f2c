"""The one definition of the store layout (zarr v3), with its writers and readers.

Layout (README.md, "Store layout", reproduces this)::

    STORE/                              root group, attrs {"gapline_store": LAYOUT_VERSION}
      RUN/                              one group per run; attrs:
                                          config   resolved config (defaults filled in)
                                          model    model summary (shape, rates, ...)
                                          versions software versions
                                          timings  seconds per stage
                                          stages   {stage: {fingerprint, groups, finished,
                                                   ranks, peak_memory_mib_per_rank}}
                                          sweep    sweep tasks only: {name, index, parameters,
                                                   status (running|complete|failed), error}
        assemble/                       attrs: n_states, nnz, norm1, column_sum_defect, ...,
                                          ranks, ownership_ranges (slepc)
        matrix/indptr                   int64   [row_pointer]  W in CSR (store.matrix = true):
        matrix/indices                  int32/64 [entry]       row i holds entries
        matrix/data                     float64 [entry]        indptr[i]:indptr[i+1]
        spectrum/eigenvalues            complex128 [mode]   slowest first; attrs: backend,
                                          method, certified, certificate, group_complete;
                                          slepc: ranks, rounds (nev, ncv, restarts, inner
                                          solves), inner_solver, ksp_type, pc_type,
                                          peak_memory_mib_per_rank, petsc_options,
                                          numpy_huge_pages
        spectrum/residuals              float64    [mode]   ||W v - l v|| / ||W||_1
        spectrum/condition              float64    [mode]   eigenvalue condition numbers
                                          (slepc: of the balanced D^-1 W D, D = sqrt(p))
        spectrum/error_estimates        float64    [mode]   condition x residual x ||W||_1
        spectrum/vectors                complex128 [state, mode]   (solve.vectors = true)
                                        sub-generators: attr quasi_stationary_outflow = -Re l_0
        stationary/distribution         float64    [state]  (conserving generators); attrs:
                                          method, residual, negative_mass, error_estimate,
                                          observables {name: meaning}
        stationary/<observable>         float64    [site|bond|species|...]  sum_x p(x) f(x, k)
                                          for the model's observables (exclusion: density
                                          [site], current [bond]; reactions: mean_counts
                                          [species], outflow [outflow_total])
        stationary/class_distributions  float64    [class, state]  instead, when W has several
                                          closed classes (zero outside each class)
        stationary/class_labels         int64      [class]  class label of each row
        analysis/class_of_state         int64      [state]  communicating class of each state
        analysis/class_closed           bool       [class]  no transition leaves the class
        analysis/channel_flux           float64    [channel]  sum of W_ij p_j per channel
        analysis/channel_current        float64    [channel]  sum of J_ij = W_ij p_j - W_ji p_i
        analysis/drift                  float64    [axis]   mean velocity (lattice)
        analysis/class_channel_current  float64    [class, channel]  with several closed
                                          classes (and class_channel_flux)
        analysis/quasi_stationary       float64    [state]  (sub-generators), and
        analysis/mean_absorption_time   float64    [state]  tau with W^T tau = -1
        analysis/splitting              float64    [state, exit]  exit probabilities; attrs:
                                          relaxation {gap, relaxation_time, period,
                                          separation, resolved}, classes, currents
                                          {channels, entropy_production, balance_defect,
                                          detailed_balance}, absorption {escape_rate, ...}
        evolution/time                  float64    [time]   attrs: requested (false: no
                                          [evolve] table, nothing else), start, method,
                                          conservation_defect, negative_mass
        evolution/probability           float64    [time, state]  (n_states <= full_limit)
        evolution/total_probability     float64    [time]
        evolution/mean_coordinate       float64    [time, axis]   (and variance_coordinate)
        evolution/mode_expansion        float64    [time, state]  (evolve.modes > 0), and
        evolution/mode_expansion_difference  float64  [time]  sum |p_modes - p_krylov|
        verify/                         attrs: passed (bool), checks (list of {name, source,
                                          value, reference, tolerance, passed})
        report/                         attrs: summary (text)
      _sweeps/SWEEP/                    attrs: definition, parameters, tasks [{index, run,
                                          parameters}] (written by the sweep driver only)
        collected/                      'gapline collect': xarray dataset [task, mode] of
                                          eigenvalues, gap, relaxation_time, status, ...;
                                          attrs gap_fit, gap_fit_corrected (z, z_stderr,
                                          fit_range); see pipeline/collect.py
      _staging/                         stage outputs being written (never read)

Every output group also carries attrs ``stage``, ``fingerprint`` and ``complete`` (True).

Atomic stages: a stage writes all its groups under ``_staging/``, then moves each into place
with a directory rename (replacing an older version only once the new one is whole), and
only then records its fingerprint in the run's ``stages`` attribute. A group counts as a
result only when ``complete`` is set *and* its fingerprint equals the recorded one, so an
interrupted stage never looks complete, and an earlier complete result stays readable until
the new one is committed.

Under MPI rank 0 creates the groups and arrays and commits; each rank writes the chunks of
the state rows it owns (ownership ranges are runs of whole chunks, ``pipeline.parallel``), so
no two ranks ever write into one chunk. The state axis is the first one, or the second of
``[time, state]`` arrays (``ArraySpec.axis``).
"""

from __future__ import annotations

import json
import math
import os
import re
import shutil
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import StoreError
from pipeline.parallel import world

__all__ = [
    "LAYOUT_VERSION",
    "STAGE_GROUPS",
    "ArraySpec",
    "GroupData",
    "Store",
    "open_results",
    "run_name_problem",
]

LAYOUT_VERSION = 1
#: stage -> the groups it writes under RUN/
STAGE_GROUPS: dict[str, tuple[str, ...]] = {
    "assemble": ("assemble", "matrix"),
    "solve": ("spectrum", "stationary"),
    "analyze": ("analysis",),
    "evolve": ("evolution",),
    "verify": ("verify",),
    "report": ("report",),
}
STAGING = "_staging"
#: what a run name may be: one directory under STORE/, never the root metadata file
RUN_NAME = re.compile(r"[A-Za-z0-9][A-Za-z0-9_.\-]*")
RESERVED_NAMES = ("zarr.json",)
STATE_CHUNK = 1 << 20  # states (or matrix entries) per chunk along a long axis
#: dimensions chunked by STATE_CHUNK (every other axis is one chunk)
LONG_DIMS = ("state", "entry", "row_pointer")


@dataclass
class ArraySpec:
    """An array to write: data and its dimension names (``[state]``, ``[mode]``...).

    A distributed array (one rank's rows under MPI) sets ``shape`` (the global shape),
    ``offset`` (the first global row held in ``data``) and ``chunk_rows`` (rows per chunk
    along the state axis, see :func:`pipeline.parallel.state_chunk`): every rank passes its
    own rows, which cover whole chunks, and writes them itself. ``axis`` is the state axis
    that ``offset`` counts along: 0 (``[state, ...]``) or 1 (``[time, state]``). Otherwise
    ``data`` is the whole array and rank 0 writes it.
    """

    data: np.ndarray
    dims: tuple[str, ...]
    shape: tuple[int, ...] | None = None
    offset: int = 0
    chunk_rows: int | None = None
    ordered: bool = False  # pieces not on chunk boundaries: ranks write one after another
    axis: int = 0  # the axis that offset and chunk_rows refer to

    @property
    def distributed(self) -> bool:
        return self.shape is not None


@dataclass
class GroupData:
    arrays: dict[str, ArraySpec] = field(default_factory=dict)
    attrs: dict[str, Any] = field(default_factory=dict)


def _zarr():
    import zarr

    return zarr


class Store:
    """A gapline store at ``path`` (a directory holding a zarr v3 hierarchy)."""

    def __init__(self, path: str | Path, create: bool = False) -> None:
        self.path = Path(path)
        self.world = world()
        # Under MPI rank 0 creates the store; the others open it once it exists (or raise
        # the same error), so no rank waits forever on a failure of another.
        if create and self.world.size > 1:
            self.world.on_root(lambda: self._initialize(create=True))
            create = False
        self._initialize(create)

    def _initialize(self, create: bool) -> None:
        if self.path.exists() and not self.path.is_dir():
            raise StoreError(f"store {str(self.path)!r}: is a file, not a store directory; "
                             "fix: choose another --store path")
        if create:
            if self.path.exists() and not (self.path / "zarr.json").exists() and any(
                self.path.iterdir()
            ):
                raise StoreError(f"store {str(self.path)!r}: exists and is not a zarr store; "
                                 "fix: choose another --store path")
            self.root = self._open_root(mode="a")
            if "gapline_store" not in self.root.attrs:
                self.root.attrs["gapline_store"] = LAYOUT_VERSION
            if not (self.path / STAGING / "zarr.json").exists():
                # Made here, once, by whoever creates the store (a sweep driver before its
                # tasks start), so parallel stage commits never race to create it.
                _zarr().open_group(str(self.path / STAGING), mode="a", zarr_format=3)
        else:
            if not (self.path / "zarr.json").exists():
                raise StoreError(f"store {str(self.path)!r}: not found; fix: check the path or "
                                 "run 'gapline run CONFIG --store PATH' first")
            self.root = self._open_root(mode="r+")
            if "gapline_store" not in self.root.attrs:
                raise StoreError(f"store {str(self.path)!r}: a zarr store but not a gapline "
                                 "store (no 'gapline_store' attribute)")

    def _open_root(self, mode: str):
        zarr = _zarr()
        try:
            if mode == "a" and not (self.path / "zarr.json").exists():
                # a new store's root metadata is written once, with its marker attribute, so
                # a concurrent reader never sees a root without it
                return zarr.open_group(str(self.path), mode=mode, zarr_format=3,
                                       attributes={"gapline_store": LAYOUT_VERSION})
            return zarr.open_group(str(self.path), mode=mode, zarr_format=3)
        except (zarr.errors.ContainsArrayError, zarr.errors.NodeTypeValidationError,
                json.JSONDecodeError, UnicodeDecodeError) as exc:
            # An array, or metadata that is no zarr v3 group: someone else's data.
            raise StoreError(f"store {str(self.path)!r}: not a zarr group ({type(exc).__name__})"
                             "; fix: choose another --store path") from None

    # -- runs ---------------------------------------------------------------------------

    def runs(self) -> list[str]:
        """Names of the run groups, sorted."""
        names = [name for name, _ in self.root.groups() if not name.startswith("_")]
        return sorted(names)

    def has_run(self, run: str) -> bool:
        """True for a run group of this store (a valid run name, see :func:`run_name_problem`),
        never for a group inside a run, the staging area or the root."""
        return run_name_problem(run) is None and (self.path / run / "zarr.json").exists()

    def run_attrs(self, run: str) -> dict[str, Any]:
        if not self.has_run(run):
            raise StoreError(f"run {run!r}: not in store {str(self.path)!r}; runs: "
                             + (", ".join(self.runs()) or "none"))
        return dict(self._zarr_group(run).attrs)

    def run_is_empty(self, run: str) -> bool:
        """True for a run group with no attributes and nothing inside (a creation that was
        cut short: it holds no results)."""
        group = self._zarr_group(run)
        return not dict(group.attrs) and not any(True for _ in group.keys())

    def open_run(self, run: str, attrs: dict[str, Any]) -> None:
        """Create the run group if needed and merge ``attrs`` into its attributes (a new
        group is written with them in one metadata write, so an interrupted creation never
        leaves a run without them)."""

        def create() -> None:
            if not self.has_run(run):
                self.root.create_group(run, attributes=_jsonable(attrs))
                return
            self._zarr_group(run).attrs.update(_jsonable(attrs))

        self.world.on_root(create)

    def update_run_attrs(self, run: str, attrs: dict[str, Any]) -> None:
        """Merge ``attrs`` into the run's attributes (rank 0 writes; every rank returns
        once they are written)."""
        self.world.on_root(lambda: self._write_run_attrs(run, attrs))

    def _write_run_attrs(self, run: str, attrs: dict[str, Any]) -> None:
        """Merge ``attrs`` into the run's attributes (this process; rank 0 under MPI)."""
        self._zarr_group(run).attrs.update(_jsonable(attrs))

    def stage_record(self, run: str, stage: str) -> dict[str, Any] | None:
        return self.run_attrs(run).get("stages", {}).get(stage)

    # -- writing ------------------------------------------------------------------------

    def write_stage(
        self, run: str, stage: str, groups: dict[str, GroupData], fingerprint: str,
        record: dict[str, Any] | None = None, upstream: str | None = None,
    ) -> None:
        """Commit one stage's groups atomically (see the module docstring).

        ``upstream`` names the stage whose results this one was computed from; its current
        fingerprint is recorded, so a later rerun of the upstream stage marks this one stale.
        """
        expected = set(STAGE_GROUPS[stage])
        if not set(groups) <= expected:
            raise ValueError(f"stage {stage!r} writes {sorted(expected)}, got {sorted(groups)}")
        parallel = self.world
        staging_name = parallel.bcast(
            f"{run}-{stage}-{os.getpid()}-{uuid.uuid4().hex[:8]}" if parallel.is_root else None)
        staging_dir = self.path / STAGING / staging_name
        zarr = _zarr()

        def create_staging() -> None:
            # _staging is itself a (never read) group, so listing the root stays clean.
            if not (self.path / STAGING / "zarr.json").exists():
                zarr.open_group(str(self.path / STAGING), mode="a", zarr_format=3)
            staging = zarr.open_group(str(staging_dir), mode="w", zarr_format=3)
            for name, content in groups.items():
                group = staging.create_group(name)
                for array_name, spec in content.arrays.items():
                    array = _create_array(group, array_name, spec)
                    if not spec.distributed:
                        _fill_array(array, spec)

        parallel.on_root(create_staging)
        # Distributed arrays: each rank writes the whole chunks of the rows it owns; pieces
        # that do not fall on chunk boundaries ("ordered") are written rank after rank.
        def fill_own_rows(ordered: bool) -> None:
            for name, content in groups.items():
                for array_name, spec in content.arrays.items():
                    if spec.distributed and spec.ordered == ordered:
                        array = zarr.open_array(str(staging_dir / name / array_name), mode="r+",
                                                zarr_format=3)
                        _fill_array(array, spec)

        parallel.collective(lambda: fill_own_rows(False))
        if any(spec.ordered for content in groups.values() for spec in content.arrays.values()):
            for turn in range(parallel.size):  # a loop over ranks
                parallel.collective(lambda turn=turn: fill_own_rows(True)
                                    if parallel.rank == turn else None)

        def commit() -> None:
            staging = zarr.open_group(str(staging_dir), mode="r+", zarr_format=3)
            for name, content in groups.items():
                group = staging[name]
                attrs = dict(content.attrs)
                attrs.update(stage=stage, fingerprint=fingerprint)
                group.attrs.update(_jsonable(attrs))
                group.attrs["complete"] = True  # written last
            run_dir = self.path / run
            replaced = []
            for name in groups:
                final = run_dir / name
                if final.exists():
                    trash = self.path / STAGING / f"replaced-{uuid.uuid4().hex[:8]}-{name}"
                    os.rename(final, trash)
                    replaced.append(trash)
                os.rename(staging_dir / name, final)
            stages = self.run_attrs(run).get("stages", {})
            upstream_record = None
            if upstream is not None:
                upstream_record = {"stage": upstream,
                                   "fingerprint": stages.get(upstream, {}).get("fingerprint")}
            stages[stage] = {
                "fingerprint": fingerprint,
                "upstream": upstream_record,
                "groups": sorted(groups),
                "finished": time.strftime("%Y-%m-%dT%H:%M:%S%z"),
                **(record or {}),
            }
            self._write_run_attrs(run, {"stages": stages})
            for trash in replaced:
                shutil.rmtree(trash, ignore_errors=True)
            shutil.rmtree(staging_dir, ignore_errors=True)

        parallel.on_root(commit)

    # -- reading ------------------------------------------------------------------------

    def group(self, run: str, name: str, required: bool = True):
        """The committed group ``RUN/name`` (a zarr group), or None / StoreError."""
        status = self.group_status(run, name)
        if status == "complete":
            return self._zarr_group(f"{run}/{name}")
        if required:
            raise StoreError(f"run {run!r}: no complete '{name}' results ({status}); fix: run "
                             "the stage that writes it (gapline run CONFIG)")
        return None

    def group_status(self, run: str, name: str) -> str:
        """'complete', 'missing', 'incomplete' (interrupted or superseded) or 'stale' (an
        upstream stage was rerun since)."""
        if not (self.path / run / name / "zarr.json").exists():
            return "missing"
        attrs = dict(self._zarr_group(f"{run}/{name}").attrs)
        stages = self.run_attrs(run).get("stages", {})
        record = stages.get(attrs.get("stage", ""))
        if not attrs.get("complete") or record is None:
            return "incomplete"
        if record.get("fingerprint") != attrs.get("fingerprint"):
            return "incomplete"
        return "stale" if _is_stale(stages, record) else "complete"

    def _zarr_group(self, path: str):
        zarr = _zarr()
        return zarr.open_group(str(self.path / path), mode="r+", zarr_format=3)


def run_name_problem(name: str) -> str | None:
    """Why ``name`` cannot name a run (one line), or None when it can."""
    if not RUN_NAME.fullmatch(name):
        return ("must start with a letter or digit and hold only letters, digits, '_', '-', "
                "'.'")
    if name in RESERVED_NAMES:
        return "is the name of the store's own metadata file; choose another name"
    return None


def _is_stale(stages: dict[str, Any], record: dict[str, Any]) -> bool:
    """True when some stage upstream of ``record`` was recommitted after it."""
    seen = 0
    while record.get("upstream") and seen < len(stages) + 1:
        upstream = record["upstream"]
        current = stages.get(upstream["stage"])
        if current is None or current.get("fingerprint") != upstream["fingerprint"]:
            return True
        record, seen = current, seen + 1
    return False


def _create_array(group: Any, name: str, spec: ArraySpec) -> Any:
    """Create the array of ``spec`` (metadata only), chunked along the state axis."""
    data = np.asarray(spec.data)
    shape = tuple(spec.shape) if spec.distributed else data.shape
    state_rows = spec.chunk_rows if spec.chunk_rows else STATE_CHUNK
    chunks = tuple(
        min(max(size, 1), state_rows if dim in LONG_DIMS else max(size, 1))
        for size, dim in zip(shape, spec.dims, strict=True)
    )
    if len(shape) == 2 and spec.dims[0] == "state":
        # Keep chunks of vectors near 16 MiB whatever the mode count; halving keeps them
        # aligned with the (power-of-two) chunks that ranks own.
        rows = max(1, min(shape[0], state_rows))
        while rows > 1 and rows * max(1, shape[1]) * data.itemsize > 16 * 2**20:
            rows = (rows + 1) // 2
        chunks = (rows, max(1, shape[1]))
    return group.create_array(name, shape=shape, dtype=data.dtype, chunks=chunks,
                              dimension_names=list(spec.dims))


def _fill_array(array: Any, spec: ArraySpec) -> None:
    """Write ``spec.data`` at its rows (along ``spec.axis``), one whole chunk at a time."""
    data = np.asarray(spec.data)
    if data.ndim == 0 or data.size == 0:
        if not spec.distributed:
            array[...] = data
        return
    axis = spec.axis
    lead = (slice(None),) * axis  # the axes before the state axis are written whole

    def put(low: int, high: int, first: int) -> None:
        array[(*lead, slice(low, high))] = data[(*lead, slice(low - first, high - first))]

    step, length = array.chunks[axis], data.shape[axis]
    if spec.ordered:  # align the pieces with the array's chunks
        first = spec.offset
        bounds = [first, *range((first // step + 1) * step, first + length, step),
                  first + length]
        for low, high in zip(bounds[:-1], bounds[1:], strict=True):
            put(low, high, first)
        return
    for start in range(0, length, step):
        stop = min(start + step, length)
        put(spec.offset + start, spec.offset + stop, spec.offset)


def _jsonable(value: Any) -> Any:
    """Plain JSON data: numpy scalars to Python, tuples to lists, inf to "inf", NaN to None."""
    if isinstance(value, dict):
        return {str(k): _jsonable(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_jsonable(v) for v in value]
    if isinstance(value, np.ndarray):
        return _jsonable(value.tolist())
    if isinstance(value, np.bool_ | bool):
        return bool(value)
    if isinstance(value, np.integer):
        return int(value)
    if isinstance(value, np.floating | float):
        number = float(value)
        if math.isinf(number):  # JSON has no infinity: kept as the strings "inf"/"-inf"
            return "inf" if number > 0 else "-inf"
        return number if math.isfinite(number) else None
    if isinstance(value, complex | np.complexfloating):
        return [_jsonable(value.real), _jsonable(value.imag)]
    return value


def open_results(path: str | Path, run: str):
    """The committed results of ``run`` as one :class:`xarray.Dataset` (lazy, dask-backed).

    Variables: ``eigenvalues``, ``residuals`` (``mode``), ``vectors`` (``state, mode``) when
    stored, ``distribution`` (``state``) when stored. Attributes: the run's attributes plus
    the spectrum certificate.
    """
    import xarray as xr

    store = Store(path)
    attrs = store.run_attrs(run)
    parts = []
    for name in ("spectrum", "stationary"):
        if store.group(run, name, required=(name == "spectrum")) is not None:
            dataset = xr.open_zarr(str(store.path), group=f"{run}/{name}", consolidated=False)
            for key in ("stage", "fingerprint", "complete"):
                dataset.attrs.pop(key, None)
            parts.append(dataset)
    merged = xr.merge(parts, combine_attrs="drop_conflicts")
    merged.attrs.update({k: v for k, v in attrs.items() if k != "stages"})
    return merged

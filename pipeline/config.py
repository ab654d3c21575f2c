"""Config schema, parsing and validation: the one source of truth for config fields.

A config is a TOML file with the tables ``[run]``, ``[model]``, ``[solve]``, ``[analyze]``,
``[evolve]`` (optional: no table, no time evolution), ``[verify]`` and ``[store]``.
:data:`SCHEMA` declares every field (type, default, meaning); :func:`load_config` turns a file
plus ``--set key=value`` overrides into a typed :class:`Config`, and every violation raises
:class:`~pipeline.errors.ConfigError` with a one-line message that names the field, e.g.
``model.forward[1]: rate must be >= 0, got -2``. ``gapline schema`` prints the reference that
README.md reproduces.
"""

from __future__ import annotations

import copy
import difflib
import hashlib
import json
import math
import re
import tomllib
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Any

from pipeline.errors import ConfigError

__all__ = [
    "SCHEMA",
    "AnalyzeConfig",
    "Config",
    "EvolveConfig",
    "DisorderConfig",
    "ExclusionConfig",
    "LatticeConfig",
    "MatrixConfig",
    "ModelConfig",
    "NetworkConfig",
    "ReactionConfig",
    "ReactionsConfig",
    "RunConfig",
    "SolveConfig",
    "StoreConfig",
    "VerifyConfig",
    "ClusterConfig",
    "SweepConfig",
    "apply_override",
    "set_field",
    "describe_schema",
    "fingerprint",
    "load_config",
    "parse_config",
]

BOUNDARIES = ("periodic", "reflecting", "absorbing")
BACKENDS = ("auto", "scipy", "slepc")
METHODS = ("auto", "dense", "shift-invert", "krylov")
INNER_SOLVERS = ("direct", "iterative")
PRECONDITIONERS = ("auto", "bjacobi", "asm", "gamg", "hypre")
PETSC_OPTION = re.compile(r"[A-Za-z][A-Za-z0-9_]*")
SYMMETRIZE = ("never", "auto", "always")
CLOSED_CLASSES = ("per-class", "single")
DISORDER_TARGETS = ("bonds", "sites")
DISORDER_LAWS = ("uniform", "lognormal")
MAX_DIMENSIONS = 8

# Each entry: field -> (type shown to users, default or REQUIRED, meaning).
REQUIRED = object()
SCHEMA: dict[str, dict[str, tuple[str, Any, str]]] = {
    "run": {
        "name": ("string", None, "run group name in the store; default: the config file's stem"),
        "description": ("string", "", "free text kept with the results"),
    },
    "model": {
        "type": (
            "string",
            REQUIRED,
            "model family; one of: lattice, exclusion, reactions, network, matrix",
        ),
    },
    "model:lattice": {
        "size": ("int or list of int", REQUIRED, "sites per axis (>= 2); the list length is d"),
        "boundary": (
            "string or list",
            "periodic",
            "per axis: 'periodic' (ring), 'reflecting' (no hop off the edge) or 'absorbing' "
            "(the hop off either edge leaves the system: W is a sub-generator)",
        ),
        "forward": ("float or list", 1.0, "hop rate toward +1 along each axis (>= 0)"),
        "backward": ("float or list", 1.0, "hop rate toward -1 along each axis (>= 0)"),
        "disorder": ("table", None, "optional quenched disorder, see model.disorder.*"),
    },
    "model.disorder": {
        "on": (
            "string",
            "bonds",
            "'bonds': each bond's two hop rates are multiplied by one random factor "
            "(random barriers); 'sites': every hop out of a site is multiplied by its factor "
            "(random traps)",
        ),
        "law": ("string", "uniform", "distribution of the factors: 'uniform' or 'lognormal'"),
        "low": ("float", 0.5, "uniform law: smallest factor (> 0)"),
        "high": ("float", 1.5, "uniform law: largest factor (>= low)"),
        "sigma": ("float", 0.5, "lognormal law: standard deviation of ln(factor); median 1"),
        "seed": ("int", 0, "seed of the factors; results do not depend on block sizes or ranks"),
    },
    "model:exclusion": {
        "sites": ("int", REQUIRED, "lattice sites L (>= 2)"),
        "boundary": (
            "string",
            "periodic",
            "'periodic' (a ring with a fixed particle number: C(L, N) states) or 'open' "
            "(a segment with reservoirs at both ends: 2^L states)",
        ),
        "particles": ("int", None, "periodic only: particle number N (0..L)"),
        "right": ("float", 1.0, "hop rate p of a particle to the empty right neighbour (>= 0)"),
        "left": ("float", 0.0, "hop rate q of a particle to the empty left neighbour (>= 0)"),
        "alpha": ("float", 1.0, "open only: entry rate at the left end (site 0 empty)"),
        "beta": ("float", 1.0, "open only: exit rate at the right end (site L-1 full)"),
        "gamma": ("float", 0.0, "open only: exit rate at the left end (site 0 full)"),
        "delta": ("float", 0.0, "open only: entry rate at the right end (site L-1 empty)"),
    },
    "model:reactions": {
        "species": ("list of string", REQUIRED, "species names (letters, digits, '_')"),
        "bounds": (
            "int or list of int",
            REQUIRED,
            "finite state projection: largest copy number kept per species (counts 0..bound)",
        ),
        "parameters": ("table", None, "named constants usable in propensity expressions"),
        "truncation": (
            "string",
            "leak",
            "'leak': jumps out of the projection leave the system (W is a sub-generator; "
            "the decay rate of the slowest mode is the outflow); 'reflect': they are dropped "
            "(W conserves; the stationary outflow they would carry is stored)",
        ),
        "reactions": ("array of tables", REQUIRED, "the reactions, see model.reactions.*"),
    },
    "model.reactions": {
        "name": ("string", None, "label used in messages; default: reaction index"),
        "reactants": ("table", None, "species -> molecules consumed, e.g. {A = 2}"),
        "products": ("table", None, "species -> molecules produced, e.g. {B = 1}"),
        "rate": (
            "float",
            None,
            "mass-action constant c: propensity c * prod_s C(x_s, reactant_s) (Gillespie)",
        ),
        "propensity": (
            "string",
            None,
            "instead of rate: an expression of species counts and parameters with + - * / "
            "**, exp, log, sqrt, min, max, abs, hill(x, K, n) = x^n / (K^n + x^n)",
        ),
    },
    "model:network": {
        "file": ("string", REQUIRED, "graph file, relative to the config file's directory"),
        "format": (
            "string",
            "auto",
            "'edgelist' (CSV/TSV: source, target[, rate], optional header), 'mtx' (Matrix "
            "Market, entry (i, j) = weight of the edge i -> j), 'graphml', or 'auto' (by "
            "extension: .csv .tsv .txt .mtx .graphml)",
        ),
        "directed": (
            "bool",
            True,
            "edge lists and Matrix Market: edges are one-way (false: both ways); GraphML "
            "says itself",
        ),
        "weight": ("string", "weight", "GraphML edge attribute holding the rate (missing: 1)"),
        "nodes": (
            "list of string",
            None,
            "edge lists: the node labels, in state order (isolated nodes allowed; an edge "
            "to an unlisted node is an error); default: as they first appear",
        ),
        "walk": (
            "string",
            "edge",
            "'edge': each edge is a jump at rate = its weight; 'node': each node is left at "
            "rate model.node_rate, split over its out-edges in proportion to weight",
        ),
        "node_rate": ("float", 1.0, "walk = 'node': exit rate of every node (> 0)"),
        "teleport": (
            "float",
            0.0,
            "restart rate: from every node, a jump to the restart target at this rate (>= 0)",
        ),
        "restart": (
            "string",
            None,
            "label of the restart node; default: a uniformly random node (dense: at most "
            "4096 nodes)",
        ),
    },
    "model:matrix": {
        "file": (
            "string",
            REQUIRED,
            "generator file: Matrix Market (.mtx) or scipy sparse .npz; relative to the "
            "config file's directory",
        ),
        "convention": (
            "string",
            "columns",
            "'columns': entry (i, j) is the rate j -> i, columns sum to 0 (gapline's own); "
            "'rows': entry (i, j) is the rate i -> j, rows sum to 0 (transposed on load)",
        ),
        "diagonal": (
            "string",
            "given",
            "'given': the file holds the diagonal and it is checked; 'from-rates': the "
            "diagonal is set to minus the exit rates (any diagonal in the file is ignored)",
        ),
        "conserving": (
            "bool",
            True,
            "false: a sub-generator (sums <= 0, probability may leave)",
        ),
    },
    "solve": {
        "modes": ("int", 10, "slowest modes wanted, the stationary mode 0 included (>= 1)"),
        "backend": (
            "string",
            "auto",
            "'scipy' (one process), 'slepc' (PETSc/SLEPc, any number of MPI ranks) or "
            "'auto' (scipy on one process, slepc under mpiexec/srun)",
        ),
        "method": (
            "string",
            "auto",
            "'dense' (full eigendecomposition, certified complete), 'shift-invert' "
            "(sparse LU + Arnoldi with a completeness certificate), 'krylov' (Lanczos or "
            "Arnoldi on W itself, no LU: for huge problems whose LU fills in; never certified "
            "complete) or 'auto' (dense up to solve.dense_limit states)",
        ),
        "dense_limit": ("int", 1024, "largest state count solved densely by method 'auto'"),
        "tolerance": ("float", 1e-12, "relative convergence tolerance of the eigensolver"),
        "max_search": (
            "int",
            400,
            "largest number of modes the sparse search may compute to certify completeness",
        ),
        "vectors": ("bool", False, "store right eigenvectors [state, mode]"),
        "stationary": ("bool", True, "compute the stationary distribution (conserving W only)"),
        "inner": (
            "string",
            "direct",
            "slepc backend, inner solve of shift-and-invert: 'direct' (MUMPS LU; needed for "
            "the completeness certificate) or 'iterative' (GMRES + solve.preconditioner, for "
            "problems too large to factor; not certified)",
        ),
        "preconditioner": (
            "string",
            "auto",
            "slepc backend with inner = 'iterative': 'bjacobi' (block Jacobi/ILU; 'auto'), "
            "'asm', 'gamg' (algebraic multigrid) or 'hypre' (BoomerAMG)",
        ),
        "inner_tolerance": ("float", 1e-12, "relative tolerance of the iterative inner solve"),
        "petsc": (
            "table",
            None,
            "expert: PETSc options database entries (name without '-' = value), applied "
            "after gapline's settings, e.g. eps_ncv = 128, st_mat_mumps_icntl_14 = 50",
        ),
        "symmetrize": (
            "string",
            "never",
            "reversible chains: 'auto' solves the symmetric D^-1/2 W D^1/2 (real spectrum, "
            "Lanczos) when detailed balance holds, 'always' requires it, 'never' keeps the "
            "general path",
        ),
        "closed_classes": (
            "string",
            "per-class",
            "several closed classes: 'per-class' stores one stationary law per class, "
            "'single' makes that an error",
        ),
    },
    "analyze": {
        "start": (
            "int or list of int",
            None,
            "start state of the mean absorption time (flat index or lattice coordinate); "
            "the times from every state are stored anyway",
        ),
        "balance_tolerance": (
            "float",
            1e-10,
            "detailed balance holds when max |J_ij| / max W_ij p_j is below this",
        ),
    },
    "evolve": {
        "start": (
            "int, list of int or string",
            REQUIRED,
            "initial law: a flat state index, a lattice coordinate list, 'stationary' (the "
            "stored result) or the path of a .npy file of probabilities",
        ),
        "times": ("list of float", None, "times (>= 0) at which p(t) is reported"),
        "t_end": ("float", None, "instead of times: a uniform grid from 0 to t_end"),
        "steps": ("int", 11, "points of the uniform grid (>= 2)"),
        "full_limit": (
            "int",
            100000,
            "p(t) [time, state] is stored up to this many states; above it only the "
            "observables (total probability, mean and variance of each coordinate)",
        ),
        "modes": (
            "int",
            0,
            "also the mode expansion sum_k e^(lambda_k t) r_k (l_k . p0) over this many "
            "slowest modes (0: off), compared with the Krylov result at each time",
        ),
    },
    "verify": {
        "tolerance": (
            "float",
            1e-9,
            "eigenvalues and stationary law must match the exact ones to this, relative to ||W||_1",
        ),
        "gap_tolerance": (
            "float",
            1e-6,
            "relative error allowed on the spectral gap (or decay rate) against the exact one",
        ),
        "residual_tolerance": ("float", 1e-8, "largest accepted ||Wv - lv|| / ||W||_1"),
    },
    "store": {
        "path": ("string", "gapline-store.zarr", "zarr store (a directory); --store overrides"),
        "matrix": (
            "bool",
            False,
            "also store the assembled generator (row-chunked CSR under RUN/matrix), so solve "
            "can rerun without assemble, each process reading only its rows",
        ),
    },
    "sweep": {
        "name": ("string", None, "sweep name, the prefix of its run names; default: run.name"),
        "grid": (
            "table",
            None,
            "field path -> list of values, e.g. {\"model.size\" = [32, 64]} or "
            "{\"model.forward[0]\" = [0.5, 1.0]}; every combination is one task",
        ),
        "zip": (
            "table",
            None,
            "field path -> list of values, all of one length; the i-th values go together "
            "(the zipped rows are combined with the grid as a product)",
        ),
    },
    "cluster": {
        "scheduler": (
            "string",
            "local",
            "where 'gapline sweep' runs its tasks: 'local' (a dask LocalCluster on this "
            "machine), 'slurm' or 'pbs' (dask-jobqueue: one dask worker per batch job)",
        ),
        "workers": ("int", 2, "dask workers (local processes, or batch jobs) (>= 1)"),
        "cores": ("int", 1, "cores per worker or batch job (>= 1)"),
        "memory": ("float", 4.0, "memory per worker or batch job, GiB (> 0)"),
        "walltime": ("string", "01:00:00", "time limit per batch job, HH:MM:SS"),
        "queue": ("string", None, "batch queue / partition (default: the scheduler's)"),
        "account": ("string", None, "batch account to charge (default: none)"),
        "ranks": (
            "int",
            0,
            "MPI ranks of 'gapline submit' for one run; 0: from the 'check' memory estimate "
            "and cluster.memory",
        ),
    },
}

SCHEDULERS = ("local", "slurm", "pbs")
WALLTIME = re.compile(r"^(\d+):([0-5]\d):([0-5]\d)$")


@dataclass(frozen=True)
class DisorderConfig:
    on: str
    law: str
    low: float
    high: float
    sigma: float
    seed: int


@dataclass(frozen=True)
class LatticeConfig:
    type: str
    size: tuple[int, ...]
    boundary: tuple[str, ...]
    forward: tuple[float, ...]
    backward: tuple[float, ...]
    disorder: DisorderConfig | None = None


@dataclass(frozen=True)
class ExclusionConfig:
    type: str
    sites: int
    boundary: str
    particles: int | None
    right: float
    left: float
    alpha: float = 0.0
    beta: float = 0.0
    gamma: float = 0.0
    delta: float = 0.0


@dataclass(frozen=True)
class ReactionConfig:
    name: str
    reactants: tuple[tuple[str, int], ...]
    products: tuple[tuple[str, int], ...]
    rate: float | None
    propensity: str | None


@dataclass(frozen=True)
class ReactionsConfig:
    type: str
    species: tuple[str, ...]
    bounds: tuple[int, ...]
    parameters: tuple[tuple[str, float], ...]
    truncation: str
    reactions: tuple[ReactionConfig, ...]


@dataclass(frozen=True)
class NetworkConfig:
    type: str
    file: str
    format: str
    directed: bool
    weight: str
    walk: str
    node_rate: float
    teleport: float
    restart: str | None
    nodes: tuple[str, ...] | None = None


@dataclass(frozen=True)
class MatrixConfig:
    type: str
    file: str
    convention: str
    diagonal: str
    conserving: bool


ModelConfig = LatticeConfig | ExclusionConfig | ReactionsConfig | NetworkConfig | MatrixConfig


@dataclass(frozen=True)
class RunConfig:
    name: str
    description: str = ""


@dataclass(frozen=True)
class SolveConfig:
    modes: int = 10
    backend: str = "auto"
    method: str = "auto"
    dense_limit: int = 1024
    tolerance: float = 1e-12
    max_search: int = 400
    vectors: bool = False
    stationary: bool = True
    inner: str = "direct"
    preconditioner: str = "auto"
    inner_tolerance: float = 1e-12
    petsc: dict[str, Any] = field(default_factory=dict)
    symmetrize: str = "never"
    closed_classes: str = "per-class"


@dataclass(frozen=True)
class AnalyzeConfig:
    start: int | tuple[int, ...] | None = None
    balance_tolerance: float = 1e-10


@dataclass(frozen=True)
class EvolveConfig:
    start: int | tuple[int, ...] | str
    times: tuple[float, ...]
    full_limit: int = 100000
    modes: int = 0


@dataclass(frozen=True)
class VerifyConfig:
    tolerance: float = 1e-9
    gap_tolerance: float = 1e-6
    residual_tolerance: float = 1e-8


@dataclass(frozen=True)
class StoreConfig:
    path: str = "gapline-store.zarr"
    matrix: bool = False


@dataclass(frozen=True)
class SweepConfig:
    """A parameter sweep: ``grid`` (product) and ``zip`` (lockstep) as (field path, values)."""

    name: str
    grid: tuple[tuple[str, tuple[Any, ...]], ...] = ()
    zip: tuple[tuple[str, tuple[Any, ...]], ...] = ()


@dataclass(frozen=True)
class ClusterConfig:
    scheduler: str = "local"
    workers: int = 2
    cores: int = 1
    memory: float = 4.0  # GiB
    walltime: str = "01:00:00"
    queue: str | None = None
    account: str | None = None
    ranks: int = 0


@dataclass(frozen=True)
class Config:
    """A validated config. ``raw`` is the resolved table tree (after overrides)."""

    run: RunConfig
    model: ModelConfig
    solve: SolveConfig
    verify: VerifyConfig
    store: StoreConfig
    sweep: SweepConfig | None = None
    cluster: ClusterConfig = field(default_factory=ClusterConfig)
    analyze: AnalyzeConfig = field(default_factory=AnalyzeConfig)
    evolve: EvolveConfig | None = None  # None: no [evolve] table, the stage records a skip
    source: str | None = None
    raw: dict[str, Any] = field(default_factory=dict, compare=False, repr=False)

    def resolved(self) -> dict[str, Any]:
        """The full config with defaults filled in, as plain TOML-like data."""
        data = asdict(self)
        data.pop("raw")
        data.pop("source")
        return _plain(data)


# ---------------------------------------------------------------------------------------
# Loading


def load_config(path: str | Path, overrides: list[str] | tuple[str, ...] = ()) -> Config:
    """Read a TOML config, apply ``key=value`` overrides, validate.

    Raises :class:`ConfigError` (one line) for a missing file, invalid TOML or a bad field.
    """
    path = Path(path)
    if not path.is_file():
        raise ConfigError(f"config file {str(path)!r} not found; fix: check the path")
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except tomllib.TOMLDecodeError as exc:
        raise ConfigError(f"{path}: invalid TOML: {exc}") from None
    except UnicodeDecodeError:
        raise ConfigError(f"{path}: not a UTF-8 text file; fix: save the config as UTF-8") from None
    for item in overrides:
        apply_override(raw, item)
    raw.setdefault("run", {})
    if isinstance(raw["run"], dict):
        raw["run"].setdefault("name", path.stem)
    return parse_config(raw, source=str(path))


_KEY_PART = re.compile(r"^([A-Za-z_][A-Za-z0-9_\-]*)(?:\[(\d+)\])?$")


def apply_override(raw: dict[str, Any], item: str) -> None:
    """Apply one ``--set`` override ``section.key=value`` (or ``section.key[i]=value``).

    The value is read as a TOML value (``3``, ``1e-9``, ``true``, ``[1, 2]``, ``"x"``);
    anything that is not valid TOML is taken as a plain string.
    """
    if "=" not in item:
        raise ConfigError(f"--set {item!r}: expected KEY=VALUE, e.g. --set solve.modes=12")
    key, text = item.split("=", 1)
    key = key.strip()
    try:
        value = tomllib.loads(f"v = {text.strip()}")["v"]
    except tomllib.TOMLDecodeError:
        value = text.strip()
    parts = key.split(".")
    if len(parts) < 2:
        raise ConfigError(f"--set {key!r}: expected SECTION.FIELD, e.g. model.size")
    if not isinstance(value, str) and _declared_kind(parts) == "string":
        value = text.strip()  # run.name=2024-06-01 is a name, not a TOML date
    set_field(raw, key, value, label=f"--set {key!r}")


def set_field(raw: dict[str, Any], key: str, value: Any, label: str | None = None) -> None:
    """Set the field at dotted path ``key`` (``model.size``, ``model.forward[1]``) of a raw
    table tree to ``value``; ``label`` starts error messages (default: the key)."""
    label = label or repr(key)
    parts = key.split(".")
    if len(parts) < 2:
        raise ConfigError(f"{label}: expected SECTION.FIELD, e.g. model.size")
    node: Any = raw
    for depth, part in enumerate(parts):
        match = _KEY_PART.match(part)
        if not match:
            raise ConfigError(f"{label}: {part!r} is not a field name")
        name, index = match.group(1), match.group(2)
        last = depth == len(parts) - 1
        if not isinstance(node, dict):
            raise ConfigError(f"{label}: {'.'.join(parts[:depth])} is not a table")
        if index is None:
            if last:
                node[name] = value
            else:
                node = node.setdefault(name, {})
            continue
        current = node.get(name)
        if not isinstance(current, list):
            raise ConfigError(f"{label}: {name} is not a list in the config; set it whole")
        position = int(index)
        if position >= len(current):
            raise ConfigError(
                f"{label}: index {position} out of range ({name} has {len(current)})"
            )
        if last:
            current[position] = value
        else:
            node = current[position]


def _declared_kind(parts: list[str]) -> str | None:
    """The schema type of the field ``parts`` (e.g. ``["run", "name"]``), or None."""
    *table, name = parts
    if table == ["model"]:
        sections = [s for s in SCHEMA if s == "model" or s.startswith("model:")]
    else:
        sections = [".".join(table)]
    kinds = {SCHEMA[s][name][0] for s in sections if name in SCHEMA.get(s, {})}
    return kinds.pop() if len(kinds) == 1 else None


def fingerprint(data: Any) -> str:
    """Stable short hash of TOML-like data (sha256 of canonical JSON, 16 hex digits)."""
    text = json.dumps(_plain(data), sort_keys=True, separators=(",", ":"))
    return hashlib.sha256(text.encode()).hexdigest()[:16]


# ---------------------------------------------------------------------------------------
# Validation


def parse_config(raw: dict[str, Any], source: str | None = None) -> Config:
    """Validate a table tree (as read from TOML) into a :class:`Config`."""
    raw = copy.deepcopy(raw)
    _reject_unknown(raw, ("run", "model", "solve", "analyze", "evolve", "verify", "store",
                          "sweep", "cluster"), "")
    run_table = _table(raw, "run")
    _reject_unknown(run_table, SCHEMA["run"], "run")
    name = run_table.get("name")
    if name is None:
        raise ConfigError("run.name: missing; fix: add name = \"...\" under [run]")
    name = _string(name, "run.name")
    from pipeline.store import run_name_problem  # the store layout decides what a run is

    problem = run_name_problem(name)
    if problem is not None:
        raise ConfigError(f"run.name: {name!r} {problem}")
    run = RunConfig(name=name, description=_string(run_table.get("description", ""),
                                                   "run.description"))
    if "model" not in raw:
        raise ConfigError("model: missing table; fix: add [model] with type = \"lattice\"")
    model = _parse_model(_table(raw, "model"), source)
    solve = _parse_solve(_table(raw, "solve"))
    verify = _parse_verify(_table(raw, "verify"))
    store_table = _table(raw, "store")
    _reject_unknown(store_table, SCHEMA["store"], "store")
    store = StoreConfig(path=_string(store_table.get("path", StoreConfig.path), "store.path"),
                        matrix=_boolean(store_table.get("matrix", StoreConfig.matrix),
                                        "store.matrix"))
    sweep = _parse_sweep(raw["sweep"], name) if "sweep" in raw else None
    cluster = _parse_cluster(_table(raw, "cluster"))
    from pipeline.config_analysis import parse_analyze, parse_evolve

    analyze = parse_analyze(_table(raw, "analyze"))
    evolve = parse_evolve(_table(raw, "evolve")) if "evolve" in raw else None
    return Config(run=run, model=model, solve=solve, verify=verify, store=store, sweep=sweep,
                  cluster=cluster, analyze=analyze, evolve=evolve, source=source, raw=raw)


def _parse_sweep(table: Any, run_name: str) -> SweepConfig:
    """The ``[sweep]`` table; the fields and values themselves are checked on expansion."""
    if not isinstance(table, dict):
        raise ConfigError("sweep: expected a table [sweep] with grid = {...} and/or zip = {...}")
    _reject_unknown(table, SCHEMA["sweep"], "sweep")
    name = _string(table.get("name", run_name), "sweep.name")
    from pipeline.store import run_name_problem

    problem = run_name_problem(name)
    if problem is not None:
        raise ConfigError(f"sweep.name: {name!r} {problem}")
    parts = {}
    for kind in ("grid", "zip"):
        entries = table.get(kind, {})
        if not isinstance(entries, dict):
            raise ConfigError(f"sweep.{kind}: expected a table of field path -> list of values, "
                              f"e.g. {kind} = {{\"model.size\" = [32, 64]}}")
        items = []
        for key, values in entries.items():
            if not isinstance(values, list) or not values:
                raise ConfigError(f"sweep.{kind}.{key!r}: expected a non-empty list of values, "
                                  f"got {values!r}")
            if key.split(".")[0] in ("sweep", "cluster", "store", "run"):
                raise ConfigError(f"sweep.{kind}.{key!r}: only model, solve and verify fields "
                                  "can be swept")
            items.append((key, tuple(values)))
        parts[kind] = tuple(items)
    lengths = {len(values) for _, values in parts["zip"]}
    if len(lengths) > 1:
        raise ConfigError("sweep.zip: every list must have the same length, got lengths "
                          + ", ".join(str(len(v)) for _, v in parts["zip"]))
    keys = [key for key, _ in parts["grid"] + parts["zip"]]
    if not keys:
        raise ConfigError("sweep: no fields to sweep; fix: add grid = {\"model.size\" = [...]}")
    duplicated = {key for key in keys if keys.count(key) > 1}
    if duplicated:
        raise ConfigError(f"sweep: field {sorted(duplicated)[0]!r} is in both grid and zip")
    return SweepConfig(name=name, grid=parts["grid"], zip=parts["zip"])


def _parse_cluster(table: dict[str, Any]) -> ClusterConfig:
    _reject_unknown(table, SCHEMA["cluster"], "cluster")
    defaults = ClusterConfig()
    scheduler = _choice(table.get("scheduler", defaults.scheduler), SCHEDULERS,
                        "cluster.scheduler")
    numbers = {}
    for name in ("workers", "cores"):
        numbers[name] = _integer(table.get(name, getattr(defaults, name)), f"cluster.{name}")
        if numbers[name] < 1:
            raise ConfigError(f"cluster.{name}: must be >= 1, got {numbers[name]}")
    ranks = _integer(table.get("ranks", defaults.ranks), "cluster.ranks")
    if ranks < 0:
        raise ConfigError(f"cluster.ranks: must be >= 0 (0: from the estimate), got {ranks}")
    memory = _number(table.get("memory", defaults.memory), "cluster.memory")
    if not memory > 0:
        raise ConfigError(f"cluster.memory: must be > 0 GiB, got {memory}")
    walltime = _string(table.get("walltime", defaults.walltime), "cluster.walltime")
    if not WALLTIME.match(walltime):
        raise ConfigError(f"cluster.walltime: expected HH:MM:SS, e.g. '02:00:00', got "
                          f"{walltime!r}")
    optional = {}
    for name in ("queue", "account"):
        value = table.get(name)
        optional[name] = None if value is None else _string(value, f"cluster.{name}")
    return ClusterConfig(scheduler=scheduler, memory=memory, walltime=walltime, ranks=ranks,
                         **numbers, **optional)


def _parse_model(table: dict[str, Any], source: str | None = None) -> ModelConfig:
    if "type" not in table:
        raise ConfigError("model.type: missing; fix: add type = \"lattice\" under [model]")
    model_type = _string(table["type"], "model.type")
    from pipeline.models import MODEL_TYPES  # late import: models import this module

    if model_type not in MODEL_TYPES:
        raise ConfigError(
            f"model.type: unknown model {model_type!r}; expected one of "
            + ", ".join(repr(t) for t in MODEL_TYPES)
        )
    allowed = ["type", *SCHEMA[f"model:{model_type}"]]
    _reject_unknown(table, allowed, "model")
    if model_type == "lattice":
        return _parse_lattice(table)
    from pipeline import model_configs  # parsers of the other model families

    base = Path(source).resolve().parent if source else Path.cwd()
    return model_configs.PARSERS[model_type](table, base)


def _parse_lattice(table: dict[str, Any]) -> LatticeConfig:
    if "size" not in table:
        raise ConfigError("model.size: missing; fix: give sites per axis, e.g. size = [64, 64]")
    sizes_raw = table["size"]
    sizes_list = sizes_raw if isinstance(sizes_raw, list) else [sizes_raw]
    if not sizes_list:
        raise ConfigError("model.size: empty list; fix: give at least one axis, e.g. [100]")
    if len(sizes_list) > MAX_DIMENSIONS:
        raise ConfigError(f"model.size: at most {MAX_DIMENSIONS} axes, got {len(sizes_list)}")
    sizes = _integer_entries(sizes_raw, sizes_list, "model.size", 2,
                             "sites per axis must be >= 2")
    dims = len(sizes)
    boundary = _per_axis(table.get("boundary", "periodic"), dims, "model.boundary", _string)
    for axis, value in enumerate(boundary):
        if value not in BOUNDARIES:
            raise ConfigError(
                f"model.boundary[{axis}]: expected one of "
                + ", ".join(repr(b) for b in BOUNDARIES) + f", got {value!r}"
            )
    forward = _per_axis(table.get("forward", 1.0), dims, "model.forward", _rate)
    backward = _per_axis(table.get("backward", 1.0), dims, "model.backward", _rate)
    for axis in range(dims):
        if forward[axis] + backward[axis] == 0:
            raise ConfigError(
                f"model.forward[{axis}], model.backward[{axis}]: both zero, so axis {axis} is "
                "frozen and the generator is reducible; fix: give one a positive rate"
            )
    disorder = None
    if table.get("disorder") is not None:
        disorder = _parse_disorder(table["disorder"])
    total = math.prod(sizes)
    if total >= 2**62:
        raise ConfigError(f"model.size: {total} states do not fit a 64-bit index")
    return LatticeConfig(
        type="lattice",
        size=tuple(sizes),
        boundary=tuple(boundary),
        forward=tuple(forward),
        backward=tuple(backward),
        disorder=disorder,
    )


def _parse_disorder(table: Any) -> DisorderConfig:
    if not isinstance(table, dict):
        raise ConfigError("model.disorder: expected a table, e.g. [model.disorder]")
    spec = SCHEMA["model.disorder"]
    _reject_unknown(table, spec, "model.disorder")
    on = _string(table.get("on", spec["on"][1]), "model.disorder.on")
    if on not in DISORDER_TARGETS:
        raise ConfigError(f"model.disorder.on: expected 'bonds' or 'sites', got {on!r}")
    law = _string(table.get("law", spec["law"][1]), "model.disorder.law")
    if law not in DISORDER_LAWS:
        raise ConfigError(f"model.disorder.law: expected 'uniform' or 'lognormal', got {law!r}")
    low = _number(table.get("low", spec["low"][1]), "model.disorder.low")
    high = _number(table.get("high", spec["high"][1]), "model.disorder.high")
    sigma = _number(table.get("sigma", spec["sigma"][1]), "model.disorder.sigma")
    seed = _integer(table.get("seed", spec["seed"][1]), "model.disorder.seed")
    if law == "uniform":
        if low <= 0:
            raise ConfigError(f"model.disorder.low: must be > 0 (factors scale rates), got {low}")
        if high < low:
            raise ConfigError(f"model.disorder.high: must be >= low ({low}), got {high}")
    if sigma < 0:
        raise ConfigError(f"model.disorder.sigma: must be >= 0, got {sigma}")
    if seed < 0:
        raise ConfigError(f"model.disorder.seed: must be >= 0, got {seed}")
    return DisorderConfig(on=on, law=law, low=low, high=high, sigma=sigma, seed=seed)


def _parse_solve(table: dict[str, Any]) -> SolveConfig:
    _reject_unknown(table, SCHEMA["solve"], "solve")
    defaults = SolveConfig()
    modes = _integer(table.get("modes", defaults.modes), "solve.modes")
    if modes < 1:
        raise ConfigError(f"solve.modes: must be >= 1 (mode 0 is the stationary one), got {modes}")
    backend = _choice(table.get("backend", defaults.backend), BACKENDS, "solve.backend")
    method = _choice(table.get("method", defaults.method), METHODS, "solve.method")
    dense_limit = _integer(table.get("dense_limit", defaults.dense_limit), "solve.dense_limit")
    if dense_limit < 0:
        raise ConfigError(f"solve.dense_limit: must be >= 0, got {dense_limit}")
    tolerance = _number(table.get("tolerance", defaults.tolerance), "solve.tolerance")
    if not 0 < tolerance < 1:
        raise ConfigError(f"solve.tolerance: must be in (0, 1), got {tolerance}")
    max_search = _integer(table.get("max_search", defaults.max_search), "solve.max_search")
    if max_search < modes:
        raise ConfigError(f"solve.max_search: must be >= solve.modes ({modes}), got {max_search}")
    return SolveConfig(
        modes=modes,
        backend=backend,
        method=method,
        dense_limit=dense_limit,
        tolerance=tolerance,
        max_search=max_search,
        vectors=_boolean(table.get("vectors", defaults.vectors), "solve.vectors"),
        stationary=_boolean(table.get("stationary", defaults.stationary), "solve.stationary"),
        inner=_choice(table.get("inner", defaults.inner), INNER_SOLVERS, "solve.inner"),
        preconditioner=_choice(table.get("preconditioner", defaults.preconditioner),
                               PRECONDITIONERS, "solve.preconditioner"),
        inner_tolerance=_inner_tolerance(table.get("inner_tolerance", defaults.inner_tolerance)),
        petsc=_petsc_options(table.get("petsc", {})),
        symmetrize=_choice(table.get("symmetrize", defaults.symmetrize), SYMMETRIZE,
                           "solve.symmetrize"),
        closed_classes=_choice(table.get("closed_classes", defaults.closed_classes),
                               CLOSED_CLASSES, "solve.closed_classes"),
    )


def _inner_tolerance(value: Any) -> float:
    tolerance = _number(value, "solve.inner_tolerance")
    if not 0 < tolerance < 1:
        raise ConfigError(f"solve.inner_tolerance: must be in (0, 1), got {tolerance}")
    return tolerance


def _petsc_options(table: Any) -> dict[str, Any]:
    """``[solve.petsc]``: option names (letters, digits, '_', no leading '-') to scalars."""
    if not isinstance(table, dict):
        raise ConfigError("solve.petsc: expected a table of PETSc options, e.g. "
                          "[solve.petsc] eps_ncv = 128")
    options = {}
    for name, value in table.items():
        if not PETSC_OPTION.fullmatch(name):
            raise ConfigError(f"solve.petsc.{name}: not a PETSc option name; write it without "
                              "the leading '-', e.g. eps_ncv = 128")
        if isinstance(value, bool | int | float | str):
            options[name] = value
        else:
            raise ConfigError(f"solve.petsc.{name}: expected a number, string or boolean, got "
                              f"{type(value).__name__}")
    return options


def _parse_verify(table: dict[str, Any]) -> VerifyConfig:
    _reject_unknown(table, SCHEMA["verify"], "verify")
    defaults = VerifyConfig()
    tolerance = _number(table.get("tolerance", defaults.tolerance), "verify.tolerance")
    gap = _number(table.get("gap_tolerance", defaults.gap_tolerance), "verify.gap_tolerance")
    residual = _number(
        table.get("residual_tolerance", defaults.residual_tolerance), "verify.residual_tolerance"
    )
    for label, value in (("verify.tolerance", tolerance), ("verify.gap_tolerance", gap),
                         ("verify.residual_tolerance", residual)):
        if not value > 0:
            raise ConfigError(f"{label}: must be > 0, got {value}")
    return VerifyConfig(tolerance=tolerance, gap_tolerance=gap, residual_tolerance=residual)


# ---------------------------------------------------------------------------------------
# Small validators: each names the field in its message.


def _table(raw: dict[str, Any], name: str) -> dict[str, Any]:
    value = raw.get(name, {})
    if not isinstance(value, dict):
        raise ConfigError(f"{name}: expected a table [{name}], got {type(value).__name__}")
    return value


def _reject_unknown(table: dict[str, Any], allowed: Any, prefix: str) -> None:
    allowed = list(allowed)
    for key in table:
        if key not in allowed:
            label = f"{prefix}.{key}" if prefix else key
            close = difflib.get_close_matches(key, allowed, n=1)
            hint = f"did you mean {close[0]!r}? " if close else ""
            raise ConfigError(
                f"{label}: unknown field; {hint}allowed: " + ", ".join(allowed)
            )


def _string(value: Any, label: str) -> str:
    if not isinstance(value, str):
        raise ConfigError(f"{label}: expected a string, got {value!r}")
    return value


def _choice(value: Any, choices: tuple[str, ...], label: str) -> str:
    text = _string(value, label)
    if text not in choices:
        raise ConfigError(
            f"{label}: expected one of " + ", ".join(repr(c) for c in choices) + f", got {text!r}"
        )
    return text


def _boolean(value: Any, label: str) -> bool:
    if not isinstance(value, bool):
        raise ConfigError(f"{label}: expected true or false, got {value!r}")
    return value


def _integer(value: Any, label: str) -> int:
    if isinstance(value, bool) or not isinstance(value, int):
        if isinstance(value, float) and value.is_integer():
            return int(value)
        raise ConfigError(f"{label}: expected a whole number, got {value!r}")
    return value


def _integer_entries(raw: Any, entries: list[Any], field: str, minimum: int,
                     requirement: str) -> list[int]:
    """Whole numbers >= ``minimum`` from ``entries`` (``raw`` as written: a list names its
    entries ``field[i]`` in errors, a single value ``field``)."""
    numbers = []
    for index, value in enumerate(entries):  # a loop over axes or species
        label = f"{field}[{index}]" if isinstance(raw, list) else field
        number = _integer(value, label)
        if number < minimum:
            raise ConfigError(f"{label}: {requirement}, got {number}")
        numbers.append(number)
    return numbers


def _number(value: Any, label: str) -> float:
    if isinstance(value, bool) or not isinstance(value, int | float):
        raise ConfigError(f"{label}: expected a number, got {value!r}")
    number = float(value)
    if not math.isfinite(number):
        raise ConfigError(f"{label}: must be finite, got {value!r}")
    return number


def _rate(value: Any, label: str) -> float:
    number = _number(value, label)
    if number < 0:
        shown = int(number) if number.is_integer() else number
        raise ConfigError(f"{label}: rate must be >= 0, got {shown}")
    return number


def _per_axis(value: Any, dims: int, label: str, convert: Any) -> list[Any]:
    """A per-axis field: a scalar applies to every axis, a list needs one entry per axis."""
    if isinstance(value, list):
        if len(value) != dims:
            raise ConfigError(
                f"{label}: expected {dims} entries (one per axis of model.size), got {len(value)}"
            )
        return [convert(item, f"{label}[{axis}]") for axis, item in enumerate(value)]
    return [convert(value, label)] * dims


def _plain(data: Any) -> Any:
    if isinstance(data, dict):
        return {str(k): _plain(v) for k, v in data.items() if v is not None}
    if isinstance(data, list | tuple):
        return [_plain(v) for v in data]
    return data


def describe_schema() -> str:
    """The config reference as Markdown (README.md reproduces it verbatim)."""
    lines = []
    for section, fields in SCHEMA.items():
        if ":" in section:
            table, kind = section.split(":")
            lines.append(f"### `[{table}]` with `type = \"{kind}\"`")
        else:
            lines.append(f"### `[{section}]`")
        lines.append("")
        lines.append("| field | type | default | meaning |")
        lines.append("| --- | --- | --- | --- |")
        for name, (kind, default, meaning) in fields.items():
            if default is REQUIRED:
                shown = "required"
            elif default is None:
                shown = "—"
            else:
                shown = f"`{json.dumps(default)}`"
            meaning = meaning.replace("|", "\\|")
            lines.append(f"| `{name}` | {kind} | {shown} | {meaning} |")
        lines.append("")
    return "\n".join(lines).rstrip() + "\n"

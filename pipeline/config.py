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
    "LatticeConfig",
    "RunConfig",
    "SolveConfig",
    "StoreConfig",
    "VerifyConfig",
    "apply_override",
    "describe_schema",
    "fingerprint",
    "load_config",
    "parse_config",
]

BOUNDARIES = ("periodic", "reflecting", "absorbing")
BACKENDS = ("auto", "scipy", "slepc")
METHODS = ("auto", "dense", "shift-invert")
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
        "type": ("string", REQUIRED, "model family; one of: lattice"),
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
    "solve": {
        "modes": ("int", 10, "slowest modes wanted, the stationary mode 0 included (>= 1)"),
        "backend": (
            "string",
            "auto",
            "'scipy' (one process) or 'auto'; 'slepc' is reserved for the PETSc/SLEPc backend "
            "under MPI",
        ),
        "method": (
            "string",
            "auto",
            "'dense' (full eigendecomposition, certified complete), 'shift-invert' "
            "(sparse LU + Arnoldi with a completeness certificate) or 'auto' (dense up to "
            "solve.dense_limit states)",
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
    },
}


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


@dataclass(frozen=True)
class Config:
    """A validated config. ``raw`` is the resolved table tree (after overrides)."""

    run: RunConfig
    model: LatticeConfig
    solve: SolveConfig
    verify: VerifyConfig
    store: StoreConfig
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
    node: Any = raw
    for depth, part in enumerate(parts):
        match = _KEY_PART.match(part)
        if not match:
            raise ConfigError(f"--set {key!r}: {part!r} is not a field name")
        name, index = match.group(1), match.group(2)
        last = depth == len(parts) - 1
        if not isinstance(node, dict):
            raise ConfigError(f"--set {key!r}: {'.'.join(parts[:depth])} is not a table")
        if index is None:
            if last:
                node[name] = value
            else:
                node = node.setdefault(name, {})
            continue
        current = node.get(name)
        if not isinstance(current, list):
            raise ConfigError(f"--set {key!r}: {name} is not a list in the config; set it whole")
        position = int(index)
        if position >= len(current):
            raise ConfigError(
                f"--set {key!r}: index {position} out of range ({name} has {len(current)})"
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
    _reject_unknown(raw, ("run", "model", "solve", "analyze", "evolve", "verify", "store"), "")
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
    model = _parse_model(_table(raw, "model"))
    solve = _parse_solve(_table(raw, "solve"))
    verify = _parse_verify(_table(raw, "verify"))
    store_table = _table(raw, "store")
    _reject_unknown(store_table, SCHEMA["store"], "store")
    store = StoreConfig(path=_string(store_table.get("path", StoreConfig.path), "store.path"))
    from pipeline.config_analysis import parse_analyze, parse_evolve

    analyze = parse_analyze(_table(raw, "analyze"))
    evolve = parse_evolve(_table(raw, "evolve")) if "evolve" in raw else None
    return Config(run=run, model=model, solve=solve, verify=verify, store=store,
                  analyze=analyze, evolve=evolve, source=source, raw=raw)


def _parse_model(table: dict[str, Any]) -> LatticeConfig:
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
    return _parse_lattice(table)


def _parse_lattice(table: dict[str, Any]) -> LatticeConfig:
    if "size" not in table:
        raise ConfigError("model.size: missing; fix: give sites per axis, e.g. size = [64, 64]")
    sizes_raw = table["size"]
    sizes_list = sizes_raw if isinstance(sizes_raw, list) else [sizes_raw]
    if not sizes_list:
        raise ConfigError("model.size: empty list; fix: give at least one axis, e.g. [100]")
    if len(sizes_list) > MAX_DIMENSIONS:
        raise ConfigError(f"model.size: at most {MAX_DIMENSIONS} axes, got {len(sizes_list)}")
    sizes = []
    for axis, value in enumerate(sizes_list):
        label = f"model.size[{axis}]" if isinstance(sizes_raw, list) else "model.size"
        number = _integer(value, label)
        if number < 2:
            raise ConfigError(f"{label}: sites per axis must be >= 2, got {number}")
        sizes.append(number)
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
        symmetrize=_choice(table.get("symmetrize", defaults.symmetrize), SYMMETRIZE,
                           "solve.symmetrize"),
        closed_classes=_choice(table.get("closed_classes", defaults.closed_classes),
                               CLOSED_CLASSES, "solve.closed_classes"),
    )


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

"""Parsing of the ``[analyze]`` and ``[evolve]`` tables (fields declared in ``config.SCHEMA``)."""

from __future__ import annotations

from typing import Any

import numpy as np

from pipeline.config import (
    SCHEMA,
    AnalyzeConfig,
    EvolveConfig,
    _integer,
    _number,
    _reject_unknown,
)
from pipeline.errors import ConfigError

__all__ = ["parse_analyze", "parse_evolve"]

MAX_TIMES = 100_000


def _state(value: Any, label: str) -> int | tuple[int, ...]:
    """A flat state index (int >= 0) or a lattice coordinate (list of int >= 0)."""
    if isinstance(value, list):
        if not value:
            raise ConfigError(f"{label}: empty coordinate list; fix: one entry per axis")
        coordinate = tuple(_integer(x, f"{label}[{k}]") for k, x in enumerate(value))
        if min(coordinate) < 0:
            raise ConfigError(f"{label}: coordinates must be >= 0, got {list(coordinate)}")
        return coordinate
    index = _integer(value, label)
    if index < 0:
        raise ConfigError(f"{label}: a state index must be >= 0, got {index}")
    return index


def parse_analyze(table: dict[str, Any]) -> AnalyzeConfig:
    _reject_unknown(table, SCHEMA["analyze"], "analyze")
    defaults = AnalyzeConfig()
    start = None if table.get("start") is None else _state(table["start"], "analyze.start")
    tolerance = _number(table.get("balance_tolerance", defaults.balance_tolerance),
                        "analyze.balance_tolerance")
    if not 0 < tolerance < 1:
        raise ConfigError(f"analyze.balance_tolerance: must be in (0, 1), got {tolerance}")
    return AnalyzeConfig(start=start, balance_tolerance=tolerance)


def parse_evolve(table: dict[str, Any]) -> EvolveConfig:
    _reject_unknown(table, SCHEMA["evolve"], "evolve")
    if "start" not in table:
        raise ConfigError("evolve.start: missing; fix: a state index, a coordinate list, "
                          "'stationary' or a .npy file")
    raw_start = table["start"]
    if isinstance(raw_start, str):
        if raw_start != "stationary" and not raw_start.endswith(".npy"):
            raise ConfigError(f"evolve.start: expected 'stationary' or a path ending in .npy, "
                              f"got {raw_start!r}")
        start: int | tuple[int, ...] | str = raw_start
    else:
        start = _state(raw_start, "evolve.start")
    has_times, has_grid = table.get("times") is not None, table.get("t_end") is not None
    if has_times == has_grid:
        raise ConfigError("evolve.times: give either times = [...] or t_end (with steps), "
                          "not both or neither")
    if has_times:
        if not isinstance(table["times"], list) or not table["times"]:
            raise ConfigError("evolve.times: expected a non-empty list of times, e.g. [0, 1, 5]")
        times = [_number(t, f"evolve.times[{k}]") for k, t in enumerate(table["times"])]
        if min(times) < 0 or any(b <= a for a, b in zip(times, times[1:], strict=False)):
            raise ConfigError(f"evolve.times: must be >= 0 and strictly increasing, got {times}")
        if "steps" in table:
            raise ConfigError("evolve.steps: only with t_end; remove it or use t_end")
    else:
        t_end = _number(table["t_end"], "evolve.t_end")
        if not t_end > 0:
            raise ConfigError(f"evolve.t_end: must be > 0, got {t_end}")
        steps = _integer(table.get("steps", SCHEMA["evolve"]["steps"][1]), "evolve.steps")
        if not 2 <= steps <= MAX_TIMES:
            raise ConfigError(f"evolve.steps: must be in [2, {MAX_TIMES}], got {steps}")
        times = np.linspace(0.0, t_end, steps).tolist()
    if len(times) > MAX_TIMES:
        raise ConfigError(f"evolve.times: at most {MAX_TIMES} times, got {len(times)}")
    limit = _integer(table.get("full_limit", SCHEMA["evolve"]["full_limit"][1]),
                     "evolve.full_limit")
    if limit < 0:
        raise ConfigError(f"evolve.full_limit: must be >= 0, got {limit}")
    modes = _integer(table.get("modes", 0), "evolve.modes")
    if modes < 0:
        raise ConfigError(f"evolve.modes: must be >= 0 (0: no mode expansion), got {modes}")
    return EvolveConfig(start=start, times=tuple(times), full_limit=limit, modes=modes)

"""Parsers of the ``[model]`` table for the exclusion, reactions, network and matrix families.

The fields are declared in :data:`pipeline.config.SCHEMA` (``model:<type>``); each parser
turns a TOML table into the frozen dataclass of :mod:`pipeline.config`, raising
:class:`~pipeline.errors.ConfigError` with one line that names the field. File paths are
resolved against ``base``, the directory of the config file.
"""

from __future__ import annotations

import math
import re
from collections.abc import Callable
from pathlib import Path
from typing import Any

from pipeline.config import (
    SCHEMA,
    ExclusionConfig,
    MatrixConfig,
    NetworkConfig,
    ReactionConfig,
    ReactionsConfig,
    _boolean,
    _choice,
    _integer,
    _integer_entries,
    _number,
    _rate,
    _reject_unknown,
    _string,
)
from pipeline.errors import ConfigError

__all__ = ["PARSERS"]

MAX_STATES = 2**34  # beyond this nothing fits in memory anyway
NAME = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def _default(section: str, name: str) -> Any:
    return SCHEMA[section][name][1]


def parse_exclusion(table: dict[str, Any], base: Path) -> ExclusionConfig:
    section = "model:exclusion"
    if "sites" not in table:
        raise ConfigError("model.sites: missing; fix: give the number of sites, e.g. sites = 24")
    sites = _integer(table["sites"], "model.sites")
    if sites < 2:
        raise ConfigError(f"model.sites: must be >= 2, got {sites}")
    boundary = _choice(table.get("boundary", _default(section, "boundary")),
                       ("periodic", "open"), "model.boundary")
    right = _rate(table.get("right", _default(section, "right")), "model.right")
    left = _rate(table.get("left", _default(section, "left")), "model.left")
    if right + left == 0:
        raise ConfigError("model.right, model.left: both zero, so nothing moves; fix: give one "
                          "a positive rate")
    ends = ("alpha", "beta", "gamma", "delta")
    if boundary == "periodic":
        for name in ends:
            if name in table:
                raise ConfigError(f"model.{name}: only for boundary = 'open'; fix: remove it")
        if "particles" not in table:
            raise ConfigError("model.particles: missing; fix: a ring needs a particle number, "
                              "e.g. particles = 12")
        particles = _integer(table["particles"], "model.particles")
        if not 0 <= particles <= sites:
            raise ConfigError(f"model.particles: must be in 0..{sites} (model.sites), got "
                              f"{particles}")
        if math.comb(sites, particles) > MAX_STATES or sites > 62:
            raise ConfigError(f"model.sites: C({sites}, {particles}) states do not fit in "
                              "memory; fix: fewer sites")
        return ExclusionConfig("exclusion", sites, boundary, particles, right, left)
    if "particles" in table:
        raise ConfigError("model.particles: only for boundary = 'periodic' (an open segment "
                          "exchanges particles with its reservoirs); fix: remove it")
    if sites > 34:
        raise ConfigError(f"model.sites: 2^{sites} states do not fit in memory; fix: at most 34 "
                          "sites on an open segment")
    rates = {name: _rate(table.get(name, _default(section, name)), f"model.{name}")
             for name in ends}
    return ExclusionConfig("exclusion", sites, boundary, None, right, left, **rates)


def parse_reactions(table: dict[str, Any], base: Path) -> ReactionsConfig:
    section = "model:reactions"
    if "species" not in table:
        raise ConfigError("model.species: missing; fix: e.g. species = [\"A\", \"B\"]")
    raw_species = table["species"]
    if not isinstance(raw_species, list) or not raw_species:
        raise ConfigError(f"model.species: expected a non-empty list of names, got "
                          f"{raw_species!r}")
    species = []
    for index, value in enumerate(raw_species):
        name = _string(value, f"model.species[{index}]")
        if not NAME.fullmatch(name):
            raise ConfigError(f"model.species[{index}]: {name!r} is not a name (letters, digits, "
                              "'_', not starting with a digit)")
        if name in species:
            raise ConfigError(f"model.species[{index}]: {name!r} is listed twice")
        species.append(name)
    if "bounds" not in table:
        raise ConfigError("model.bounds: missing; fix: the largest copy number per species, "
                          "e.g. bounds = [50, 50]")
    raw_bounds = table["bounds"]
    bound_list = raw_bounds if isinstance(raw_bounds, list) else [raw_bounds] * len(species)
    if len(bound_list) != len(species):
        raise ConfigError(f"model.bounds: expected {len(species)} entries (one per species), "
                          f"got {len(bound_list)}")
    bounds = _integer_entries(raw_bounds, bound_list, "model.bounds", 1, "must be >= 1")
    if math.prod(b + 1 for b in bounds) > MAX_STATES:
        raise ConfigError("model.bounds: the projection has too many states; fix: smaller "
                          "bounds")
    raw_parameters = table.get("parameters", {})
    if not isinstance(raw_parameters, dict):
        raise ConfigError("model.parameters: expected a table, e.g. parameters = {k = 1.0}")
    parameters = []
    for name, value in raw_parameters.items():
        if not NAME.fullmatch(name):
            raise ConfigError(f"model.parameters.{name}: not a name")
        if name in species:
            raise ConfigError(f"model.parameters.{name}: clashes with the species {name!r}; "
                              "fix: rename the parameter")
        parameters.append((name, _number(value, f"model.parameters.{name}")))
    truncation = _choice(table.get("truncation", _default(section, "truncation")),
                         ("leak", "reflect"), "model.truncation")
    raw_reactions = table.get("reactions")
    if not isinstance(raw_reactions, list) or not raw_reactions:
        raise ConfigError("model.reactions: missing; fix: add [[model.reactions]] tables with "
                          "reactants, products and rate")
    reactions = tuple(_parse_reaction(item, index, species)
                      for index, item in enumerate(raw_reactions))
    return ReactionsConfig("reactions", tuple(species), tuple(bounds), tuple(parameters),
                           truncation, reactions)


def _parse_reaction(item: Any, index: int, species: list[str]) -> ReactionConfig:
    label = f"model.reactions[{index}]"
    if not isinstance(item, dict):
        raise ConfigError(f"{label}: expected a table [[model.reactions]]")
    _reject_unknown(item, SCHEMA["model.reactions"], label)
    name = _string(item.get("name", f"reaction {index}"), f"{label}.name")

    def counts(key: str) -> tuple[tuple[str, int], ...]:
        value = item.get(key, {})
        if not isinstance(value, dict):
            raise ConfigError(f"{label}.{key}: expected a table species -> count, e.g. "
                              "{A = 1}")
        pairs = []
        for species_name, number in value.items():
            if species_name not in species:
                raise ConfigError(f"{label}.{key}: unknown species {species_name!r}; "
                                  "model.species has " + ", ".join(species))
            count = _integer(number, f"{label}.{key}.{species_name}")
            if count < 0:
                raise ConfigError(f"{label}.{key}.{species_name}: must be >= 0, got {count}")
            pairs.append((species_name, count))
        return tuple(pairs)

    reactants, products = counts("reactants"), counts("products")
    if dict(reactants) == dict(products) or not any(
        dict(products).get(s, 0) != dict(reactants).get(s, 0) for s in species
    ):
        raise ConfigError(f"{label}: reactants and products are equal, so the reaction changes "
                          "nothing; fix: remove it")
    has_rate, has_propensity = "rate" in item, "propensity" in item
    if has_rate == has_propensity:
        raise ConfigError(f"{label}: give exactly one of rate (mass action) and propensity "
                          "(an expression)")
    rate = _rate(item["rate"], f"{label}.rate") if has_rate else None
    propensity = _string(item["propensity"], f"{label}.propensity") if has_propensity else None
    return ReactionConfig(name, reactants, products, rate, propensity)


def _path(value: Any, base: Path, label: str) -> str:
    text = _string(value, label)
    path = Path(text).expanduser()
    if not path.is_absolute():
        path = base / path
    if not path.is_file():
        raise ConfigError(f"{label}: file {text!r} not found (looked in {str(path.parent)!r}); "
                          "fix: check the path")
    return str(path.resolve())


def _model_file(table: dict[str, Any], base: Path, what: str, example: str) -> str:
    """The required ``model.file``, resolved against the config's folder."""
    if "file" not in table:
        raise ConfigError(f"model.file: missing; fix: give {what}, e.g. file = \"{example}\"")
    return _path(table["file"], base, "model.file")


def parse_network(table: dict[str, Any], base: Path) -> NetworkConfig:
    section = "model:network"
    file = _model_file(table, base, "the graph file", "edges.csv")
    fmt = _choice(table.get("format", _default(section, "format")),
                  ("auto", "edgelist", "mtx", "graphml"), "model.format")
    if fmt == "auto":
        suffix = Path(file).suffix.lower()
        fmt = {".csv": "edgelist", ".tsv": "edgelist", ".txt": "edgelist", ".mtx": "mtx",
               ".graphml": "graphml"}.get(suffix, "")
        if not fmt:
            raise ConfigError(f"model.format: cannot tell the format of {Path(file).name!r} from "
                              "its extension; fix: set format = 'edgelist', 'mtx' or 'graphml'")
    walk = _choice(table.get("walk", _default(section, "walk")), ("edge", "node"), "model.walk")
    node_rate = _rate(table.get("node_rate", _default(section, "node_rate")), "model.node_rate")
    if node_rate <= 0:
        raise ConfigError(f"model.node_rate: must be > 0, got {node_rate}")
    teleport = _rate(table.get("teleport", _default(section, "teleport")), "model.teleport")
    restart = table.get("restart")
    if restart is not None:
        restart = str(restart) if isinstance(restart, int) and not isinstance(
            restart, bool) else _string(restart, "model.restart")
    nodes = table.get("nodes")
    if nodes is not None:
        if fmt != "edgelist":
            raise ConfigError("model.nodes: only for edge lists (Matrix Market and GraphML list "
                              "their nodes); fix: remove it")
        if not isinstance(nodes, list) or not nodes:
            raise ConfigError("model.nodes: expected a non-empty list of node labels")
        nodes = tuple(str(_string(v, f"model.nodes[{i}]")) if not isinstance(v, int) else str(v)
                      for i, v in enumerate(nodes))
        if len(set(nodes)) != len(nodes):
            raise ConfigError("model.nodes: a label is listed twice")
    return NetworkConfig(
        "network", file, fmt,
        _boolean(table.get("directed", _default(section, "directed")), "model.directed"),
        _string(table.get("weight", _default(section, "weight")), "model.weight"),
        walk, node_rate, teleport, restart, nodes,
    )


def parse_matrix(table: dict[str, Any], base: Path) -> MatrixConfig:
    section = "model:matrix"
    file = _model_file(table, base, "the generator file", "generator.mtx")
    if Path(file).suffix.lower() not in (".mtx", ".npz"):
        raise ConfigError(f"model.file: {Path(file).name!r} is neither Matrix Market (.mtx) nor "
                          "scipy .npz; fix: save it with scipy.io.mmwrite or "
                          "scipy.sparse.save_npz")
    convention = _choice(table.get("convention", _default(section, "convention")),
                         ("columns", "rows"), "model.convention")
    diagonal = _choice(table.get("diagonal", _default(section, "diagonal")),
                       ("given", "from-rates"), "model.diagonal")
    conserving = _boolean(table.get("conserving", _default(section, "conserving")),
                          "model.conserving")
    return MatrixConfig("matrix", file, convention, diagonal, conserving)


PARSERS: dict[str, Callable[[dict[str, Any], Path], Any]] = {
    "exclusion": parse_exclusion,
    "reactions": parse_reactions,
    "network": parse_network,
    "matrix": parse_matrix,
}

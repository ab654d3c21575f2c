"""A random walk on a weighted graph read from an edge list, Matrix Market or GraphML file.

States are the graph's nodes, numbered in the order they first appear in the file (edge
lists), by index (Matrix Market: state ``i`` is row/column ``i``, label ``i + 1``), or in
document order (GraphML). Walks:

* ``edge``: every edge ``a -> b`` of weight ``w`` is a jump at rate ``w``;
* ``node``: node ``a`` is left at rate ``node_rate``, to ``b`` with probability
  ``w(a, b) / sum_c w(a, c)`` (nodes without out-edges do not move).

Undirected graphs give both directions; self-loops are ignored (they change nothing).
Optional restart: from every node, a jump at rate ``teleport`` to the ``restart`` node, or to
a uniformly random node (then ``W`` has ``n^2`` entries, so this is limited to
:data:`MAX_UNIFORM_RESTART` nodes). With uniform restart and the node walk at rate 1, the
stationary law is PageRank with damping ``alpha = 1 / (1 + teleport)`` on graphs without
dangling nodes (``W p = 0`` reads ``p = alpha M p + (1 - alpha) u``; Page, Brin, Motwani and
Winograd 1999, The PageRank Citation Ranking).
"""

from __future__ import annotations

import csv
from pathlib import Path
from typing import Any

import numpy as np

from pipeline.errors import ModelError
from pipeline.models.base import CsrRows, Model

__all__ = ["GraphWalk", "read_graph"]

MAX_UNIFORM_RESTART = 4096


def read_graph(path: str, fmt: str, directed: bool, weight: str = "weight",
               nodes: tuple[str, ...] | None = None,
               ) -> tuple[list[str], np.ndarray, np.ndarray, np.ndarray, bool]:
    """``(labels, sources, targets, weights, directed)`` of a graph file (one-line errors);
    ``nodes`` (edge lists) fixes the labels and their order."""
    name = Path(path).name
    if fmt == "edgelist":
        return (*_read_edgelist(path, name, nodes), directed)
    if fmt == "mtx":
        from pipeline.models.matrix import load_sparse

        matrix = load_sparse(path).tocoo()
        if matrix.shape[0] != matrix.shape[1]:
            raise ModelError(f"model.file: {name!r} is {matrix.shape[0]} x {matrix.shape[1]}; an "
                             "adjacency matrix is square")
        labels = [str(i + 1) for i in range(matrix.shape[0])]
        return labels, matrix.row.astype(np.int64), matrix.col.astype(np.int64), \
            matrix.data.astype(float), directed
    import networkx as nx

    _check_graphml_nodes(path, name)
    try:
        graph = nx.read_graphml(path)
    except Exception as exc:  # networkx raises several parser types  # noqa: BLE001
        detail = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
        raise ModelError(f"model.file: {name!r} is not readable GraphML ({detail})") from None
    labels = [str(node) for node in graph.nodes]
    index = {node: i for i, node in enumerate(graph.nodes)}
    sources, targets, weights = [], [], []
    for a, b, data in graph.edges(data=True):  # a loop over edges while reading the file
        sources.append(index[a])
        targets.append(index[b])
        value = data.get(weight, 1.0)
        try:
            weights.append(float(value))
        except (TypeError, ValueError):
            raise ModelError(f"model.weight: edge {a!r} -> {b!r} has {weight} = {value!r}, not a "
                             "number") from None
    return (labels, np.array(sources, dtype=np.int64), np.array(targets, dtype=np.int64),
            np.array(weights, dtype=float), graph.is_directed())


def _check_graphml_nodes(path: str, name: str) -> None:
    """Every GraphML edge must join declared ``<node>`` elements (a reader would add them)."""
    import xml.etree.ElementTree as ET

    try:
        root = ET.parse(path).getroot()
    except ET.ParseError as exc:
        raise ModelError(f"model.file: {name!r} is not well-formed XML ({exc})") from None
    nodes = {element.get("id") for element in root.iter() if element.tag.endswith("}node")
             or element.tag == "node"}
    for element in root.iter():
        if element.tag.endswith("}edge") or element.tag == "edge":
            for end in ("source", "target"):
                if element.get(end) not in nodes:
                    raise ModelError(f"model.file: {name!r} has an edge {element.get('source')!r}"
                                     f" -> {element.get('target')!r} to the missing node "
                                     f"{element.get(end)!r}; fix: declare it as a <node>")


def _read_edgelist(path: str, name: str, nodes: tuple[str, ...] | None = None):
    text = Path(path).read_text(encoding="utf-8", errors="replace")
    delimiter = "\t" if "\t" in text.split("\n", 1)[0] or path.lower().endswith(".tsv") else ","
    rows = [row for row in csv.reader(text.splitlines(), delimiter=delimiter)
            if row and not row[0].lstrip().startswith("#")]
    if rows and len(rows[0]) >= 2 and [c.strip().lower() for c in rows[0][:2]] == [
            "source", "target"]:
        rows = rows[1:]  # a header
    if not rows:
        raise ModelError(f"model.file: {name!r} lists no edges")
    labels: dict[str, int] = {} if nodes is None else {x: i for i, x in enumerate(nodes)}
    sources, targets, weights = [], [], []
    for line, row in enumerate(rows, start=1):  # a loop over the file's lines
        if len(row) not in (2, 3):
            raise ModelError(f"model.file: {name!r} line {line}: expected source, target[, rate], "
                             f"got {len(row)} fields")
        a, b = row[0].strip(), row[1].strip()
        if not a or not b:
            raise ModelError(f"model.file: {name!r} line {line}: empty node label")
        if nodes is not None:
            for label in (a, b):
                if label not in labels:
                    raise ModelError(f"model.file: {name!r} line {line}: edge {a!r} -> {b!r} "
                                     f"goes to the missing node {label!r} (not in model.nodes)")
        rate = 1.0
        if len(row) == 3:
            try:
                rate = float(row[2])
            except ValueError:
                raise ModelError(f"model.file: {name!r} line {line}: rate {row[2].strip()!r} is "
                                 "not a number") from None
        sources.append(labels.setdefault(a, len(labels)))
        targets.append(labels.setdefault(b, len(labels)))
        weights.append(rate)
    return (list(labels), np.array(sources, dtype=np.int64), np.array(targets, dtype=np.int64),
            np.array(weights, dtype=float))


class GraphWalk(CsrRows, Model):
    """Random walk on a graph; see the module docstring."""

    name = "network"

    def __init__(self, labels: list[str], sources: np.ndarray, targets: np.ndarray,
                 weights: np.ndarray, directed: bool = True, walk: str = "edge",
                 node_rate: float = 1.0, teleport: float = 0.0, restart: str | None = None,
                 source: str = "graph") -> None:
        import scipy.sparse as sp

        n = len(labels)
        name = Path(source).name
        if n == 0:
            raise ModelError(f"model.file: {name!r} has no nodes")
        bad = ~np.isfinite(weights) | (weights < 0)
        if bad.any():
            at = int(np.argmax(bad))
            raise ModelError(f"model.file: {name!r} edge {labels[sources[at]]!r} -> "
                             f"{labels[targets[at]]!r} has rate {weights[at]}; rates must be "
                             "finite and >= 0")
        if not directed:
            sources, targets = np.concatenate([sources, targets]), np.concatenate(
                [targets, sources])
            weights = np.concatenate([weights, weights])
        keep = (sources != targets) & (weights > 0)
        sources, targets, weights = sources[keep], targets[keep], weights[keep]
        # A[b, a] = weight of a -> b (columns are sources, as in W).
        A = sp.csr_matrix((weights, (targets, sources)), shape=(n, n))
        A.sum_duplicates()
        out_weight = np.asarray(A.sum(axis=0)).ravel()
        if walk == "node":
            scale = np.divide(node_rate, out_weight, out=np.zeros(n), where=out_weight > 0)
            A = (A @ sp.diags(scale)).tocsr()
        if teleport > 0:
            if restart is not None:
                if restart not in labels:
                    raise ModelError(f"model.restart: node {restart!r} is not in "
                                     f"{name!r}; nodes are e.g. "
                                     + ", ".join(repr(x) for x in labels[:5]))
                target = labels.index(restart)
                jump = sp.csr_matrix((np.full(n, teleport), (np.full(n, target), np.arange(n))),
                                     shape=(n, n))
            else:
                if n > MAX_UNIFORM_RESTART:
                    raise ModelError(f"model.restart: uniform restart on {n} nodes makes W dense "
                                     f"(n^2 entries; at most {MAX_UNIFORM_RESTART} nodes); fix: "
                                     "name a restart node")
                jump = sp.csr_matrix(np.full((n, n), teleport / n))
            jump.setdiag(0.0)
            A = (A + jump).tocsr()
            A.eliminate_zeros()
        exits = np.asarray(A.sum(axis=0)).ravel()
        W = (A - sp.diags(exits)).tocsr()
        W.sum_duplicates()
        W.sort_indices()
        self.W, self.labels = W, list(labels)
        self.directed, self.walk, self.node_rate = directed, walk, node_rate
        self.teleport, self.restart, self.source = teleport, restart, str(source)

    @classmethod
    def from_config(cls, config: Any) -> GraphWalk:
        labels, sources, targets, weights, directed = read_graph(
            config.file, config.format, config.directed, config.weight, config.nodes)
        return cls(labels, sources, targets, weights, directed, config.walk, config.node_rate,
                   config.teleport, config.restart, source=config.file)

    @property
    def n_states(self) -> int:
        return self.W.shape[0]

    @property
    def conserving(self) -> bool:
        return True

    def state_labels(self, start: int, stop: int) -> dict[str, np.ndarray]:
        return {"node": np.array(self.labels[start:stop], dtype=object).astype(str)}

    def describe(self) -> dict[str, Any]:
        info = super().describe()
        info.update(file=self.source, directed=self.directed, walk=self.walk,
                    node_rate=self.node_rate, teleport=self.teleport, restart=self.restart,
                    edges=int(self.W.nnz - self.n_states))
        return info

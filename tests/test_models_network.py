"""Graph walks: file formats, networkx references (PageRank, Laplacian spectrum), bad input."""

from __future__ import annotations

import networkx as nx
import numpy as np
import pytest
import scipy.io
import scipy.sparse as sp

from pipeline.config import load_config
from pipeline.models import build_model

from .conftest import write_config
from .model_helpers import available_backends, check_error, dense_W, solve

BACKENDS = available_backends()


def network_model(tmp_path, file, extra=""):
    path = write_config(tmp_path, "walk", f'[model]\ntype = "network"\nfile = "{file}"\n{extra}')
    return build_model(load_config(path).model)


def write_karate(tmp_path, weighted: bool):
    graph = nx.karate_club_graph()  # Zachary 1977, shipped with networkx
    for _, _, data in graph.edges(data=True):
        data["weight"] = float(data.get("weight", 1)) if weighted else 1.0
    nx.write_graphml(graph, tmp_path / "karate.graphml")
    return graph


@pytest.mark.parametrize("backend_name", BACKENDS)
def test_undirected_unit_walk_spectrum_is_minus_the_laplacian(tmp_path, backend_name):
    # An undirected walk with unit rates per edge has W = -L (L = D - A, the graph
    # Laplacian), so its eigenvalues are minus networkx.laplacian_spectrum (Chung 1997,
    # Spectral Graph Theory, ch. 1; common practice).
    graph = write_karate(tmp_path, weighted=False)
    model = network_model(tmp_path, "karate.graphml")
    assert model.n_states == graph.number_of_nodes()
    modes, stationary, _ = solve(backend_name, model, 8, method="shift-invert")
    laplacian = np.sort(nx.laplacian_spectrum(graph))[:8]
    np.testing.assert_allclose(-modes.values.real, laplacian, atol=1e-9)
    np.testing.assert_allclose(stationary.distribution, 1 / model.n_states, atol=1e-12)


@pytest.mark.parametrize("backend_name", BACKENDS)
def test_teleporting_node_walk_is_pagerank(tmp_path, backend_name):
    # networkx.pagerank solves p = alpha M p + (1 - alpha) u with M the weight-proportional
    # step matrix (Page, Brin, Motwani and Winograd 1999). A node walk at rate 1 with uniform
    # restart at rate tau has W = (M - I) + tau (u 1^T - I); W p = 0 gives
    # p = M p / (1 + tau) + tau u / (1 + tau), so alpha = 1 / (1 + tau).
    graph = write_karate(tmp_path, weighted=True)
    tau = 0.25
    model = network_model(tmp_path, "karate.graphml", f'walk = "node"\nteleport = {tau}\n')
    _, stationary, _ = solve(backend_name, model, 3, method="dense")
    rank = nx.pagerank(graph, alpha=1 / (1 + tau), weight="weight", tol=1e-15, max_iter=10_000)
    expected = np.array([rank[node] for node in graph.nodes])
    np.testing.assert_allclose(stationary.distribution, expected, atol=1e-10)


def test_edge_list_rows_and_formats_agree(tmp_path):
    # The same directed weighted graph as CSV (with header), TSV (without) and Matrix Market
    # (entry (i, j) = weight of i -> j) gives one generator, built here by loops over edges.
    edges = [("a", "b", 0.5), ("b", "c", 1.5), ("c", "a", 2.0), ("a", "c", 0.25),
             ("d", "a", 1.0)]
    (tmp_path / "g.csv").write_text("source,target,rate\n"
                                    + "".join(f"{a},{b},{w}\n" for a, b, w in edges))
    (tmp_path / "g.tsv").write_text("".join(f"{a}\t{b}\t{w}\n" for a, b, w in edges))
    index = {"a": 0, "b": 1, "c": 2, "d": 3}
    adjacency = np.zeros((4, 4))
    W = np.zeros((4, 4))
    for a, b, w in edges:
        adjacency[index[a], index[b]] = w
        W[index[b], index[a]] += w
        W[index[a], index[a]] -= w
    scipy.io.mmwrite(tmp_path / "g.mtx", sp.coo_matrix(adjacency))
    for file in ("g.csv", "g.tsv", "g.mtx"):
        model = network_model(tmp_path, file)
        np.testing.assert_allclose(dense_W(model, [1, 3]), W, atol=1e-15, err_msg=file)
    restarted = network_model(tmp_path, "g.csv", 'teleport = 0.5\nrestart = "d"\n')
    expected = W.copy()
    for j in range(3):
        expected[3, j] += 0.5
        expected[j, j] -= 0.5
    np.testing.assert_allclose(dense_W(restarted), expected, atol=1e-15)


def test_undirected_edge_list_goes_both_ways(tmp_path):
    (tmp_path / "u.csv").write_text("x,y,2.0\ny,z,1.0\n")
    model = network_model(tmp_path, "u.csv", "directed = false\n")
    W = dense_W(model)
    np.testing.assert_allclose(W, W.T)
    assert W[1, 0] == 2.0 and W[2, 1] == 1.0


@pytest.mark.parametrize("content,file,extra,fragment", [
    ("a,b,1\nb,zz,1\n", "e.csv", 'nodes = ["a", "b"]\n', "missing node 'zz'"),
    ("a,b,1\nb,a,x\n", "e.csv", "", "rate 'x' is not a number"),
    ("a,b,1\nb,a,-2\n", "e.csv", "", "rates must be finite and >= 0"),
    ("a,b,1,4\n", "e.csv", "", "expected source, target[, rate]"),
    ("a,b,1\n", "e.csv", 'teleport = 1.0\nrestart = "q"\n', "model.restart"),
    ('<?xml version="1.0"?><graphml xmlns="http://graphml.graphdrawing.org/xmlns">'
     '<graph edgedefault="directed"><node id="n0"/><edge source="n0" target="n9"/></graph>'
     '</graphml>', "g.graphml", "", "missing node 'n9'"),
    ("%%MatrixMarket matrix coordinate real general\n3 3 1\n1 7 1.0\n", "m.mtx", "",
     "not a readable Matrix Market"),
])
def test_bad_graph_input_is_one_line(tmp_path, capsys, content, file, extra, fragment):
    (tmp_path / file).write_text(content)
    path = write_config(tmp_path, "bad", f'[model]\ntype = "network"\nfile = "{file}"\n{extra}')
    check_error(capsys, path, fragment)


def test_missing_graph_file_names_the_field(tmp_path, capsys):
    path = write_config(tmp_path, "bad", '[model]\ntype = "network"\nfile = "nowhere.csv"\n')
    check_error(capsys, path, "model.file", "not found")

"""PageRank against networkx.pagerank (Page et al., 1999; damping 0.85, uniform teleport)."""
import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
from conftest import random_symmetric, write_graph_store

from bigprune.kernels.pagerank import row_strength
from bigprune.pagerank import pagerank_scores, power_iteration
from bigprune.propagate import propagate


def _networkx(adj, weighted):
    graph = nx.from_scipy_sparse_array(sp.csr_matrix(adj))
    graph.add_nodes_from(range(adj.shape[0]))
    scores = nx.pagerank(graph, alpha=0.85, tol=1e-13, max_iter=10_000,
                         weight="weight" if weighted else None)
    return np.array([scores[i] for i in range(adj.shape[0])])


def _csr(adj, weighted):
    adj = sp.csr_matrix(adj, dtype=np.float32)
    adj.sort_indices()
    weights = adj.data.copy() if weighted else np.zeros(0, dtype=np.float32)
    return adj.indptr.astype(np.int64), adj.indices.astype(np.int32), weights


def _with_isolated(rng):
    adj = random_symmetric(150, 0.03, rng).tolil()
    for node in (0, 17, 149):  # cut these nodes off: their mass is dangling
        adj[node, :] = 0
        adj[:, node] = 0
    return adj.tocsr()


GRAPHS = {
    "random": lambda rng: (random_symmetric(200, 0.04, rng), False),
    "isolated nodes": lambda rng: (_with_isolated(rng), False),
    "weighted": lambda rng: (random_symmetric(200, 0.04, rng, weighted=True), True),
    "no edges": lambda rng: (sp.csr_matrix((30, 30)), False),
}


@pytest.mark.parametrize("name", sorted(GRAPHS))
def test_power_iteration_matches_networkx(name):
    adj, weighted = GRAPHS[name](np.random.default_rng(11))
    scores, steps, change = power_iteration(*_csr(adj, weighted))
    # reference: networkx.pagerank, run to a much tighter tolerance
    np.testing.assert_allclose(scores, _networkx(adj, weighted), rtol=0, atol=1e-8)
    assert change < 1e-9 and steps < 1000
    assert abs(scores.sum() - 1.0) < 1e-9


def test_isolated_nodes_get_the_teleport_share_only():
    adj, _ = GRAPHS["isolated nodes"](np.random.default_rng(11))
    scores, _, _ = power_iteration(*_csr(adj, False))
    # reference: networkx.pagerank gives a node without edges the same score as every other one
    expected = _networkx(adj, False)
    assert scores[0] == pytest.approx(expected[0], abs=1e-10)
    assert scores[0] == pytest.approx(scores[17], abs=1e-15)


@pytest.mark.parametrize("weighted", [False, True])
def test_row_strength_matches_scipy(weighted):
    adj = random_symmetric(80, 0.1, np.random.default_rng(2), weighted=weighted)
    indptr, _, weights = _csr(adj, weighted)
    strength = np.empty(80)
    row_strength(indptr, weights, strength)
    # reference: scipy.sparse row sums (degrees when unweighted)
    expected = np.asarray(sp.csr_matrix(adj, dtype=np.float32).sum(axis=1)).ravel()
    np.testing.assert_allclose(strength, expected if weighted else np.diff(indptr), rtol=1e-6)


@pytest.mark.parametrize("weighted", [False, True])
def test_propagate_commits_networkx_pagerank(tmp_path, weighted):
    rng = np.random.default_rng(4)
    adj = random_symmetric(120, 0.05, rng, weighted=weighted)
    store = write_graph_store(tmp_path / "store", adj, rng.normal(size=(120, 3)),
                              np.zeros(120), np.zeros(120), weighted=weighted)
    propagate(store, hops=1)
    scores = pagerank_scores(store)
    assert scores.dtype == np.float64 and isinstance(scores, np.memmap)
    # reference: networkx.pagerank on the same (float32-rounded) weights
    stored = sp.csr_matrix(sp.csr_matrix(adj, dtype=np.float32), dtype=np.float64)
    np.testing.assert_allclose(scores, _networkx(stored, weighted), rtol=0, atol=1e-8)

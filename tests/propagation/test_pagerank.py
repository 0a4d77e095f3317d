"""PageRank against networkx.pagerank (Page et al., 1999; damping 0.85, uniform teleport)."""
import networkx as nx
import numpy as np
import pytest
import scipy.sparse as sp
from conftest import random_symmetric, write_graph_store

import bigprune.common.memory as memory
from bigprune.common.arrayfile import NpyFile, edge_chunks
from bigprune.kernels.pagerank import accumulate_rows
from bigprune.propagation.pagerank import pagerank_scores, power_iteration
from bigprune.propagation.propagate import propagate


def _networkx(adj, weighted):
    graph = nx.from_scipy_sparse_array(sp.csr_matrix(adj))
    graph.add_nodes_from(range(adj.shape[0]))
    scores = nx.pagerank(graph, alpha=0.85, tol=1e-13, max_iter=10_000,
                         weight="weight" if weighted else None)
    return np.array([scores[i] for i in range(adj.shape[0])])


def _csr(adj, weighted):
    """indptr and an in-memory chunk source."""
    adj = sp.csr_matrix(adj, dtype=np.float32)
    adj.sort_indices()
    weights = adj.data.copy() if weighted else None
    return adj.indptr.astype(np.int64), edge_chunks(adj.indices.astype(np.int32), weights, 0)


def _streamed(adj, weighted, folder, rows):
    """indptr and a chunk source reading the entries from .npy files, ``rows`` at a time."""
    adj = sp.csr_matrix(adj, dtype=np.float32)
    adj.sort_indices()
    np.save(folder / "indices.npy", adj.indices.astype(np.int32))
    np.save(folder / "weight.npy", adj.data)
    weights = NpyFile(folder / "weight.npy") if weighted else None
    return adj.indptr.astype(np.int64), edge_chunks(NpyFile(folder / "indices.npy"), weights, rows)


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
@pytest.mark.parametrize("rows", [None, 1, 13])
def test_power_iteration_matches_networkx(tmp_path, name, rows):
    adj, weighted = GRAPHS[name](np.random.default_rng(11))
    csr = _csr(adj, weighted) if rows is None else _streamed(adj, weighted, tmp_path, rows)
    scores, steps, change = power_iteration(*csr)
    # reference: networkx.pagerank, run to a much tighter tolerance
    np.testing.assert_allclose(scores, _networkx(adj, weighted), rtol=0, atol=1e-8)
    assert change < 1e-9 and steps < 1000
    assert abs(scores.sum() - 1.0) < 1e-9


def test_isolated_nodes_get_the_teleport_share_and_their_share_of_the_dangling_mass():
    adj, _ = GRAPHS["isolated nodes"](np.random.default_rng(11))
    scores, _, _ = power_iteration(*_csr(adj, False))
    # reference: networkx.pagerank (its dangling mass goes to every node uniformly) gives a node
    # without edges (1 - 0.85) / n + 0.85 * D / n, D the total score of the nodes without edges:
    # the same for every such node, and neither 1 / n nor the teleport share (1 - 0.85) / n alone
    expected = _networkx(adj, False)
    n, isolated = adj.shape[0], np.flatnonzero(np.diff(sp.csr_matrix(adj).indptr) == 0)
    closed_form = (1 - 0.85) / n + 0.85 * expected[isolated].sum() / n
    assert expected[0] == pytest.approx(closed_form, rel=1e-9)
    assert expected[0] != pytest.approx(1 / n, rel=0.1) and expected[0] != pytest.approx(0.15 / n, rel=0.01)
    assert scores[isolated] == pytest.approx(expected[isolated], abs=1e-10)
    assert scores[0] == pytest.approx(scores[17], abs=1e-15)


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("rows", [None, 1, 7, 10_000])
def test_accumulate_rows_matches_scipy(tmp_path, weighted, rows):
    adj = random_symmetric(80, 0.1, np.random.default_rng(2), weighted=weighted)
    indptr, chunks = _csr(adj, weighted) if rows is None else _streamed(adj, weighted, tmp_path, rows)
    values = np.random.default_rng(3).normal(size=80)
    strength, gathered = np.zeros(80), np.zeros(80)
    for first, indices, weights in chunks():
        accumulate_rows(indptr, first, indices, weights, np.zeros(0), strength)
        accumulate_rows(indptr, first, indices, weights, values, gathered)
    stored = sp.csr_matrix(adj, dtype=np.float32)
    if not weighted:
        stored.data[:] = 1.0
    # reference: scipy.sparse row sums (degrees when unweighted) and the product A @ v
    np.testing.assert_allclose(strength, np.asarray(stored.sum(axis=1)).ravel(), rtol=1e-6)
    np.testing.assert_allclose(gathered, stored.astype(np.float64) @ values, rtol=1e-6, atol=1e-9)


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("budget", ["4GiB", 40_000])
def test_propagate_commits_networkx_pagerank(tmp_path, monkeypatch, weighted, budget):
    monkeypatch.setattr(memory, "FIXED_OVERHEAD", 0)
    rng = np.random.default_rng(4)
    adj = random_symmetric(400, 0.05, rng, weighted=weighted)
    store = write_graph_store(tmp_path / "store", adj, rng.normal(size=(400, 3)),
                              np.zeros(400), np.zeros(400), weighted=weighted)
    propagate(store, hops=1, memory_budget=budget)
    info = store.entry("propagate")["info"]
    # 40 kB cannot hold the CSR: PageRank then streams its entries in several chunks
    assert info["way"] == ("memory" if budget == "4GiB" else "grid")
    if info["way"] == "grid":
        assert info["plan"]["edge_rows"] < info["nnz"] and not info["plan"]["pagerank_whole"]
    scores = pagerank_scores(store)
    assert scores.dtype == np.float64 and isinstance(scores, np.memmap)
    # reference: networkx.pagerank on the same (float32-rounded) weights
    stored = sp.csr_matrix(sp.csr_matrix(adj, dtype=np.float32), dtype=np.float64)
    np.testing.assert_allclose(scores, _networkx(stored, weighted), rtol=0, atol=1e-8)


def test_scores_are_the_same_bytes_at_any_thread_count():
    # A cluster's client sums PageRank's vectors on its own threads; one server may run at any
    # --threads: the float64 sums must not follow the thread count (a parallel reduction's order
    # does). Reference: the same iteration run on one thread.
    import numba

    adj, weighted = random_symmetric(20000, 0.0003, np.random.default_rng(5)), False
    runs = []
    for threads in (1, numba.config.NUMBA_NUM_THREADS):
        numba.set_num_threads(threads)
        runs.append(power_iteration(*_csr(adj, weighted)))
    scores = [run[0] for run in runs]
    assert scores[0].tobytes() == scores[1].tobytes() and runs[0][1:] == runs[1][1:]

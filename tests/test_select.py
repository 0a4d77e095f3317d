"""bigprune/select.py and bigprune/strategies.py: validation, strategies, outputs."""
import importlib
import json
import os

import networkx as nx
import numpy as np
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp

from bigprune.errors import InputError
from bigprune.kcenter import greedy
from bigprune.runtime import set_threads
from bigprune.schema import NO_LABEL
from bigprune.select import parse_budget, select
from bigprune.strategies import STRATEGIES
from conftest import write_graph_store

select_module = importlib.import_module("bigprune.select")  # the package's `select` is the function


@pytest.fixture(autouse=True)
def restore_threads():
    yield
    set_threads(None)


def add_propagate(store):
    """Commit a propagate stage: hop_1 = D^-1/2 (A+I) D^-1/2 X, PageRank from networkx."""
    indptr, indices = store.load("graph", "indptr"), store.load("graph", "indices")
    n = len(indptr) - 1
    adj = sp.csr_matrix((np.ones(len(indices)), indices, indptr), shape=(n, n))
    a = adj + sp.identity(n)
    scale = sp.diags(1.0 / np.sqrt(np.asarray(a.sum(1)).ravel()))
    hop = (scale @ a @ scale @ store.load("graph", "features").astype(np.float64)).astype(np.float32)
    rank = nx.pagerank(nx.from_scipy_sparse_array(adj), alpha=0.85, tol=1e-12)
    with store.begin("propagate", params={"hops": 1, "norm": "sym"}) as w:
        w.save("hop_1", hop)
        w.save("pagerank", np.array([rank[i] for i in range(n)], dtype=np.float64))
    return store


@pytest.fixture
def store(small_store):
    return add_propagate(small_store)


def run(store, strategy="kcenter", budget=12, **kw):
    return select(store, strategy, budget, threads=1, **kw)


@pytest.mark.parametrize("strategy", sorted(STRATEGIES))
def test_each_strategy_returns_k_distinct_pool_nodes(store, strategy):
    split = store.load("graph", "split")
    picked = run(store, strategy, 17)["indices"]
    assert len(picked) == 17 and len(np.unique(picked)) == 17
    assert np.all(split[picked] == 1)


@pytest.mark.parametrize("strategy", ["degree", "pagerank"])
def test_ranking_strategies_match_numpy_argsort(store, strategy):
    # reference: numpy stable argsort of the negated score over the pool (ties: lower index)
    pool = np.flatnonzero(store.load("graph", "split") == 1)
    score = (np.diff(store.load("graph", "indptr")) if strategy == "degree"
             else store.load("propagate", "pagerank"))
    expected = pool[np.argsort(-score[pool], kind="stable")][:20]
    np.testing.assert_array_equal(run(store, strategy, 20)["indices"], expected)


def test_random_is_seeded(store):
    a, b = run(store, "random", 20, seed=3)["indices"], run(store, "random", 20, seed=3)["indices"]
    np.testing.assert_array_equal(a, b)
    assert not np.array_equal(a, run(store, "random", 20, seed=4)["indices"])


def test_kcenter_uses_last_hop_by_default_and_hop_zero_on_request(store):
    # reference: the greedy run directly on the rows of the chosen embedding
    split = store.load("graph", "split")
    pool, targets = np.flatnonzero(split == 1), np.flatnonzero(split == 3)
    for hop, name in [(None, "hop_1"), (0, "features")]:
        rows = store.load("propagate" if hop is None else "graph", name)
        direct = greedy(rows[targets], rows[pool], 10, exact=True)
        result = run(store, "kcenter", 10, embedding_hop=hop)
        np.testing.assert_array_equal(result["indices"], pool[direct.order])
        assert result["embedding"] == ("hop_1" if hop is None else "hop_0")


def test_initial_ids_come_first(store):
    ids = pq.read_table(store.stage_dir("graph") / "node_id.parquet").column("node_id").to_numpy()
    for strategy in STRATEGIES:
        picked = run(store, strategy, 10, initial=[ids[5], ids[40]])["indices"]
        assert list(picked[:2]) == [5, 40] and len(np.unique(picked)) == 10


def test_unlabeled_targets_are_nodes_without_split(store):
    assert run(store, "random", 5, targets="unlabeled")["targets"] == 60
    assert run(store, "random", 5, targets="valid")["targets"] == 30


@pytest.mark.parametrize("budget,k", [(0.1, 12), ("0.25", 30), (5, 5), ("7", 7), (120, 120),
                                      (1, 1), (0.001, 1)])
def test_budget_parsing(budget, k):
    assert parse_budget(budget, 120) == k


@pytest.mark.parametrize("budget", [0, -3, float("nan"), "nan", 2.5, "abc", None, True])
def test_budget_errors(budget):
    with pytest.raises(InputError) as err:
        parse_budget(budget, 120)
    assert str(err.value) == (f"--budget {budget}: use a fraction between 0 and 1 of the training "
                              f"pool or a whole count from 1 to 120 (the pool size)")


def test_budget_larger_than_pool(store):
    with pytest.raises(InputError) as err:
        run(store, "random", 121)
    assert str(err.value) == ("--budget 121: larger than the training pool (120 nodes); "
                              "use at most 120 or a fraction below 1")


def test_option_errors(store, tmp_path):
    cases = [
        (dict(strategy="best"), "--strategy best: unknown; use one of kcenter, kcenter-pool, "
                                "random, degree, pagerank"),
        (dict(targets="train"), "--targets train: unknown; use one of test, valid, unlabeled"),
        (dict(out=tmp_path / "sel.csv"), f"--out {tmp_path / 'sel.csv'}: must end in .parquet"),
        (dict(out=store.path / "sel.parquet"),
         f"--out {store.path / 'sel.parquet'}: inside the store directory {store.path}; "
         f"write it elsewhere"),
        (dict(embedding_hop=2), "--embedding-hop 2: the propagate stage holds hops 0 to 1; use "
                                "one of those or rerun bigprune propagate with more hops"),
        (dict(initial=[3]), "--initial: node 3 is not in the training pool; give ids of nodes "
                            "with split train and a label"),
    ]
    for options, message in cases:
        args = {"strategy": "random", **options}
        with pytest.raises(InputError) as err:
            run(store, budget=5, **args)
        assert str(err.value) == message


def test_no_targets_and_no_pool(tmp_path):
    adj = sp.csr_matrix(np.ones((4, 4)))
    features = np.eye(4)
    label = np.array([0, 1, NO_LABEL, NO_LABEL])
    store = add_propagate(write_graph_store(tmp_path / "a", adj, features, [1, 1, 3, 0], label))
    with pytest.raises(InputError) as err:
        run(store, "random", 1, targets="valid")
    assert str(err.value) == "--targets valid: no node is in this set; choose another (test, unlabeled)"
    store = add_propagate(write_graph_store(tmp_path / "b", adj, features, [2, 2, 3, 0], label))
    with pytest.raises(InputError) as err:
        run(store, "random", 1)
    assert str(err.value) == (f"--store {store.path}: no labelled node has split train, so the "
                              f"training pool is empty; mark training nodes in the node table's "
                              f"split column")


def test_output_files_and_columns(store, tmp_path):
    out = tmp_path / "picked.parquet"
    result = run(store, "kcenter", 15, out=out)
    table = pq.read_table(out)
    assert table.column_names == ["node_id", "rank", "label"]
    assert str(table.schema.field("rank").type) == "int64"
    assert str(table.schema.field("label").type) == "int64"
    picked = result["indices"]
    np.testing.assert_array_equal(table.column("node_id").to_numpy(), picked * 7 + 100)
    np.testing.assert_array_equal(table.column("rank").to_numpy(), np.arange(15))
    np.testing.assert_array_equal(table.column("label").to_numpy(), store.load("graph", "label")[picked])
    report = json.loads(out.with_suffix(".json").read_text())
    assert report == json.loads(json.dumps({k: v for k, v in result.items() if k != "indices"}))
    assert sorted(os.listdir(tmp_path)) == ["picked.json", "picked.parquet", "store"]


def test_no_files_left_when_writing_fails(store, tmp_path, monkeypatch):
    calls = []
    real_replace = os.replace

    def failing_replace(src, dst):
        calls.append(dst)
        if len(calls) == 2:
            raise OSError("disk full")
        real_replace(src, dst)

    monkeypatch.setattr(select_module.os, "replace", failing_replace)
    with pytest.raises(OSError):
        run(store, "random", 5, out=tmp_path / "picked.parquet")
    assert sorted(os.listdir(tmp_path)) == ["store"]


def test_no_files_left_when_a_strategy_fails(store, tmp_path, monkeypatch):
    def broken(problem):
        raise RuntimeError("boom")

    monkeypatch.setitem(STRATEGIES, "random", broken)
    with pytest.raises(RuntimeError):
        run(store, "random", 5, out=tmp_path / "picked.parquet")
    assert sorted(os.listdir(tmp_path)) == ["store"]

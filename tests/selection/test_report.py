"""bigprune/report.py and bigprune/kernels/homophily.py: coverage, load, classes, diagnostics."""
from collections import Counter

import networkx as nx
import numpy as np
import pytest
from scipy.spatial.distance import cdist

from bigprune.selection.report import changes, class_counts, coverage, describer, diagnostics, homophily
from bigprune.common.runtime import set_threads
from bigprune.common.schema import NO_LABEL
from bigprune.selection.select import select
from conftest import write_graph_store
from conftest import add_propagate


pytestmark = pytest.mark.usefixtures("restore_threads")  # tests here set numba's threads


@pytest.fixture
def karate(tmp_path):
    """Zachary's karate club; label = club; nodes 0-19 train, 20-26 valid, 27-33 test."""
    graph = nx.karate_club_graph()
    n = graph.number_of_nodes()
    club = np.array([0 if graph.nodes[i]["club"] == "Mr. Hi" else 1 for i in range(n)])
    split = np.array([1] * 20 + [2] * 7 + [3] * 7, dtype=np.int8)
    label = np.where(split == 3, NO_LABEL, club)
    features = np.random.default_rng(0).normal(size=(n, 4)) + club[:, None]
    store = write_graph_store(tmp_path / "karate", nx.to_scipy_sparse_array(graph), features,
                              split, label)
    return add_propagate(store), graph, club, split


def networkx_homophily(graph, club, split, nodes):
    """Reference count with networkx: share of labelled neighbours with the same club."""
    shares = []
    for node in nodes:
        labelled = [v for v in graph.neighbors(node) if split[v] in (1, 2)]
        if labelled:
            shares.append(sum(club[v] == club[node] for v in labelled) / len(labelled))
    return float(np.mean(shares))


@pytest.mark.parametrize("window_rows", [1, 5, 1000])
def test_homophily_matches_networkx_on_karate_club(karate, window_rows):
    # reference: networkx karate club graph, neighbours counted with graph.neighbors
    store, graph, club, split = karate
    set_threads(1)
    for nodes in (np.arange(20), np.array([0, 3, 7, 19, 25])):
        expected = networkx_homophily(graph, club, split, nodes)
        assert homophily(store, nodes, window_rows) == pytest.approx(expected, rel=1e-12)


def test_diagnostics_match_networkx(karate):
    # reference: networkx degree and pagerank (alpha 0.85) on the same graph
    store, graph, club, split = karate
    set_threads(1)
    selected = np.array([33 - 14, 2, 5])  # dense indices, not sorted on purpose
    pool = np.arange(20)
    out = diagnostics(describer(store, pool, 7), selected, pool)
    rank = nx.pagerank(graph, alpha=0.85, tol=1e-12, weight=None)
    for name, nodes in (("selected", selected), ("pool", pool)):
        assert out[name]["degree"] == pytest.approx(np.mean([graph.degree(i) for i in nodes]))
        assert out[name]["pagerank"] == pytest.approx(np.mean([rank[i] for i in nodes]), rel=1e-6)
        assert out[name]["homophily"] == pytest.approx(
            networkx_homophily(graph, club, split, nodes), rel=1e-12)


@pytest.mark.parametrize("strategy,quota", [("random", None), ("kcenter", None), ("kcenter", 3),
                                            ("kcenter-pool", None), ("degree", None),
                                            ("stratified", None), ("age", 3)])
def test_report_coverage_matches_cdist(small_store, strategy, quota):
    # reference: scipy.spatial.distance.cdist from every target to every selected node
    store = add_propagate(small_store)
    result = select(store, strategy, 14, seed=2, threads=1, min_per_class=quota)
    split = store.load("graph", "split")
    rows = store.load("propagate", "hop_1").astype(np.float64)
    d = cdist(rows[split == 3], rows[result["indices"]])
    nearest = d.min(1)
    expected = {"radius": nearest.max(), "mean": nearest.mean(), "p50": np.quantile(nearest, 0.5),
                "p90": np.quantile(nearest, 0.9), "p99": np.quantile(nearest, 0.99)}
    within = result["coverage"].pop("within")
    assert result["coverage"] == pytest.approx(expected, rel=1e-9)
    assert within == {name: pytest.approx(np.mean(nearest <= expected[name]), abs=1e-12)
                      for name in ("radius", "p90", "p99")}
    load = np.bincount(d.argmin(1), minlength=14)
    assert result["load"] == {"max": int(load.max()), "mean": pytest.approx(load.mean())}
    labels = store.load("graph", "label")[result["indices"]]
    assert result["classes"] == {str(k): v for k, v in sorted(Counter(labels.tolist()).items())}
    assert "per-class" in result["caution"]
    for key in ("strategy", "selected", "pool", "targets", "target_split", "budget", "embedding",
                "seconds", "peak_rss", "seed", "diagnostics"):
        assert key in result


def test_coverage_and_classes_on_known_values():
    # reference: hand-computed values (numpy linear-interpolation quantiles)
    dist = np.array([0.0, 1.0, 2.0, 3.0, 4.0])
    assign = np.array([0, 0, 0, 2, 2])
    out = coverage(dist, assign, 3)
    assert out["coverage"]["radius"] == 4.0 and out["coverage"]["mean"] == 2.0
    assert out["coverage"]["p50"] == 2.0 and out["coverage"]["p90"] == pytest.approx(3.6)
    assert out["load"] == {"max": 3, "mean": pytest.approx(5 / 3)}
    assert class_counts(np.array([2, 0, 2, 11])) == {"0": 1, "2": 2, "11": 1}


def test_changes_match_python_sets():
    # reference: Python set intersection and differences
    rng = np.random.default_rng(1)
    for _ in range(50):
        included = rng.choice(40, size=rng.integers(0, 10), replace=False)
        selected = rng.choice(40, size=rng.integers(1, 20), replace=False)
        a, b = set(selected.tolist()), set(included.tolist())
        assert changes(selected, included) == {"kept": len(a & b), "added": len(a - b),
                                               "dropped": len(b - a)}


@pytest.mark.parametrize("strategy", ["degree", "random"])
def test_ranking_profile_by_fifths_matches_networkx(karate, strategy):
    # reference: networkx degree, pagerank (alpha 0.85) and neighbour labels on Zachary's karate
    # club, over the fifths of the ranking rebuilt by hand (degree: sort by networkx degree,
    # ties to the lower index; random: numpy default_rng(seed).permutation of the pool)
    store, graph, club, split = karate
    set_threads(1)
    pool = np.arange(20)
    result = select(store, strategy, 4, seed=5, threads=1)
    if strategy == "degree":
        ranking = sorted(pool, key=lambda i: (-graph.degree(i), i))
    else:
        ranking = np.random.default_rng(5).permutation(pool)
    rank = nx.pagerank(graph, alpha=0.85, tol=1e-12, weight=None)
    profile = result["preference"]
    assert [p["nodes"] for p in profile["parts"]] == [4] * 5
    assert [(p["from"], p["to"]) for p in profile["parts"]] == [(i / 5, (i + 1) / 5) for i in range(5)]
    for part, nodes in zip(profile["parts"], np.split(np.asarray(ranking), 5)):
        assert part["degree"] == pytest.approx(np.mean([graph.degree(i) for i in nodes]))
        assert part["pagerank"] == pytest.approx(np.mean([rank[i] for i in nodes]), rel=1e-6)
        assert part["homophily"] == pytest.approx(networkx_homophily(graph, club, split, nodes))
    assert profile["pool"] == result["diagnostics"]["pool"]
    if strategy == "degree":
        assert profile["parts"][0]["degree"] > profile["pool"]["degree"] > profile["parts"][-1]["degree"]


def test_rules_that_do_not_rank_give_no_profile(karate):
    store = karate[0]
    assert "preference" not in select(store, "kcenter", 4, threads=1)
    assert "preference" not in select(store, "stratified", 4, threads=1)

"""The representative rules through ``select``: ``kmedian`` and ``kmeans``.

References: ``scipy.spatial.distance.cdist`` distances with a plain numpy greedy (k-median);
scikit-learn's ``KMeans`` inertia (k-means); the selections' contract checked with numpy.
"""
import importlib
from collections import Counter

import numpy as np
import pytest
from scipy.spatial.distance import cdist
from sklearn.cluster import KMeans

from bigprune.selection.kmeans import clusters, serve
from bigprune.selection.select import select

kmedian_module = importlib.import_module("bigprune.selection.kmedian")


def _space(store):
    hop = store.load("propagate", "hop_1").astype(np.float64)
    split = store.load("graph", "split")
    return hop, np.flatnonzero(split == 1), np.flatnonzero(split == 3)


def _dense_greedy(dist, picks):
    """Plain greedy k-median: each step the candidate that lowers the summed distance most."""
    cur, order = dist.max(axis=1), []
    for _ in range(picks):
        total = np.minimum(cur[:, None], dist).sum(axis=0)
        total[order] = np.inf
        order.append(int(np.argmin(total)))
        cur = np.minimum(cur, dist[:, order[-1]])
    return order


def test_kmedian_is_the_dense_greedy_on_the_store(skewed):
    hop, pool, targets = _space(skewed)
    result = select(skewed, "kmedian", 15, threads=1)
    dist = cdist(hop[targets], hop[pool])
    assert result["indices"].tolist() == pool[_dense_greedy(dist, 15)].tolist()
    assert result["kmedian"]["exact_lists"]
    # the report's mean distance is the k-median objective per target (scipy)
    assert result["coverage"]["mean"] == pytest.approx(
        dist[:, np.searchsorted(pool, result["indices"])].min(axis=1).mean(), rel=1e-5)


def test_kmedian_lowers_the_mean_distance_below_kcenter_and_random(skewed):
    # The rule's objective is the mean target distance: it must beat rules that do not aim at it.
    mean = {rule: select(skewed, rule, 15, threads=1)["coverage"]["mean"]
            for rule in ("kmedian", "kcenter", "random")}
    assert mean["kmedian"] < mean["kcenter"] and mean["kmedian"] < mean["random"]


def test_kmedian_short_lists_under_a_small_budget(skewed, monkeypatch):
    # Lists shorter than the pool: the objective becomes the truncated one, still near the exact.
    exact = select(skewed, "kmedian", 15, threads=1)
    monkeypatch.setattr(kmedian_module, "DENSE_PAIRS", 0)
    monkeypatch.setattr(kmedian_module, "NEAREST_LEAST", 8)
    short = select(skewed, "kmedian", 15, threads=1)
    assert short["kmedian"]["neighbours"] == 38  # ceil(4 x 140 pool nodes / 15 picks)
    assert not short["kmedian"]["exact_lists"]
    assert short["coverage"]["mean"] <= 1.05 * exact["coverage"]["mean"]


@pytest.mark.parametrize("strategy", ["kmedian", "kmeans"])
def test_quotas_bind_where_the_rule_alone_misses_a_class(skewed, strategy):
    # reference: collections.Counter of the labels, with and without the quota
    label = skewed.load("graph", "label")
    free = Counter(label[select(skewed, strategy, 16, threads=1)["indices"]].tolist())
    held = Counter(label[select(skewed, strategy, 16, min_per_class=4, threads=1)["indices"]].tolist())
    assert min(held[c] for c in range(4)) >= 4
    assert min(free[c] for c in range(4)) < 4


def test_kmeans_clusters_are_as_tight_as_scikit_learns():
    # reference: scikit-learn KMeans (k-means++, 10 starts) inertia on the same rows
    rng = np.random.default_rng(3)
    rows = (rng.normal(size=(600, 5)) + 4 * rng.integers(0, 6, size=(600, 1))).astype(np.float32)
    centroids, sizes = clusters(lambda at: rows[at], 600, 6, 5, seed=0, sample_rows=600,
                                chunk_rows=128)
    ours = cdist(rows, centroids, "sqeuclidean").min(axis=1).sum()
    theirs = KMeans(6, n_init=10, random_state=0).fit(rows).inertia_
    assert ours <= 1.05 * theirs
    assert sizes.sum() == 600


def test_kmeans_serves_larger_clusters_first_with_their_nearest_free_candidate():
    # reference: a plain walk over scipy cdist distances
    rng = np.random.default_rng(4)
    candidates = rng.normal(size=(50, 3)).astype(np.float32)
    centroids = rng.normal(size=(8, 3)).astype(np.float32)
    sizes = rng.integers(1, 100, size=8)
    order = serve(candidates, centroids, sizes, np.array([5], dtype=np.int64),
                  np.zeros(50, dtype=np.int64), np.zeros(1, dtype=np.int64), 12)
    dist = cdist(centroids, candidates)
    expected, taken = [5], {5}
    queue = np.argsort(-sizes, kind="stable")
    while len(expected) < 13:
        for cluster in queue:
            if len(expected) == 13:
                break
            best = next(int(c) for c in np.argsort(dist[cluster], kind="stable") if c not in taken)
            expected.append(best)
            taken.add(best)
    assert order.tolist() == expected


def test_kmeans_is_seeded(skewed):
    a = select(skewed, "kmeans", 12, seed=1, threads=1)["indices"]
    b = select(skewed, "kmeans", 12, seed=1, threads=1)["indices"]
    np.testing.assert_array_equal(a, b)

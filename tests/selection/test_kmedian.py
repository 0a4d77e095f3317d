"""kmedian's greedy against a plain dense greedy (scipy distances) and against the exact optimum.

References: the greedy's (1 - 1/e) bound for monotone submodular maximisation (Nemhauser, Wolsey
& Fisher, 1978); distances from ``scipy.spatial.distance.cdist``; the optimum by enumeration.
"""
import itertools
import math

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from bigprune.selection.kmedian import greedy, neighbour_lists, plan_neighbours
from bigprune.common.errors import BudgetError


def _lists(candidates, targets, nearest):
    return neighbour_lists(candidates, lambda at: targets[at], len(targets), nearest)


def _plain_greedy(dist, reach, picks):
    """The textbook greedy: each step the candidate with the largest gain, ties to the lower."""
    cur, order = reach.copy(), []
    for _ in range(picks):
        gains = np.maximum(cur[:, None] - dist, 0.0).sum(axis=0)
        gains[order] = -1.0
        best = int(np.argmax(gains))
        order.append(best)
        cur = np.minimum(cur, dist[:, best])
    return order, float(np.sum(reach - cur))


def _no_quota(n):
    return np.zeros(n, dtype=np.int64), np.zeros(1, dtype=np.int64)


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_whole_lists_match_the_dense_greedy(seed):
    rng = np.random.default_rng(seed)
    candidates = rng.normal(size=(60, 5)).astype(np.float32)
    targets = rng.normal(size=(90, 5)).astype(np.float32)
    lists = _lists(candidates, targets, 60)
    klass, deficit = _no_quota(60)
    order, facts = greedy(lists, np.zeros(0, np.int64), np.arange(60), klass, deficit, 8)
    dist = cdist(targets, candidates)  # scipy, float64
    reach = dist.max(axis=1)
    expected, objective = _plain_greedy(dist, reach, 8)
    assert facts["exact_lists"]
    assert order.tolist() == expected
    assert facts["objective"] == pytest.approx(objective, rel=1e-5)
    # With every candidate listed the objective is k-median's: sum of reach minus the distances.
    assert facts["objective"] == pytest.approx(reach.sum() - dist[:, order].min(axis=1).sum(), rel=1e-5)


@pytest.mark.parametrize("seed", range(5))
def test_within_one_minus_one_over_e_of_the_optimum(seed):
    # Nemhauser, Wolsey & Fisher (1978): greedy >= (1 - 1/e) * optimum for monotone submodular f.
    rng = np.random.default_rng(seed)
    candidates = rng.normal(size=(12, 3)).astype(np.float32)
    targets = rng.normal(size=(25, 3)).astype(np.float32)
    dist = cdist(targets, candidates)
    reach = dist.max(axis=1)
    klass, deficit = _no_quota(12)
    for picks in (2, 3, 4):
        _, facts = greedy(_lists(candidates, targets, 12), np.zeros(0, np.int64), np.arange(12),
                          klass, deficit, picks)
        best = max(np.sum(reach - dist[:, list(s)].min(axis=1))
                   for s in itertools.combinations(range(12), picks))
        assert facts["objective"] >= (1 - 1 / math.e) * best - 1e-6
        assert facts["objective"] <= best + 1e-5


def test_short_lists_hold_every_term_of_the_truncated_objective():
    # f(S) = sum_t (reach_t - d(t, S))+ with reach_t the r-th neighbour distance (scipy).
    rng = np.random.default_rng(4)
    candidates = rng.normal(size=(200, 4)).astype(np.float32)
    targets = rng.normal(size=(150, 4)).astype(np.float32)
    klass, deficit = _no_quota(200)
    order, facts = greedy(_lists(candidates, targets, 10), np.zeros(0, np.int64), np.arange(200),
                          klass, deficit, 12)
    dist = cdist(targets, candidates)
    reach = np.sort(dist, axis=1)[:, 9]
    truncated = np.maximum(reach - dist[:, order].min(axis=1), 0.0).sum()
    assert not facts["exact_lists"]
    assert facts["objective"] == pytest.approx(truncated, rel=1e-4)
    expected, _ = _plain_greedy(np.minimum(dist, reach[:, None]), reach, 12)
    assert order.tolist() == expected


def test_initial_picks_come_first_and_quotas_are_met():
    rng = np.random.default_rng(5)
    candidates = rng.normal(size=(80, 4)).astype(np.float32)
    targets = rng.normal(size=(100, 4)).astype(np.float32)
    klass = np.zeros(80, dtype=np.int64)
    klass[70:] = 1  # a small class the greedy would otherwise skip
    initial = np.array([3, 17])
    offered = np.setdiff1d(np.arange(80), initial)
    order, _ = greedy(_lists(candidates, targets, 80), initial, offered, klass,
                      np.array([0, 4]), 6)
    assert order[:2].tolist() == [3, 17]
    assert len(order) == 8 and len(set(order.tolist())) == 8
    assert np.sum(klass[order] == 1) >= 4


def test_plan_lists_every_candidate_when_cheap_and_refuses_when_nothing_fits():
    assert plan_neighbours(1000, 500, 20, 1 << 30) == 1000
    assert plan_neighbours(1_000_000, 200_000, 20_000, 1 << 40) == 200  # 4 x n / k
    assert plan_neighbours(1_000_000, 200_000, 20_000, 16 * 200_000 * 50) == 50
    with pytest.raises(BudgetError, match="kmedian"):
        plan_neighbours(1_000_000, 200_000, 20_000, 1000)


def test_ivf_lists_above_the_flat_size(monkeypatch):
    # Pools above FLAT_MAX search an IVF index: its lists must hold nearly every true neighbour
    # (scipy cdist) and give nearly the objective of exact lists.
    import bigprune.selection.kmedian as kmedian

    rng = np.random.default_rng(6)
    centres = rng.normal(scale=5.0, size=(20, 4))
    candidates = (centres[rng.integers(0, 20, 3000)] + rng.normal(size=(3000, 4))).astype(np.float32)
    targets = (centres[rng.integers(0, 20, 400)] + rng.normal(size=(400, 4))).astype(np.float32)
    exact = _lists(candidates, targets, 20)
    monkeypatch.setattr(kmedian, "FLAT_MAX", 100)
    approximate = _lists(candidates, targets, 20)
    assert approximate[4]["index"] == "ivf" and exact[4]["index"] == "flat"
    truth = np.argsort(cdist(targets, candidates), axis=1)[:, :20]
    ptr, owner = approximate[0], approximate[1]
    listed = {(int(t), c) for c in range(3000) for t in owner[ptr[c]:ptr[c + 1]]}
    recall = np.mean([(t, int(c)) in listed for t in range(400) for c in truth[t]])
    assert recall >= 0.95
    klass, deficit = _no_quota(3000)
    objective = [greedy(lists, np.zeros(0, np.int64), np.arange(3000), klass, deficit, 30)[1]["objective"]
                 for lists in (exact, approximate)]
    assert objective[1] == pytest.approx(objective[0], rel=0.02)

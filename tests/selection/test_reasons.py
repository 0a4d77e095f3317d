"""bigprune/selection/reasons.py through the rules: the selection table's reason and serves columns."""
from collections import Counter

import numpy as np
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp
from scipy.spatial.distance import cdist

from bigprune.common.schema import NO_LABEL
from bigprune.selection.select import select
from conftest import add_propagate, write_graph_store
from test_select import id_file, run

# Known inputs: three targets, the pool node right beside each (class 0), two far pool nodes of
# class 0 (what a farthest-first fill reaches first), one near-target pair of class 1 and the
# node given by --include. With 6 picks, --include and one pick per class, the k-supplier
# greedy must give: the included node; the three nodes beside the targets (the rule: each is a
# target's nearest candidate); then, every target being served, the fill takes (20, 20), the
# farthest candidate (its second fill pick, (5, 5), is dropped for the quota); last, one class 1
# node to meet the quota.
POINTS = [((0, 0), 3, NO_LABEL), ((10, 0), 3, NO_LABEL), ((0, 10), 3, NO_LABEL),
          ((-10, -10), 1, 0),                               # 3: the included node
          ((0, 0.1), 1, 0), ((10, 0.1), 1, 0), ((0, 10.1), 1, 0),   # 4-6: beside the targets
          ((5, 5), 1, 0), ((20, 20), 1, 0),                 # 7-8: reached by the fill
          ((0, 0.2), 1, 1), ((10, 0.2), 1, 1)]              # 9-10: class 1


@pytest.fixture
def known(tmp_path):
    features = np.array([p for p, _, _ in POINTS], dtype=np.float32)
    split = np.array([s for _, s, _ in POINTS], dtype=np.int8)
    label = np.array([c for _, _, c in POINTS], dtype=np.int64)
    n = len(POINTS)
    ring = sp.csr_matrix((np.ones(n), (np.arange(n), (np.arange(n) + 1) % n)), shape=(n, n))
    return add_propagate(write_graph_store(tmp_path / "known", ring + ring.T, features, split, label))


def test_include_rule_fill_and_quota_picks_are_named(known, tmp_path):
    out = tmp_path / "picks.parquet"
    result = select(known, "kcenter", 6, embedding_hop=0, min_per_class=1, threads=1, out=out,
                    include=id_file(tmp_path / "inc.parquet", [3]))
    table = pq.read_table(out).to_pydict()
    picked = result["indices"]
    # reference: the known inputs above, worked by hand
    assert picked[0] == 3 and set(picked[1:4]) == {4, 5, 6} and picked[4] == 8 and picked[5] in (9, 10)
    assert table["reason"] == ["include", "rule", "rule", "rule", "fill", "quota"]
    assert result["greedy"]["filled"] == 2 and result["quota_swaps"]["dropped"] == 1
    # reference: scipy cdist from each target to the picks; a pick serves the targets it is
    # nearest to (ties to the earlier pick, as numpy's argmin)
    features = np.array([p for p, _, _ in POINTS], dtype=np.float64)
    nearest = cdist(features[:3], features[picked]).argmin(1)
    assert table["serves"] == np.bincount(nearest, minlength=6).tolist()
    assert sum(table["serves"]) == 3


def test_radius_mode_quota_picks_come_on_top(known, tmp_path):
    result = select(known, "kcenter", None, radius=0.15, embedding_hop=0, min_per_class=1,
                    threads=1, out=tmp_path / "r.parquet")
    reason = pq.read_table(tmp_path / "r.parquet").column("reason").to_pylist()
    # reference: the known inputs: three picks bring every target within 0.15, then one class 1 node
    assert reason == ["rule", "rule", "rule", "quota"] and len(result["indices"]) == 4


@pytest.mark.parametrize("strategy", ["kmedian", "kmeans"])
def test_quota_picks_of_greedy_rules_are_the_forced_tail(skewed, tmp_path, strategy):  # noqa: F811
    # reference: the same rule without quotas (the greedy is the same until the quota-forced
    # mode starts) and collections.Counter of the labels
    label = skewed.load("graph", "label")
    include = id_file(tmp_path / "inc.parquet", [17, 60])
    out = tmp_path / "q.parquet"
    held = run(skewed, strategy, 16, min_per_class=4, include=include, out=out)["indices"]
    free = run(skewed, strategy, 16, include=include)["indices"]
    reason = np.array(pq.read_table(out).column("reason").to_pylist())
    assert list(reason[:2]) == ["include", "include"]
    quota = np.flatnonzero(reason == "quota")
    assert len(quota) > 0 and set(reason[2:]) <= {"rule", "quota"}
    assert list(quota) == list(range(quota[0], 16))  # a tail: the mode never turns off
    np.testing.assert_array_equal(held[:quota[0]], free[:quota[0]])
    counts = Counter(label[held[:quota[0]]].tolist())
    # every forced pick serves a class the earlier picks left short
    assert all(counts[label[node]] < 4 for node in held[quota])


@pytest.mark.parametrize("strategy", ["degree", "random", "entropy"])
def test_quota_picks_of_ranking_rules_are_the_reserved_ones(skewed, strategy):  # noqa: F811
    out = skewed.path.parent / f"{strategy}.parquet"
    held = run(skewed, strategy, 16, min_per_class=4, out=out)["indices"]
    free = run(skewed, strategy, 16)["indices"]
    reason = np.array(pq.read_table(out).column("reason").to_pylist())
    # reference: numpy set operations against the same rule without quotas: a quota pick is one
    # the rule alone would not have made; every other pick it would have
    assert not np.isin(held[reason == "quota"], free).any()
    assert np.isin(held[reason == "rule"], free).all()
    assert (reason == "quota").sum() == 16 - np.isin(held, free).sum() > 0


def test_stratified_quota_picks_are_the_raise_above_the_proportions(skewed):  # noqa: F811
    out = skewed.path.parent / "s.parquet"
    label = skewed.load("graph", "label")
    held = run(skewed, "stratified", 16, min_per_class=4, out=out)
    free = run(skewed, "stratified", 16)
    reason = np.array(pq.read_table(out).column("reason").to_pylist())
    # reference: the class counts of the same rule without quotas (largest-remainder rounding,
    # checked in test_select): a class's picks above those counts are its quota picks
    raised = {c: n - free["class_targets"].get(c, 0) for c, n in held["class_targets"].items()}
    quota = Counter(str(c) for c in label[held["indices"][reason == "quota"]].tolist())
    assert quota == Counter({c: n for c, n in raised.items() if n > 0}) and sum(quota.values()) > 0

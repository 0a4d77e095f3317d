"""bigprune/select.py and bigprune/strategies.py: validation, strategies, outputs."""
import importlib
import json
import os
from collections import Counter
from fractions import Fraction

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp
from scipy import stats
from scipy.spatial.distance import cdist
from sklearn.linear_model import LogisticRegression

from bigprune.cli import main
from bigprune.common.errors import InputError
from bigprune.selection.hardness import ddd_scores
from bigprune.selection.influence import influence_scores
from bigprune.selection.kcenter import greedy
from bigprune.common.schema import NO_LABEL
from bigprune.selection.select import parse_budget, select
from bigprune.selection.strategies import STRATEGIES, largest_remainder
from conftest import add_propagate, write_graph_store

select_module = importlib.import_module("bigprune.selection.select")  # the package's `select` is the function


pytestmark = pytest.mark.usefixtures("restore_threads")  # tests here set numba's threads


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


# The rule (bigprune.common.options): a decimal point or % makes a fraction of the pool, an
# integer a count; Python floats are fractions and ints counts.
@pytest.mark.parametrize("budget,k", [(0.1, 12), ("0.25", 30), (5, 5), ("7", 7), (120, 120),
                                      (1, 1), ("1", 1), (1.0, 120), ("1.0", 120), ("5%", 6),
                                      (".5", 60), (0.001, 1), (np.int64(3), 3)])
def test_budget_parsing(budget, k):
    assert parse_budget(budget, 120) == k


@pytest.mark.parametrize("budget", [0, -3, float("nan"), "nan", 2.5, "2.5", "1e3", "0.0", "150%",
                                    "abc", None, True])
def test_budget_errors(budget):
    with pytest.raises(InputError) as err:
        parse_budget(budget, 120)
    assert str(err.value) == (f"--budget {budget}: use a fraction in (0, 1] written with a decimal "
                              f"point or % (0.05, 1.0, 5%) or a count written as an integer (1, 5000)")


def test_budget_larger_than_pool(store):
    with pytest.raises(InputError) as err:
        run(store, "random", 121)
    assert str(err.value) == ("--budget 121: larger than the training pool (120 nodes); "
                              "use at most 120 or a fraction such as 1.0")


def test_option_errors(store, tmp_path):
    cases = [
        (dict(strategy="best"), "--strategy best: unknown; use one of kmedian, kmeans, kcenter, kcenter-pool, "
                                "random, stratified, degree, pagerank, entropy, el2n, age, ddd, influence"),
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
    assert table.column_names == ["node_id", "rank", "label", "reason", "serves"]
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


# ---- constraints: quotas, include and exclude lists, radius mode ----------------------------
def id_file(path, dense):
    """A Parquet file with the user's ids (dense * 7 + 100, as the fixtures write them)."""
    pq.write_table(pa.table({"node_id": np.asarray(dense, dtype=np.int64) * 7 + 100}), path)
    return path


@pytest.mark.parametrize("strategy", sorted(STRATEGIES))
def test_every_rule_meets_budget_quotas_include_and_exclude(skewed, tmp_path, strategy):
    # reference: the contract, checked with numpy set operations and collections.Counter
    label = skewed.load("graph", "label")
    pool = np.flatnonzero(skewed.load("graph", "split") == 1)
    include = [17, 3, 60]                     # node 3 is of the rare class 3
    exclude = [0, 1, 40, 41, 42, 200]         # 200 is a test node: outside the pool, allowed
    result = run(skewed, strategy, 16, min_per_class=4,
                 include=id_file(tmp_path / "inc.parquet", include),
                 exclude=id_file(tmp_path / "exc.parquet", exclude))
    picked = result["indices"]
    assert len(picked) == 16 and len(np.unique(picked)) == 16
    assert np.isin(picked, pool).all() and not np.isin(picked, exclude).any()
    assert list(picked[:3]) == include
    available = Counter(label[np.setdiff1d(pool, exclude)].tolist())
    counts = Counter(label[picked].tolist())
    assert available[3] == 3  # two of the five rare nodes are excluded: the quota is capped
    for c, size in available.items():
        assert counts[c] >= min(4, size)
    assert result["changed"] == {"kept": 3, "added": 13, "dropped": 0}
    constraints = result["constraints"]
    assert constraints["include"]["nodes"] == 3
    assert constraints["exclude"] == {"file": str(tmp_path / "exc.parquet"), "nodes": 5,
                                      "outside_pool": 1}
    assert constraints["min_per_class"]["counts"] == {"0": 4, "1": 4, "2": 4, "3": 3}
    assert result["pool"] == len(pool) - 5


@pytest.mark.parametrize("strategy", ["random", "degree", "kcenter", "kcenter-pool", "entropy", "ddd",
                                      "influence"])
def test_quotas_bind_where_the_rule_alone_misses_a_class(skewed, strategy):
    # reference: collections.Counter of the labels, with and without the quota
    label = skewed.load("graph", "label")
    free = Counter(label[run(skewed, strategy, 16)["indices"]].tolist())
    held = Counter(label[run(skewed, strategy, 16, min_per_class=4)["indices"]].tolist())
    assert min(held[c] for c in range(4)) >= 4
    assert min(free[c] for c in range(4)) < 4  # the quota changed something


def hamilton(total, sizes):
    """Largest-remainder (Hamilton) apportionment with exact fractions; ties to the first."""
    quotas = [Fraction(total * s, sum(sizes)) for s in sizes]
    seats = [q.numerator // q.denominator for q in quotas]
    by_remainder = sorted(range(len(sizes)), key=lambda i: -(quotas[i] - seats[i]))
    for i in by_remainder[:total - sum(seats)]:
        seats[i] += 1
    return seats


@pytest.mark.parametrize("budget", [1, 7, 16, 57, 140])
def test_stratified_counts_are_the_largest_remainder_rounding(skewed, budget):
    # reference: Hamilton's largest-remainder method with exact fractions (hamilton above)
    label = skewed.load("graph", "label")
    pool = np.flatnonzero(skewed.load("graph", "split") == 1)
    classes, sizes = np.unique(label[pool], return_counts=True)
    expected = hamilton(budget, sizes.tolist())
    counts = Counter(label[run(skewed, "stratified", budget, seed=5)["indices"]].tolist())
    for c, want in zip(classes.tolist(), expected):
        assert abs(counts[c] - want) <= 1
        assert counts[c] == want  # no constraint: exactly Hamilton's rounding


def test_largest_remainder_with_floors():
    # reference: Hamilton's method (hamilton above) when no floor binds; otherwise the contract:
    # the sum is the total, every count lies in [floor, size], and classes not raised to their
    # floor keep Hamilton's share of what is left within one
    rng = np.random.default_rng(0)
    for _ in range(300):
        sizes = rng.integers(1, 40, size=rng.integers(1, 6))
        total = int(rng.integers(1, sizes.sum() + 1))
        np.testing.assert_array_equal(largest_remainder(total, sizes, np.zeros_like(sizes)),
                                      hamilton(total, sizes.tolist()))
        floors = np.minimum(sizes, rng.integers(0, 6, size=len(sizes)))
        if floors.sum() > total:
            continue
        counts = largest_remainder(total, sizes, floors)
        assert counts.sum() == total and (counts >= floors).all() and (counts <= sizes).all()
        free = counts > floors
        if free.any():
            left = total - floors[~free].sum()
            share = left * sizes[free] / sizes[free].sum()
            assert (np.abs(counts[free] - share) < 1 + 1e-9).all()


def test_stratified_is_seeded(skewed):
    a = run(skewed, "stratified", 20, seed=1)["indices"]
    np.testing.assert_array_equal(a, run(skewed, "stratified", 20, seed=1)["indices"])
    assert not np.array_equal(a, run(skewed, "stratified", 20, seed=2)["indices"])


def test_entropy_rule_ranks_by_sklearn_entropy(skewed):
    # reference: scipy.stats.entropy of sklearn LogisticRegression probabilities on the last hop
    # of the pool, ranked highest first; C = 1 / l2 for the penalty the rule chose on valid rows,
    # which must be the grid value whose sklearn model scores best there (ties: stronger penalty)
    split, label = skewed.load("graph", "split"), skewed.load("graph", "label")
    pool, valid = np.flatnonzero(split == 1), np.flatnonzero(split == 2)
    hop = skewed.load("propagate", "hop_1").astype(np.float64)
    result = run(skewed, "entropy", 25)
    chosen = result["hardness"]["l2"]
    fits = {l2: LogisticRegression(C=1 / l2, max_iter=10000, tol=1e-10).fit(hop[pool], label[pool])
            for l2 in (100.0, 10.0, 1.0, 0.1, 0.01, 0.001)}
    valid_scores = {l2: fit.score(hop[valid], label[valid]) for l2, fit in fits.items()}
    assert chosen["chosen_by"] == "valid accuracy"
    assert valid_scores[chosen["l2"]] == max(valid_scores.values())
    assert chosen["l2"] == max(l2 for l2, v in valid_scores.items() if v == max(valid_scores.values()))
    p = fits[chosen["l2"]].predict_proba(hop[pool])
    expected = pool[np.argsort(-stats.entropy(p.T), kind="stable")][:25]
    np.testing.assert_array_equal(result["indices"], expected)
    assert result["hardness"]["proxy_iterations"] > 0


def test_el2n_rule_ranks_by_its_scores(skewed):
    # reference: EL2N of scikit-learn's LogisticRegression(C = 1 / l2) on the pool's last hop,
    # warm-started from the documented random start and stopped after the rule's 10 L-BFGS
    # steps, 5 runs (test_hardness.sklearn_early_el2n); numpy stable argsort, highest first
    from test_hardness import sklearn_early_el2n

    pool = np.flatnonzero(skewed.load("graph", "split") == 1)
    rows = skewed.load("propagate", "hop_1")[pool]
    result = run(skewed, "el2n", 25, seed=3)
    scores, _ = sklearn_early_el2n(rows, skewed.load("graph", "label")[pool], runs=5, iterations=10,
                                   seed=3, l2=result["hardness"]["l2"]["l2"])
    np.testing.assert_array_equal(result["indices"], pool[np.argsort(-scores, kind="stable")][:25])
    assert result["hardness"]["runs"] == 5


@pytest.mark.parametrize("rule", ["ddd", "influence"])
def test_ddd_and_influence_rules_rank_by_their_scores(skewed, rule):
    # reference: numpy stable argsort of the scores computed directly on the pool's last hop
    # (the scores themselves are checked against scikit-learn in test_hardness / test_influence)
    pool = np.flatnonzero(skewed.load("graph", "split") == 1)
    rows = skewed.load("propagate", "hop_1")[pool]
    labels = skewed.load("graph", "label")[pool]
    options = {"ensemble": 4} if rule == "ddd" else {}
    result = run(skewed, rule, 25, seed=3, **options)
    l2 = result["hardness"]["l2"]["l2"]
    scores = (ddd_scores(rows, labels, members=4, seed=3, l2=l2)[0] if rule == "ddd"
              else influence_scores(rows, labels, l2=l2)[0])
    np.testing.assert_array_equal(result["indices"], pool[np.argsort(-scores, kind="stable")][:25])
    assert result["hardness"]["members" if rule == "ddd" else "method"] == (
        4 if rule == "ddd" else "exact (Cholesky)")


@pytest.mark.parametrize("ensemble,strategy,message", [
    ("3", "ddd", "--ensemble 3: use an even count >= 2 (members come in pairs trained on "
                 "complementary halves of the pool)"),
    ("x", "ddd", "--ensemble x: use an even count >= 2 (members come in pairs trained on "
                 "complementary halves of the pool)"),
    ("4", "el2n", "--ensemble 4: only --strategy ddd has an ensemble; drop the option or use ddd")])
def test_ensemble_option_errors(skewed, tmp_path, capsys, ensemble, strategy, message):
    out = tmp_path / "x.parquet"
    assert main(["select", "--store", str(skewed.path), "--strategy", strategy, "--budget", "5",
                 "--ensemble", ensemble, "--out", str(out), "--quiet"]) == 2
    assert capsys.readouterr().err.strip().endswith(message)
    assert not out.exists()


def test_kcenter_quota_swaps_keep_the_greedy_prefix(skewed):
    # reference: the greedy run directly (bigprune.selection.kcenter.greedy, checked against a numpy
    # greedy in test_kcenter): the kept picks are its order minus the latest over-quota picks
    label = skewed.load("graph", "label")
    split = skewed.load("graph", "split")
    pool, targets = np.flatnonzero(split == 1), np.flatnonzero(split == 3)
    rows = skewed.load("propagate", "hop_1")
    plain = pool[greedy(rows[targets], rows[pool], 16, exact=True).order]
    result = run(skewed, "kcenter", 16, min_per_class=4)
    picked = result["indices"]
    swaps = result["quota_swaps"]
    dropped, added = swaps["dropped"], sum(swaps["added"].values())
    assert dropped == added > 0
    kept = picked[:16 - added]
    assert np.isin(kept, plain).all()
    np.testing.assert_array_equal(kept, plain[np.isin(plain, kept)])  # same order
    gone = plain[~np.isin(plain, kept)]
    assert len(gone) == dropped
    # Dropping walks back from the last pick and skips classes at (or under) their quota: a
    # dropped pick's later classmates are dropped too, and a kept pick after the first dropped
    # one belongs to a class left at most at its quota.
    have = Counter(label[kept].tolist())
    position = {node: i for i, node in enumerate(plain)}
    for g in gone:
        later = plain[position[g] + 1:]
        assert np.isin(later[label[later] == label[g]], gone).all()
        assert have[label[g]] >= 4
    first = min(position[g] for g in gone)
    assert all(have[label[node]] <= 4 for node in plain[first:] if node in kept)
    extra = picked[16 - added:]
    assert Counter(label[extra].tolist()) == {int(c): n for c, n in swaps["added"].items()}
    # the coverage carried through the swaps is the exact one (reference: scipy cdist)
    d = cdist(rows[targets].astype(np.float64), rows[picked].astype(np.float64)).min(1)
    assert result["coverage"]["radius"] == pytest.approx(d.max(), rel=1e-9)
    assert result["coverage"]["mean"] == pytest.approx(d.mean(), rel=1e-9)


def test_radius_mode_is_the_shortest_greedy_prefix(skewed):
    # reference: scipy.spatial.distance.cdist from every target to the chosen nodes
    split = skewed.load("graph", "split")
    targets = np.flatnonzero(split == 3)
    rows = skewed.load("propagate", "hop_1").astype(np.float64)
    full = run(skewed, "kcenter", 30)
    radius = 0.5 * (full["coverage"]["radius"] + run(skewed, "kcenter", 29)["coverage"]["radius"])
    result = run(skewed, "kcenter", None, radius=radius)
    picked = result["indices"]
    assert cdist(rows[targets], rows[picked]).min(1).max() <= radius
    assert cdist(rows[targets], rows[picked[:-1]]).min(1).max() > radius
    assert result["constraints"]["radius"] == radius and result["budget"] is None
    assert result["coverage"]["radius"] <= radius


def test_radius_mode_with_include_and_quotas(skewed, tmp_path):
    # reference: cdist radius of the greedy prefix; Counter of labels for the quota picks
    label = skewed.load("graph", "label")
    split = skewed.load("graph", "split")
    targets = np.flatnonzero(split == 3)
    rows = skewed.load("propagate", "hop_1").astype(np.float64)
    radius = run(skewed, "kcenter", 10)["coverage"]["radius"]
    result = run(skewed, "kcenter", None, radius=radius, min_per_class=3,
                 include=id_file(tmp_path / "inc.parquet", [80, 81]))
    picked = result["indices"]
    added = sum(result["quota_swaps"]["added"].values())
    prefix = picked[:len(picked) - added]
    assert list(picked[:2]) == [80, 81] and result["quota_swaps"]["dropped"] == 0
    assert cdist(rows[targets], rows[prefix]).min(1).max() <= radius
    assert cdist(rows[targets], rows[prefix[:-1]]).min(1).max() > radius
    assert min(Counter(label[picked].tolist())[c] for c in range(4)) >= 3


def test_radius_that_cannot_be_reached(skewed):
    # reference: cdist from every target to the whole pool: the smallest reachable radius
    split = skewed.load("graph", "split")
    rows = skewed.load("propagate", "hop_1").astype(np.float64)
    best = cdist(rows[split == 3], rows[split == 1]).min(1).max()
    with pytest.raises(InputError) as err:
        run(skewed, "kcenter", None, radius=best * 0.99)
    assert str(err.value).startswith(f"--radius {best * 0.99}: cannot be reached even with the "
                                     f"whole pool (140 candidates); use --radius ")
    suggested = float(str(err.value).split("use --radius ")[1].split()[0])
    assert suggested >= best
    assert run(skewed, "kcenter", None, radius=suggested)["coverage"]["radius"] <= suggested


def test_constraint_errors(skewed, tmp_path):
    inc = id_file(tmp_path / "inc.parquet", [5, 6])
    exc = id_file(tmp_path / "exc.parquet", [6, 7])
    pq.write_table(pa.table({"id": [100]}), tmp_path / "noid.parquet")
    pq.write_table(pa.table({"node_id": ["a"]}), tmp_path / "strings.parquet")
    (tmp_path / "junk.parquet").write_text("not parquet")
    twice = id_file(tmp_path / "twice.parquet", [5, 9, 5])
    test_node = id_file(tmp_path / "test.parquet", [5, 200])
    unknown = id_file(tmp_path / "unknown.parquet", [5, 9999])
    every = id_file(tmp_path / "every.parquet", np.arange(140))
    many = id_file(tmp_path / "many.parquet", np.arange(20))
    cases = [
        (dict(include=test_node), f"--include {test_node}: node 1500 is not in the training pool; "
                                  f"give ids of nodes with split train and a label"),
        (dict(include=unknown), f"--include {unknown}: node 70093 is not in the training pool; "
                                f"give ids of nodes with split train and a label"),
        (dict(include=twice), f"--include {twice}: node 135 appears twice; list each node once"),
        (dict(include=many), f"--include {many}: 20 nodes, more than the budget 12; raise "
                             f"--budget to at least 20 or shorten the file"),
        (dict(include=inc, exclude=exc), f"--include {inc}: node 142 is also in --exclude {exc}; "
                                         f"a node cannot be both"),
        (dict(include=tmp_path / "none.parquet"), f"--include {tmp_path / 'none.parquet'}: no such file"),
        (dict(include=tmp_path / "junk.parquet"),
         f"--include {tmp_path / 'junk.parquet'}: not a readable Parquet file (Parquet magic bytes not "
         f"found in footer. Either the file is corrupted or this is not a parquet file.)"),
        (dict(exclude=tmp_path / "noid.parquet"),
         f"--exclude {tmp_path / 'noid.parquet'}: no node_id column; give a Parquet file with one "
         f"(a bigprune selection has it)"),
        (dict(exclude=tmp_path / "strings.parquet"),
         f"--exclude {tmp_path / 'strings.parquet'}: node_id holds string values but the store's "
         f"ids are int64; write the ids as int64"),
        (dict(exclude=unknown), f"--exclude {unknown}: node 70093 is not in the graph; give ids "
                                f"from the node table"),
        (dict(exclude=every), f"--exclude {every}: removes every training pool node; nothing is "
                              f"left to choose"),
        (dict(budget=130, exclude=many), f"--budget 130: 130 picks, but only 120 pool nodes remain "
                                         f"after --exclude {many}; use at most 120"),
        (dict(min_per_class=4), "--min-per-class 4: 4 classes need 16 picks, more than the budget "
                                "12; use at most 3 or raise --budget"),
        (dict(min_per_class=10**9), "--min-per-class 1000000000: 4 classes need 140 picks, more "
                                    "than the budget 12; use at most 3 or raise --budget"),
        (dict(min_per_class=3, include=inc), None),
        (dict(min_per_class="0.4"), "--min-per-class 0.4: 4 classes need 20 picks, more than the "
                                    "budget 12; use at most 3 or raise --budget"),
        # the budget's rule, for a quota too (bigprune.common.options)
        (dict(min_per_class="2.5"), "--min-per-class 2.5: use a fraction in (0, 1] written with a "
                                    "decimal point or % (0.05, 1.0, 5%) or a count written as an "
                                    "integer (1, 5000)"),
        (dict(min_per_class=0), "--min-per-class 0: use a fraction in (0, 1] written with a "
                                "decimal point or % (0.05, 1.0, 5%) or a count written as an "
                                "integer (1, 5000)"),
        (dict(budget=None), "--budget: required (a fraction of the training pool or a count) "
                            "unless --radius is given with --strategy kcenter"),
        (dict(radius=1.0), "--radius 1.0: give --budget or --radius, not both; the radius mode "
                           "picks as many nodes as it needs"),
        (dict(budget=None, radius=1.0, strategy="random"),
         "--radius 1.0: only --strategy kcenter has a radius mode; use kcenter or give --budget "
         "instead"),
        (dict(budget=None, radius="-1"), "--radius -1: use a distance >= 0 in the embedding's "
                                         "units (a report's coverage radius shows the scale)"),
        (dict(budget=None, radius=1.0, min_per_class=0.2),
         "--min-per-class 0.2: a fraction of the budget needs --budget; with --radius give a "
         "whole count"),
        (dict(include=inc, initial=[135]), f"--include {inc}: give either an include file or "
                                           f"initial ids, not both"),
    ]
    for options, message in cases:
        args = {"strategy": "kcenter", "budget": 12, **options}
        if message is None:  # 4 classes x 3 = 12 picks, two of them already included: fits
            assert len(run(skewed, **args)["indices"]) == 12
            continue
        with pytest.raises(InputError) as err:
            run(skewed, **args)
        assert str(err.value) == message


def test_quota_with_include_counts_the_included(skewed, tmp_path):
    # All five rare-class nodes are included: that class takes 5 slots, not its quota of 4,
    # so 4 + 4 + 4 + 5 = 17 picks are needed (hand count; labels fixed by the fixture).
    inc = id_file(tmp_path / "inc.parquet", [0, 1, 2, 3, 4])
    with pytest.raises(InputError) as err:
        run(skewed, "random", 16, min_per_class=4, include=inc)
    assert str(err.value) == ("--min-per-class 4: 4 classes need 17 picks with the include list, "
                              "more than the budget 16; use at most 3 or raise --budget")
    picked = run(skewed, "random", 17, min_per_class=4, include=inc)["indices"]
    counts = Counter(skewed.load("graph", "label")[picked].tolist())
    assert counts == {0: 4, 1: 4, 2: 4, 3: 5}


def test_command_line_constraints_and_radius(skewed, tmp_path, capsys):
    # reference: the report the library returns for the same options
    inc = id_file(tmp_path / "inc.parquet", [5, 6])
    exc = id_file(tmp_path / "exc.parquet", [7])
    out = tmp_path / "cli.parquet"
    assert main(["select", "--store", str(skewed.path), "--strategy", "stratified", "--budget",
                 "20", "--include", str(inc), "--exclude", str(exc), "--min-per-class", "0.1",
                 "--out", str(out), "--quiet", "--threads", "1"]) == 0
    report = json.loads(out.with_suffix(".json").read_text())
    assert report["constraints"]["min_per_class"]["counts"] == {"0": 2, "1": 2, "2": 2, "3": 2}
    assert report["changed"] == {"kept": 2, "added": 18, "dropped": 0}
    table = pq.read_table(out)
    assert table.column("node_id").to_pylist()[:2] == [135, 142]
    capsys.readouterr()
    assert main(["select", "--store", str(skewed.path), "--strategy", "kcenter", "--radius",
                 "1e-9", "--out", str(out), "--quiet", "--threads", "1"]) == 2
    assert "--radius 1e-09: cannot be reached even with the whole pool" in capsys.readouterr().err


def test_restricted_propagation_refuses_uncomputed_targets(tmp_path, capsys):
    """propagate --restrict computes the last hops only for pool, valid and test rows: selecting
    for unsplit targets must refuse instead of reading the rows it skipped."""
    from bigprune.cli import main
    from bigprune.propagation.propagate import propagate
    from conftest import random_symmetric

    rng = np.random.default_rng(5)
    n = 200
    split = np.zeros(n, dtype=np.int8)
    split[:60], split[60:80] = 1, 3
    label = np.where(split == 1, rng.integers(0, 3, n), NO_LABEL)
    store = write_graph_store(tmp_path / "s", random_symmetric(n, 0.01, rng), rng.normal(size=(n, 4)), split, label)
    propagate(store, hops=2, restrict=True)
    args = ["select", "--store", str(tmp_path / "s"), "--strategy", "random", "--budget", "5", "--quiet"]
    assert main(args + ["--out", str(tmp_path / "a.parquet")]) == 0
    assert main(args + ["--targets", "unlabeled", "--out", str(tmp_path / "b.parquet")]) == 2
    assert "rerun bigprune propagate --no-restrict" in capsys.readouterr().err


# ---- targets kept on disk when their rows do not fit the budget -----------------------------
@pytest.mark.parametrize("strategy,options", [("kcenter", {}), ("kcenter", {"min_per_class": 4}),
                                              ("random", {})])
def test_targets_on_disk_give_the_same_selection_and_coverage(skewed, monkeypatch, strategy, options):
    # reference: the in-memory run (checked against a plain numpy greedy in test_kcenter) and
    # scipy cdist coverage of the chosen nodes
    memory = run(skewed, strategy, 16, **options)
    assert memory["targets_in_memory"]
    monkeypatch.setattr(select_module, "_in_memory_bytes", lambda targets, width: 1 << 50)
    monkeypatch.setattr(select_module, "GROUP_ROWS", 7)
    disk = run(skewed, strategy, 16, memory_budget="1GiB", **options)
    assert not disk["targets_in_memory"]
    np.testing.assert_array_equal(disk["indices"], memory["indices"])
    assert disk["coverage"] == memory["coverage"] and disk["load"] == memory["load"]
    hop = skewed.load("propagate", "hop_1").astype(np.float64)
    targets = np.flatnonzero(skewed.load("graph", "split") == 3)
    d = cdist(hop[targets], hop[disk["indices"]]).min(1)
    assert disk["coverage"]["radius"] == pytest.approx(d.max(), rel=1e-6)
    assert not any((skewed.path / ".staging").glob("select-*"))  # scratch removed


def test_refuses_when_even_targets_on_disk_do_not_fit(skewed, monkeypatch, capsys):
    monkeypatch.setattr(select_module, "_in_memory_bytes", lambda targets, width: 1 << 50)
    monkeypatch.setattr(select_module, "_on_disk_bytes", lambda *args: 3 << 30)
    assert main(["select", "--store", str(skewed.path), "--strategy", "kcenter", "--budget", "5",
                 "--memory-budget", "2GiB", "--out", str(skewed.path.parent / "x.parquet"),
                 "--quiet"]) == 3
    err = capsys.readouterr().err
    # 3 GiB of state + 320 MiB fixed overhead + the pool's rows and one chunk, rounded up
    assert ("--memory-budget 2.0 GiB is too small for select --strategy kcenter with 100 targets, "
            "even with their rows kept on disk: use at least 3.4 GiB") in err
    assert not run(skewed, "kcenter", 5, memory_budget="3.4GiB")["targets_in_memory"]


def plain_cover_greedy(targets, pool, radius, share):
    """The k-supplier greedy in plain numpy (farthest active target, its nearest pool node; a
    target whose nearest node is already chosen is set aside), stopped at the shortest prefix
    that brings ``share`` of the targets within ``radius``."""
    d = cdist(targets, pool)
    dist, active, order = np.full(len(targets), np.inf), np.ones(len(targets), bool), []
    while np.mean(dist <= radius) < share:
        t = int(np.argmax(np.where(active, dist, -1.0)))
        c = int(np.argmin(d[t]))
        active[t] = False
        if c not in order:
            order.append(c)
            dist = np.minimum(dist, d[:, c])
    return order


@pytest.mark.parametrize("share", [0.5, 0.9, "95%"])
def test_cover_mode_is_the_shortest_greedy_prefix_reaching_the_share(skewed, share):
    split = skewed.load("graph", "split")
    pool, targets = np.flatnonzero(split == 1), np.flatnonzero(split == 3)
    rows = skewed.load("propagate", "hop_1").astype(np.float64)
    everyone = cdist(rows[targets], rows[pool]).min(1)
    radius = float(np.quantile(everyone, 0.5)) * 2  # reachable for any share with the whole pool
    result = run(skewed, "kcenter", None, radius=radius, cover=share)
    wanted = 0.95 if share == "95%" else share
    # reference: the same greedy in plain numpy on scipy cdist distances
    expected = pool[plain_cover_greedy(rows[targets], rows[pool], radius, wanted)]
    np.testing.assert_array_equal(result["indices"], expected)
    d = cdist(rows[targets], rows[result["indices"]]).min(1)
    assert np.mean(d <= radius) >= wanted > np.mean(cdist(rows[targets], rows[expected[:-1]]).min(1) <= radius)
    assert result["constraints"]["cover"] == wanted
    assert result["coverage"]["within"]["asked"] == pytest.approx(np.mean(d <= radius), abs=1e-12)


def test_cover_share_the_whole_pool_cannot_reach_names_the_radius_that_would(skewed):
    split = skewed.load("graph", "split")
    rows = skewed.load("propagate", "hop_1").astype(np.float64)
    # reference: cdist from every target to the whole pool; the 90% share needs the distance
    # of the 90th target in sorted order
    best = np.sort(cdist(rows[split == 3], rows[split == 1]).min(1))[89]
    with pytest.raises(InputError) as err:
        run(skewed, "kcenter", None, radius=best * 0.99, cover=0.9)
    assert str(err.value).startswith(f"--radius {best * 0.99} --cover 0.9: cannot be reached even "
                                     f"with the whole pool (140 candidates); use --radius ")
    suggested = float(str(err.value).split("use --radius ")[1].split()[0])
    assert best <= suggested <= best * (1 + 2e-5)
    run(skewed, "kcenter", None, radius=suggested, cover=0.9)


@pytest.mark.parametrize("cover, message", [
    ("1.5", "--cover 1.5: use a share of the targets in (0, 1], e.g. 0.95 or 95%"),
    ("0", "--cover 0: use a share of the targets in (0, 1], e.g. 0.95 or 95%"),
    ("most", "--cover most: use a share of the targets in (0, 1], e.g. 0.95 or 95%"),
])
def test_cover_errors(skewed, cover, message):
    with pytest.raises(InputError) as err:
        run(skewed, "kcenter", None, radius=1.0, cover=cover)
    assert str(err.value) == message
    with pytest.raises(InputError) as err:
        run(skewed, "kcenter", 10, cover="0.9")
    assert str(err.value) == ("--cover 0.9: goes with --radius (the share of targets to bring "
                              "within it); give --radius R too")


@pytest.mark.parametrize("strategy, budget", [("kcenter", 10), ("random", 25)])
def test_coverage_gives_the_share_within_radius_p90_and_p99(skewed, strategy, budget):
    split = skewed.load("graph", "split")
    rows = skewed.load("propagate", "hop_1").astype(np.float64)
    result = run(skewed, strategy, budget)
    # reference: numpy quantiles and shares of scipy cdist distances to the nearest pick
    d = cdist(rows[split == 3], rows[result["indices"]]).min(1)
    cover = result["coverage"]
    assert cover["radius"] == pytest.approx(d.max(), rel=1e-9)
    for name, q in (("p50", 0.5), ("p90", 0.9), ("p99", 0.99)):
        assert cover[name] == pytest.approx(np.quantile(d, q), rel=1e-9)
    assert cover["within"] == {"radius": 1.0, "p90": pytest.approx(np.mean(d <= np.quantile(d, 0.9))),
                               "p99": pytest.approx(np.mean(d <= np.quantile(d, 0.99)))}


def _age_reference(rows, labels, centrality, steps, seed):
    """AGE's score from its published definition (Cai, Zheng & Chang, 2017), computed without the
    project: gamma = mean over t < steps of E[Beta(1, 1.005 - 0.9^t)] (scipy.stats.beta),
    alpha = beta = (1 - gamma) / 2; entropy of scikit-learn's LogisticRegression(C = 1 / l2 = 1)
    probabilities (scipy.stats.entropy); density 1 / (1 + distance to the row's k-means centre),
    the centres from FAISS's k-means (as many as the classes, 20 iterations, the selection's
    seed) and the distance in numpy; percentiles = scipy.stats.percentileofscore(kind="strict") / 100."""
    gamma = np.mean([stats.beta(1, 1.005 - 0.9 ** t).mean() for t in range(steps)])
    alpha = beta = (1 - gamma) / 2
    model = LogisticRegression(C=1.0, max_iter=10000, tol=1e-10).fit(rows.astype(np.float64), labels)
    entropy = stats.entropy(model.predict_proba(rows.astype(np.float64)).T)
    import faiss

    kmeans = faiss.Kmeans(rows.shape[1], len(np.unique(labels)), niter=20, seed=seed, verbose=False,
                          min_points_per_centroid=1)
    kmeans.train(np.ascontiguousarray(rows, dtype=np.float32))
    centre = kmeans.index.search(np.ascontiguousarray(rows, dtype=np.float32), 1)[1][:, 0]
    density = 1.0 / (1.0 + np.linalg.norm(rows - kmeans.centroids[centre], axis=1))

    def share(v):
        return np.array([stats.percentileofscore(v, e, kind="strict") / 100 for e in v])

    return alpha * share(entropy) + beta * share(density) + gamma * share(centrality)


@pytest.fixture
def blob_store(tmp_path):
    """150 nodes in three blobs 40 apart (4-d), edges only inside a blob, a quarter of
    the labels flipped so that the proxy is unsure of some; 120 train, 30 test, no valid split
    (so the proxy's l2 is 1, scikit-learn's C = 1)."""
    rng = np.random.default_rng(21)
    n = 150
    blob = np.arange(n) % 3
    centres = np.array([[0, 0, 0, 0], [40, 0, 0, 0], [0, 40, 0, 0]], dtype=np.float64)
    features = centres[blob] + rng.normal(scale=1.0, size=(n, 4))
    label = np.where(rng.random(n) < 0.25, (blob + rng.integers(1, 3, size=n)) % 3, blob)
    same = blob[:, None] == blob[None, :]
    upper = np.triu((rng.random((n, n)) < 0.12) & same, k=1)
    adj = sp.csr_matrix((upper | upper.T).astype(np.float64))
    split = np.where(np.arange(n) < 120, 1, 3)
    label = np.where(split == 3, NO_LABEL, label)
    store = add_propagate(write_graph_store(tmp_path / "store", adj, features, split, label))
    return store, blob, adj


def test_age_rule_follows_its_published_definition_with_networkx_pagerank(blob_store):
    store, blob, adj = blob_store
    pool = np.arange(120)
    rows = store.load("propagate", "hop_1")[pool]  # the smoothed rows the rule reads
    # reference centrality: networkx.pagerank (alpha 0.85) on the whole graph, read on the pool
    rank = nx.pagerank(nx.from_scipy_sparse_array(adj), alpha=0.85, tol=1e-12)
    centrality = np.array([rank[i] for i in pool])
    k = 25
    expected = _age_reference(rows, store.load("graph", "label")[pool], centrality, k, seed=0)
    result = run(store, "age", k, seed=0)
    picked = result["indices"]
    # the picks are the k best by the reference score (a swap of near-ties is allowed: the
    # proxy's entropies agree with scikit-learn's to ~1e-4, which may move a percentile by 1/120)
    kth = np.sort(expected)[::-1][k - 1]
    assert expected[picked].min() >= kth - 0.01, (expected[picked].min(), kth)
    assert len(set(picked) & set(np.argsort(-expected)[:k])) >= k - 2
    assert result["hardness"]["l2"]["l2"] == 1.0

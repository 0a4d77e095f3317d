"""The proxy model through the pipeline, on scikit-learn's bundled handwritten digits and on the
real Citeseer citation graph (tests/data/citeseer/)."""
import json

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
from sklearn.datasets import load_digits
from sklearn.linear_model import LogisticRegression
from sklearn.neighbors import kneighbors_graph
from sklearn.preprocessing import StandardScaler

from bigprune.cli import main
from bigprune.ingestion.ingest import ingest
from bigprune.propagation.propagate import embedding, propagate
from bigprune.common.store import Store
from bigprune.learning.proxy import L2_GRID, evaluate, fit_proxy
from bigprune.learning.train import train


@pytest.fixture(scope="module")
def digits_store(tmp_path_factory):
    """UCI optical digits (Alpaydin & Kaynak, 1998) as shipped by scikit-learn, turned into a
    10-nearest-neighbour graph; 60% train, 20% valid, 20% test."""
    root = tmp_path_factory.mktemp("digits")
    x, y = load_digits(return_X_y=True)
    n = len(y)
    split = np.array(["train", "valid", "test", "train", "train"] * (n // 5 + 1))[:n]
    split = split[np.random.default_rng(0).permutation(n)]
    ids = np.arange(n, dtype=np.int64) * 11 + 5
    label = pa.array([int(c) if s != "test" else None for c, s in zip(y, split)], pa.int64())
    pq.write_table(pa.table({"node_id": ids, "split": split, "label": label,
                             "features": pa.array(x.astype(np.float32).tolist(), pa.list_(pa.float32()))}),
                   root / "nodes.parquet")
    knn = kneighbors_graph(x, 10, include_self=False).tocoo()
    pq.write_table(pa.table({"src": ids[knn.row], "dst": ids[knn.col]}), root / "edges.parquet")
    pq.write_table(pa.table({"node_id": ids[split == "test"], "label": y[split == "test"]}), root / "answers.parquet")
    ingest(root / "edges.parquet", root / "nodes.parquet", root / "store")
    propagate(root / "store", hops=2)
    return root, y, split


def test_full_pool_accuracy_in_the_known_range(digits_store):
    root, y, split = digits_store
    result = train(root / "store", answers=root / "answers.parquet")
    # From memory: linear classifiers reach about 0.95-0.97 on this data set (scikit-learn's own
    # examples report ~0.96 for logistic regression); smoothing over same-digit neighbours should
    # not fall below that range.
    assert 0.93 <= result["valid"]["accuracy"] <= 1.0
    assert 0.93 <= result["answers"]["accuracy"] <= 1.0
    assert result["training_nodes"] == int(np.sum(split == "train"))


def test_standardize_matches_sklearn_on_the_same_propagated_features(digits_store):
    root, y, split = digits_store
    features = np.asarray(embedding(Store(root / "store")))
    train_rows, valid_rows = np.flatnonzero(split == "train"), np.flatnonzero(split == "valid")
    # reference: sklearn StandardScaler + LogisticRegression with the same penalty (C = 1 / l2)
    scaler = StandardScaler().fit(features[train_rows])
    ref = LogisticRegression(C=1.0, max_iter=5000).fit(scaler.transform(features[train_rows]), y[train_rows])
    ref_accuracy = ref.score(scaler.transform(features[valid_rows]), y[valid_rows])
    result = train(root / "store", l2=1.0, standardize=True)
    assert result["standardized"] is True and result["l2"] == {"l2": 1.0, "chosen_by": "given"}
    assert abs(result["valid"]["accuracy"] - ref_accuracy) <= 0.01


def test_default_tunes_l2_on_the_valid_split(digits_store):
    root, y, split = digits_store
    result = train(root / "store")
    choice = result["l2"]
    assert choice["chosen_by"] == "valid accuracy" and "optimistic" in choice["note"]
    assert list(choice["valid_accuracy"]) == [f"{g:g}" for g in L2_GRID]
    best = max(L2_GRID, key=lambda g: (choice["valid_accuracy"][f"{g:g}"], g))
    assert choice["l2"] == best
    # the valid score is the one the chosen value had on the grid
    assert result["valid"]["accuracy"] == choice["valid_accuracy"][f"{best:g}"]
    assert result["standardized"] is False and result["hop"] == 2


def _cli_train(capsys, *options):
    assert main(["train", "--quiet", *map(str, options)]) == 0
    return json.loads(capsys.readouterr().out)


def test_l2_option_is_honoured(digits_store, capsys):
    root, y, split = digits_store
    store = root / "store"
    # an enormous penalty leaves (almost) only the unpenalised intercepts: accuracy near chance
    # (1/10 on ten balanced digits) where the default reaches about 0.97
    flat = _cli_train(capsys, "--store", store, "--l2", "1e12")
    assert flat["l2"] == {"l2": 1e12, "chosen_by": "given"}
    assert flat["valid"]["accuracy"] < 0.3
    # a moderate one equals a direct fit at that value on the same rows and features
    fixed = _cli_train(capsys, "--store", store, "--l2", "0.5")
    features, label = embedding(Store(store)), Store(store).load("graph", "label")
    direct = evaluate(fit_proxy(features, label, np.flatnonzero(split == "train"), l2=0.5),
                      features, label, np.flatnonzero(split == "valid"))
    assert fixed["valid"] == direct and fixed["valid"]["accuracy"] > 0.9


def test_hop_option_is_honoured(digits_store, capsys):
    root, y, split = digits_store
    store = Store(root / "store")
    label = store.load("graph", "label")
    pool, valid = np.flatnonzero(split == "train"), np.flatnonzero(split == "valid")
    seen = {}
    for hop in (0, 2):
        got = _cli_train(capsys, "--store", root / "store", "--hop", hop, "--l2", 1.0)
        # reference: the same fit straight on that hop's rows (hop 0 = the ingested features)
        features = embedding(store, hop)
        direct = evaluate(fit_proxy(features, label, pool, l2=1.0), features, label, valid)
        assert got["hop"] == hop and got["valid"] == direct
        seen[hop] = got["valid"]["per_class"]
    assert seen[0] != seen[2]


def test_train_on_a_selection_and_bad_file(digits_store, tmp_path, capsys):
    root, y, split = digits_store
    pool_ids = (np.flatnonzero(split == "train") * 11 + 5)[:200]
    pq.write_table(pa.table({"node_id": pool_ids}), tmp_path / "picks.parquet")
    result = train(root / "store", nodes_from=tmp_path / "picks.parquet")
    assert result["training_nodes"] == 200 and result["valid"]["evaluated"] == int(np.sum(split == "valid"))
    pq.write_table(pa.table({"node_id": [999999]}), tmp_path / "bad.parquet")
    code = main(["train", "--store", str(root / "store"), "--nodes-from", str(tmp_path / "bad.parquet")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert "--nodes-from" in err and "node 999999 is not in the graph" in err


def test_citeseer_standard_split_reaches_sgc(citeseer):
    store, answers = citeseer("standard")
    result = train(store, answers=answers)
    # Wu et al. (2019), "Simplifying Graph Convolutional Networks", Table 2: SGC (K = 2, row-
    # normalised features, weight decay tuned on the validation split) 71.9 +- 0.1 % on Citeseer
    assert result["answers"]["accuracy"] >= 0.70
    assert result["answers"]["evaluated"] == 1000 and result["training_nodes"] == 120
    assert result["valid"]["evaluated"] == 500 and result["l2"]["chosen_by"] == "valid accuracy"


def test_citeseer_standardize_is_accepted_and_worse(citeseer, capsys):
    store, answers = citeseer("standard")
    got = _cli_train(capsys, "--store", store, "--answers", answers, "--standardize", "--l2", 1)
    plain = _cli_train(capsys, "--store", store, "--answers", answers, "--l2", 1)
    assert got["standardized"] is True and plain["standardized"] is False
    # measured here (not a published figure): standardising the sparse bags of words inflates
    # rare words; on this split it costs about 25 points of test accuracy (0.45 against 0.72)
    assert got["answers"]["accuracy"] < plain["answers"]["accuracy"] - 0.1


def test_a_store_without_valid_nodes_says_which_l2(tmp_path):
    from conftest import random_symmetric, write_graph_store

    rng = np.random.default_rng(5)
    label = rng.integers(0, 3, 200)
    split = np.where(np.arange(200) < 150, 1, 3)  # train and test only
    store = write_graph_store(tmp_path / "store", random_symmetric(200, 0.03, rng),
                              rng.normal(size=(200, 4)) + label[:, None], split, label)
    propagate(store, hops=1, threads=1)
    ids = np.arange(150, 200, dtype=np.int64) * 7 + 100  # the fixture's node ids
    pq.write_table(pa.table({"node_id": ids, "label": label[150:]}), tmp_path / "answers.parquet")
    result = train(store, answers=tmp_path / "answers.parquet")
    # DEFAULT_L2 = 1: scikit-learn's LogisticRegression default C = 1
    assert result["l2"] == {"l2": 1.0, "chosen_by": "default: no valid rows to choose on"}
    assert "valid" not in result and result["answers"]["evaluated"] == 50


def _sgc_hops(store, hops):
    """The propagated features computed with scipy.sparse from the ingested graph:
    X_k = (D^-1/2 (A + I) D^-1/2)^k X (Wu et al., 2019), k = 0 .. hops."""
    import scipy.sparse as sp

    indptr, indices = store.load("graph", "indptr"), store.load("graph", "indices")
    n = len(indptr) - 1
    a = sp.csr_matrix((np.ones(len(indices)), indices, indptr), shape=(n, n)) + sp.identity(n)
    scale = sp.diags(1 / np.sqrt(np.asarray(a.sum(1)).ravel()))
    out = [store.load("graph", "features").astype(np.float64)]
    for _ in range(hops):
        out.append(scale @ a @ scale @ out[-1])
    return out


@pytest.mark.parametrize("hop, l2", [(0, 1e4), (1, 3000.0), (2, 1e4)])
def test_l2_and_hop_match_sklearn_on_that_hop(digits_store, capsys, hop, l2):
    # reference: scikit-learn's LogisticRegression(C = 1 / l2) fitted on the train rows of hop
    # ``hop`` computed with scipy.sparse (no bigprune code), scored on the valid rows; the proxy
    # minimises the same objective, so its per-class accuracy is sklearn's up to a node or two
    # whose prediction sits on a class boundary
    root, y, split = digits_store
    features = _sgc_hops(Store(root / "store"), 2)[hop]
    pool, valid = np.flatnonzero(split == "train"), np.flatnonzero(split == "valid")
    model = LogisticRegression(C=1 / l2, max_iter=20000, tol=1e-10).fit(features[pool], y[pool])
    guess = model.predict(features[valid])
    got = _cli_train(capsys, "--store", root / "store", "--hop", hop, "--l2", l2)
    assert got["hop"] == hop and got["l2"] == {"l2": l2, "chosen_by": "given"}
    assert got["valid"]["accuracy"] == pytest.approx(np.mean(guess == y[valid]), abs=2.5 / len(valid))
    for c, recall in got["valid"]["per_class"].items():
        actual = y[valid] == int(c)
        assert recall == pytest.approx(np.mean(guess[actual] == int(c)), abs=2.5 / actual.sum())

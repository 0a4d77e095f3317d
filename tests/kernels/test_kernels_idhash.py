"""The id hash table against numpy and dict lookups, and the hash ingest path against DuckDB's join."""
import importlib

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigprune.ingestion.ingest import ingest
from bigprune.kernels.idhash import build_table, lookup
from bigprune.common.store import Store


def _table(ids, slots):
    table = np.empty((slots, 3), dtype=np.uint32)
    build_table(ids, table)
    return table


@pytest.mark.parametrize("n", [1, 7, 1000, 50_000])
@pytest.mark.parametrize("spread", ["wide", "dense", "negative"])
def test_lookup_equals_searchsorted(n, spread):
    rng = np.random.default_rng(n)
    if spread == "wide":  # anywhere in int64, the extremes included
        ids = np.unique(rng.integers(np.iinfo(np.int64).min, np.iinfo(np.int64).max, 2 * n, dtype=np.int64,
                                     endpoint=True))
        ids = np.concatenate([[np.iinfo(np.int64).min, np.iinfo(np.int64).max, 0], ids])
    elif spread == "dense":  # consecutive ids, the case a weak hash clusters
        ids = np.arange(3 * n, dtype=np.int64)
    else:
        ids = -np.arange(1, 3 * n + 1, dtype=np.int64) * 977
    ids = rng.permutation(np.unique(ids))[:n]
    table = _table(ids, 2 * len(ids) + 1)
    query = np.concatenate([ids, ids + 1, -ids, rng.integers(-1000, 1000, 500)]).astype(np.int64)
    out = np.full(len(query), 99, dtype=np.int32)
    misses = lookup(query, table, out)
    # reference: numpy.searchsorted over the sorted ids
    order = np.argsort(ids)
    at = np.minimum(np.searchsorted(ids[order], query), len(ids) - 1)
    expected = np.where(ids[order][at] == query, order[at], -1)
    np.testing.assert_array_equal(out, expected)
    assert misses == np.count_nonzero(expected == -1)
    # reference: a Python dict from id to row
    rows = {int(k): i for i, k in enumerate(ids)}
    assert [rows.get(int(q), -1) for q in query[:200]] == out[:200].tolist()


def test_full_but_one_table_still_finds_everything():
    """One free slot is enough for every probe to end; misses must not loop."""
    ids = np.arange(0, 64, 2, dtype=np.int64)
    table = _table(ids, len(ids) + 1)
    out = np.empty(128, dtype=np.int32)
    assert lookup(np.arange(128, dtype=np.int64), table, out) == 96
    # reference: the row of an even id k below 64 is k // 2 by construction
    np.testing.assert_array_equal(out[:64:2], np.arange(32))
    assert np.all(out[1::2] == -1) and np.all(out[64:] == -1)


def _graph_files(root, weighted, unknown):
    rng = np.random.default_rng(4)
    ids = rng.choice(1 << 31, 300, replace=False) - (1 << 30)  # negative ids too; they fit int32
    src, dst = ids[rng.integers(0, 300, 3000)], ids[rng.integers(0, 300, 3000)]
    if unknown:
        src[::97] = 2_000_000_000  # not a node
    pq.write_table(pa.table({"node_id": ids, "split": ["train"] * 300, "label": np.zeros(300, np.int64),
                             "features": pa.array([[1.0, float(i)] for i in range(300)], pa.list_(pa.float32()))}),
                   root / "nodes.parquet")
    (root / "edges").mkdir()
    for part in range(3):
        # one partition stores src as int32: the id types may differ in width across files
        cols = {"src": pa.array(src[part::3], pa.int32() if part == 1 else pa.int64()),
                "dst": dst[part::3]}
        if weighted:
            cols["weight"] = rng.random(len(cols["dst"])) + 0.01
        pq.write_table(pa.table(cols), root / "edges" / f"p{part}.parquet", row_group_size=333)


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("unknown", [False, True])
def test_hash_path_equals_duckdb_path(tmp_path, monkeypatch, weighted, unknown):
    ingest_module = importlib.import_module("bigprune.ingestion.ingest")  # bigprune.ingestion.ingest is the function
    _graph_files(tmp_path, weighted, unknown)
    args = (tmp_path / "edges", tmp_path / "nodes.parquet")
    ours = ingest(*args, tmp_path / "hash", drop_unknown=unknown)
    monkeypatch.setattr(ingest_module, "hashable", lambda *a: False)
    # reference: DuckDB's LEFT JOIN on the id map (the path strings take)
    theirs = ingest(*args, tmp_path / "duck", drop_unknown=unknown)
    for key in ("edge_rows", "unknown_dropped", "self_loops_dropped", "undirected_edges", "repeats_merged"):
        assert ours[key] == theirs[key], key
    assert ours["unknown_dropped"] == (len(range(0, 3000, 97)) if unknown else 0)
    names = ["indptr", "indices"] + (["weight"] if weighted else [])
    for name in names:
        np.testing.assert_array_equal(Store(tmp_path / "hash").load("graph", name),
                                      Store(tmp_path / "duck").load("graph", name))

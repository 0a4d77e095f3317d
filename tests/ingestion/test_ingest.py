"""Ingest: Parquet in, CSR out, checked against networkx and scipy; bad input refused cleanly."""
import importlib

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest
import scipy.sparse as sp

from bigprune.cli import main
from bigprune.ingestion.ingest import ingest
from bigprune.common.store import Store
from conftest import tree_digest


def karate_files(root, id_type="int", weighted=False, repeat=True):
    """networkx's copy of Zachary's karate club (Zachary, 1977) as our Parquet inputs."""
    g = nx.karate_club_graph()
    ids = np.arange(34, dtype=np.int64) * 1009 + 17
    if id_type == "string":
        ids = np.array([f"member-{i:04x}" for i in ids], dtype=object)
    club = np.array([int(g.nodes[i]["club"] == "Officer") for i in range(34)])
    split = ["train" if i % 3 else "test" for i in range(34)]
    label = pa.array([int(club[i]) if split[i] == "train" else None for i in range(34)], pa.int64())
    features = pa.array([[float(i), float(club[i])] for i in range(34)], pa.list_(pa.float32()))
    pq.write_table(pa.table({"node_id": ids, "split": split, "label": label, "features": features}),
                   root / "nodes.parquet")
    edges = list(g.edges(data="weight"))
    src = [ids[a] for a, _, _ in edges]
    dst = [ids[b] for _, b, _ in edges]
    w = [float(x) for _, _, x in edges]
    if repeat:  # the same pair again, reversed, and a self loop: neither may change the graph
        src, dst, w = src + [dst[0], ids[5]], dst + [src[0], ids[5]], w + [w[0], 1.0]
    cols = {"src": src, "dst": dst}
    if weighted:
        cols["weight"] = w
    table = pa.table(cols)
    (root / "edges" / "day=1").mkdir(parents=True)
    (root / "edges" / "day=2").mkdir(parents=True)
    pq.write_table(table.slice(0, 40), root / "edges" / "day=1" / "part-0.parquet")
    pq.write_table(table.slice(40), root / "edges" / "day=2" / "part-0.parquet")
    return g, ids


@pytest.mark.parametrize("id_type", ["int", "string"])
@pytest.mark.parametrize("weighted", [False, True])
def test_karate_club_matches_networkx(tmp_path, id_type, weighted):
    g, ids = karate_files(tmp_path, id_type, weighted)
    summary = ingest(tmp_path / "edges", tmp_path / "nodes.parquet", tmp_path / "store")
    # reference: networkx ships the karate club with 34 members and 78 ties (Zachary, 1977)
    assert summary["nodes"] == 34 and summary["undirected_edges"] == 78
    assert summary["self_loops_dropped"] == 1 and summary["repeats_merged"] == 1
    store = Store(tmp_path / "store")
    indptr, indices = store.load("graph", "indptr"), store.load("graph", "indices")
    data = store.load("graph", "weight") if weighted else np.ones(len(indices), np.float32)
    ours = sp.csr_matrix((data, indices, indptr), shape=(34, 34))
    # reference: networkx.to_scipy_sparse_array of the same graph, rows in node-table order
    theirs = nx.to_scipy_sparse_array(g, nodelist=range(34), weight="weight" if weighted else None)
    assert abs(ours - theirs).max() == 0
    assert all(np.all(np.diff(indices[indptr[r]:indptr[r + 1]]) > 0) for r in range(34))
    assert store.table("graph", "node_id").column("node_id").to_pylist() == list(ids)


def test_features_from_npy(tmp_path):
    karate_files(tmp_path)
    feats = np.random.default_rng(0).normal(size=(34, 5))
    np.save(tmp_path / "f.npy", feats)
    ingest(tmp_path / "edges", tmp_path / "nodes.parquet", tmp_path / "store", features=tmp_path / "f.npy")
    stored = Store(tmp_path / "store").load("graph", "features")
    assert stored.dtype == np.float32 and np.allclose(stored, feats, atol=1e-6)


def test_glob_and_single_file(tmp_path):
    karate_files(tmp_path, repeat=False)
    s1 = ingest(str(tmp_path / "edges" / "day=*" / "*.parquet"), tmp_path / "nodes.parquet", tmp_path / "s1")
    s2 = ingest(tmp_path / "edges" / "day=1" / "part-0.parquet", tmp_path / "nodes.parquet", tmp_path / "s2")
    assert s1["undirected_edges"] == 78 and s2["undirected_edges"] == 40




def _rewrite(path, **changes):
    table = pq.read_table(path)
    for name, values in changes.items():
        if values is None:
            table = table.drop([name])
        else:
            table = table.set_column(table.schema.get_field_index(name), name, values)
    pq.write_table(table, path)


BAD_INPUTS = {
    "missing column": (lambda r: _rewrite(r / "nodes.parquet", label=None),
                       "missing column 'label'"),
    "duplicate node ids": (lambda r: _rewrite(r / "nodes.parquet", node_id=pa.array(
        [17] * 2 + list(range(2, 34)), pa.int64())), "repeats id 17"),
    "unknown node in edges": (lambda r: _rewrite(r / "edges/day=2/part-0.parquet", src=pa.array(
        [123456789] + pq.read_table(r / "edges/day=2/part-0.parquet").column("src").to_pylist()[1:],
        pa.int64())), "names node 123456789, which is not in --nodes"),
    "NaN feature": (lambda r: _rewrite(r / "nodes.parquet", features=pa.array(
        [[float("nan"), 0.0]] + [[1.0, 0.0]] * 33, pa.list_(pa.float32()))),
        "column 'features' row 0 value 0 is nan"),
    "ragged features": (lambda r: _rewrite(r / "nodes.parquet", features=pa.array(
        [[1.0, 0.0]] * 33 + [[1.0]], pa.list_(pa.float32()))), "row 33 has 1 values"),
    "non-Parquet file": (lambda r: (r / "edges/day=2/notes.parquet").write_text("hello"),
                         "not a readable Parquet file"),
    "bad split value": (lambda r: _rewrite(r / "nodes.parquet", split=pa.array(["training"] * 34)),
                        "column 'split' row 0 holds 'training'"),
    "string ids in edges": (lambda r: _rewrite(r / "edges/day=1/part-0.parquet", src=pa.array(["a"] * 40)),
                            "ids must have one type"),
}


@pytest.mark.parametrize("case", sorted(BAD_INPUTS))
@pytest.mark.parametrize("fresh", [True, False])
def test_bad_input_exits_2_and_keeps_store(tmp_path, capsys, case, fresh):
    karate_files(tmp_path)
    store = tmp_path / "store"
    args = ["ingest", "--edges", str(tmp_path / "edges"), "--nodes", str(tmp_path / "nodes.parquet"),
            "--store", str(store), "--quiet"]
    if not fresh:
        assert main(args) == 0
        before = tree_digest(store)
    capsys.readouterr()
    damage, expected = BAD_INPUTS[case]
    damage(tmp_path)
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and expected in err and "Traceback" not in err
    if fresh:
        assert not store.exists()
    else:
        assert tree_digest(store) == before


def test_budget_too_small_exits_3(tmp_path, capsys):
    karate_files(tmp_path)
    code = main(["ingest", "--edges", str(tmp_path / "edges"), "--nodes", str(tmp_path / "nodes.parquet"),
                 "--store", str(tmp_path / "store"), "--memory-budget", "100M"])
    assert code == 3
    assert "--memory-budget 100.0 MiB is too small for ingest" in capsys.readouterr().err
    assert not (tmp_path / "store").exists()


def test_karate_club_homophily_after_ingest(tmp_path):
    g, _ = karate_files(tmp_path)
    table = pq.read_table(tmp_path / "nodes.parquet")
    club = [int(g.nodes[i]["club"] == "Officer") for i in range(34)]
    table = table.set_column(1, "split", pa.array(["train"] * 34)).set_column(2, "label", pa.array(club, pa.int64()))
    pq.write_table(table, tmp_path / "nodes.parquet")
    ingest(tmp_path / "edges", tmp_path / "nodes.parquet", tmp_path / "store")
    from bigprune.selection.report import homophily

    ours = homophily(Store(tmp_path / "store"), np.arange(34, dtype=np.int64), window_rows=7)
    # reference: the same share counted with networkx on its copy of the club (Zachary, 1977)
    shares = [np.mean([g.nodes[v]["club"] == g.nodes[u]["club"] for v in g.neighbors(u)]) for u in g]
    assert ours == pytest.approx(np.mean(shares))


@pytest.mark.parametrize("weighted", [False, True])
@pytest.mark.parametrize("edge_bytes", [1, 700, 1200])
def test_row_block_build_equals_in_memory(tmp_path, monkeypatch, weighted, edge_bytes):
    """A tiny edge share forces the spill-and-bucket path; it must store the very same CSR."""
    ingest_module = importlib.import_module("bigprune.ingestion.ingest")  # bigprune.ingestion.ingest is the function

    g, _ = karate_files(tmp_path, weighted=weighted)
    plan = ingest_module._plan
    monkeypatch.setattr(ingest_module, "_plan", lambda *a: plan(*a)._replace(edge_bytes=edge_bytes))
    summary = ingest(tmp_path / "edges", tmp_path / "nodes.parquet", tmp_path / "store")
    assert summary["row_blocks"] > 1 and summary["undirected_edges"] == 78
    store = Store(tmp_path / "store")
    indptr, indices = store.load("graph", "indptr"), store.load("graph", "indices")
    data = store.load("graph", "weight") if weighted else np.ones(len(indices), np.float32)
    # reference: networkx.to_scipy_sparse_array, as in the in-memory test above
    theirs = nx.to_scipy_sparse_array(g, nodelist=range(34), weight="weight" if weighted else None)
    assert abs(sp.csr_matrix((data, indices, indptr), shape=(34, 34)) - theirs).max() == 0
    assert all(np.all(np.diff(indices[indptr[r]:indptr[r + 1]]) > 0) for r in range(34))


def _random_graph_files(root, weighted):
    """3,000 nodes with random int64 ids, 30,000 edge rows (repeats, reversals, loops) in 3 files."""
    rng = np.random.default_rng(11)
    n, rows = 3000, 30_000
    ids = rng.choice(np.int64(1) << 50, n, replace=False)
    u, v = rng.integers(0, n, rows), rng.integers(0, n, rows)
    u[:500], v[:500] = v[500:1000], u[500:1000]  # repeats, reversed
    v[1000:1100] = u[1000:1100]  # self loops
    split = np.where(rng.random(n) < 0.3, "train", np.where(rng.random(n) < 0.3, "test", None))
    label = pa.array(np.where(split == "train", rng.integers(0, 4, n), None), pa.int64())
    features = pa.FixedSizeListArray.from_arrays(pa.array(rng.normal(size=3 * n).astype(np.float32)), 3)
    pq.write_table(pa.table({"node_id": ids, "split": pa.array(split, pa.string()), "label": label,
                             "features": features}), root / "nodes.parquet", row_group_size=700)
    (root / "edges").mkdir()
    w = rng.random(rows).astype(np.float32) + 0.01
    for part in range(3):
        cols = {"src": ids[u[part::3]], "dst": ids[v[part::3]]}
        if weighted:
            cols["weight"] = w[part::3]
        pq.write_table(pa.table(cols), root / "edges" / f"p{part}.parquet", row_group_size=4000)
    return n, u, v


def _stage_files(path):
    """The graph stage's files, name -> bytes (the manifest, which holds times, left out)."""
    store = Store(path)
    return {p.name: p.read_bytes() for p in sorted(store.stage_dir("graph").iterdir()) if p.is_file()}


@pytest.mark.parametrize("weighted", [False, True])
def test_small_batches_and_edge_share_store_the_same_bytes(tmp_path, monkeypatch, weighted):
    """Node table batches of 7 rows, 1 KiB feature batches and a tiny edge share (many row
    blocks) must write the very same store as the defaults."""
    ingest_module = importlib.import_module("bigprune.ingestion.ingest")
    nodetable = importlib.import_module("bigprune.ingestion.nodetable")
    n, u, v = _random_graph_files(tmp_path, weighted)
    args = (tmp_path / "edges", tmp_path / "nodes.parquet")
    generous = ingest(*args, tmp_path / "generous")
    assert generous["row_blocks"] == 1
    plan = ingest_module._plan
    monkeypatch.setattr(ingest_module, "_plan", lambda *a: plan(*a)._replace(edge_bytes=20_000))
    monkeypatch.setattr(nodetable, "READ_ROWS", 7)
    monkeypatch.setattr(nodetable, "FEATURE_BATCH_BYTES", 1024)
    small = ingest(*args, tmp_path / "small")
    assert small["row_blocks"] > 10
    assert _stage_files(tmp_path / "generous") == _stage_files(tmp_path / "small")
    store = Store(tmp_path / "small")
    indptr, indices = store.load("graph", "indptr"), store.load("graph", "indices")
    # reference: scipy.sparse sums the repeated entries of the symmetrised COO edge list; the
    # pattern of nonzeros is the graph without loops
    keep = u != v
    rows, cols = np.r_[u[keep], v[keep]], np.r_[v[keep], u[keep]]
    a = sp.coo_matrix((np.ones(len(rows)), (rows, cols)), shape=(n, n)).tocsr()
    a.sort_indices()
    np.testing.assert_array_equal(indptr, a.indptr)
    np.testing.assert_array_equal(indices, a.indices)
    # reference: pyarrow's own read of the node table
    table = pq.read_table(tmp_path / "nodes.parquet")
    np.testing.assert_array_equal(store.load("graph", "features"),
                                  np.asarray(table.column("features").to_pylist(), dtype=np.float32))
    assert store.table("graph", "node_id").column("node_id").to_pylist() == table.column("node_id").to_pylist()


def test_errors_name_the_row_across_batches(tmp_path, capsys, monkeypatch):
    """With 5-row batches a bad value in a later batch is still named by its row in the file."""
    monkeypatch.setattr(importlib.import_module("bigprune.ingestion.nodetable"), "READ_ROWS", 5)
    karate_files(tmp_path)
    table = pq.read_table(tmp_path / "nodes.parquet")
    label = table.column("label").to_pylist()
    split = table.column("split").to_pylist()
    row = next(i for i in range(20, 34) if split[i] == "train")
    label[row] = -4
    _rewrite(tmp_path / "nodes.parquet", label=pa.array(label, pa.int64()))
    code = main(["ingest", "--edges", str(tmp_path / "edges"), "--nodes", str(tmp_path / "nodes.parquet"),
                 "--store", str(tmp_path / "store"), "--quiet"])
    assert code == 2
    # reference: the row index pyarrow reads the bad label at
    assert f"column 'label' row {row} holds -4" in capsys.readouterr().err


def test_id_table_finds_a_repeated_id():
    from bigprune.ingestion.idrows import IdTable

    rng = np.random.default_rng(5)
    ids = rng.choice(np.int64(1) << 60, 10_000, replace=False)
    assert IdTable(ids).repeated is None
    ids[7_000] = ids[1_234]
    # reference: numpy.unique's counts name the one id given twice
    values, counts = np.unique(ids, return_counts=True)
    assert IdTable(ids).repeated == int(values[counts > 1][0])


def test_plan_refuses_up_front_and_accepts_the_figure_it_names():
    from bigprune.common.errors import BudgetError
    from bigprune.ingestion.idrows import table_bytes
    from bigprune.common.memory import parse_size

    ingest_module = importlib.import_module("bigprune.ingestion.ingest")
    nodes, rows = 40_000_000, 200_000_000
    with pytest.raises(BudgetError) as refused:
        ingest_module._plan(parse_size("1GiB"), nodes, rows, table_bytes(nodes))
    message = str(refused.value)
    assert "too small to ingest 40,000,000 nodes: use at least" in message
    figure = parse_size(message.rsplit("use at least ", 1)[1].replace(" ", ""))
    plan = ingest_module._plan(figure, nodes, rows, table_bytes(nodes))
    assert plan.duckdb_bytes == 0 and plan.edge_bytes >= 64 << 20
    with pytest.raises(BudgetError):
        ingest_module._plan(figure - (110 << 20), nodes, rows, table_bytes(nodes))  # > the 0.1 GiB rounding
    # the scale the 4 GiB default is meant for: 40M nodes and 200M edge rows are planned, not refused
    assert ingest_module._plan(parse_size("4GiB"), nodes, rows, table_bytes(nodes)).edge_bytes > 1 << 30


@pytest.mark.parametrize("n", [5, 70_000, 300_001])
def test_split_by_block_is_a_stable_sort_of_both_directions_by_row_block(n):
    from bigprune.kernels.csr import split_by_block

    rng = np.random.default_rng(n)
    u = rng.integers(0, n, 5000).astype(np.int32)
    v = np.where(rng.random(5000) < 0.05, u, rng.integers(0, n, 5000)).astype(np.int32)  # some loops
    inner = np.unique(rng.integers(1, n, 6)) if n > 6 else np.array([2], dtype=np.int64)
    bounds = np.concatenate([[0], inner, [n]]).astype(np.int64)
    rows, cols = np.empty(10_000, np.int32), np.empty(10_000, np.int32)
    cuts = np.empty(len(bounds), dtype=np.int64)
    split_by_block(u, v, np.zeros(0, np.float32), bounds, rows, cols, np.zeros(0, np.float32), cuts)
    keep = u != v
    ref_rows = np.stack([u[keep], v[keep]], axis=1).ravel()
    ref_cols = np.stack([v[keep], u[keep]], axis=1).ravel()
    block = np.searchsorted(bounds, ref_rows, side="right") - 1
    order = np.argsort(block, kind="stable")  # reference: numpy's stable sort by block
    used = cuts[-1]
    np.testing.assert_array_equal(rows[:used], ref_rows[order])
    np.testing.assert_array_equal(cols[:used], ref_cols[order])
    np.testing.assert_array_equal(cuts, np.searchsorted(block[order], np.arange(len(bounds)), side="left"))


def test_duckdb_spilling_onto_a_full_disk_is_reported_as_a_full_disk(tmp_path):
    # A real DuckDB sort forced to spill into a 1 MiB tmpfs (root only; skipped elsewhere).
    import errno
    import subprocess

    import duckdb

    from bigprune.ingestion.edges import scan_error

    disk = tmp_path / "disk"
    disk.mkdir()
    if subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1M", "tmpfs", str(disk)],
                      capture_output=True).returncode != 0:
        pytest.skip("cannot mount a tmpfs")
    try:
        con = duckdb.connect()
        for setting in ("memory_limit = '40MB'", f"temp_directory = '{disk}'", "threads = 1"):
            con.execute(f"SET {setting}")
        with pytest.raises(duckdb.Error) as caught:
            con.execute("SELECT (i * 7919) % 10000019 AS a, random() AS b FROM range(20000000) t(i) "
                        "ORDER BY a").fetch_arrow_table()
        con.close()
    finally:
        subprocess.run(["umount", str(disk)], check=True)
    error = scan_error(caught.value, None, 4 << 30)
    assert isinstance(error, OSError) and error.errno == errno.ENOSPC

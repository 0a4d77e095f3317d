"""A corpus of malformed inputs, each run through the command line.

Every case must end with exit status 2, exactly one stderr line that names the file (or option,
or key), the column and row where there is one, and the problem; no traceback; and the store as
it was: byte for byte when it existed, absent when it did not.
"""
import errno
import json
import os
import shutil
import subprocess
import sys
import threading
import time
from contextlib import contextmanager

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from bigprune.cli import main
from bigprune.scenario.scenario import generate
from conftest import tree_digest

NODES = 2000


@pytest.fixture(scope="module")
def pristine(tmp_path_factory):
    """Generated inputs (every node in a split) and a store holding their graph."""
    root = tmp_path_factory.mktemp("pristine")
    generate(root / "data", nodes=NODES, avg_degree=6, dim=8, days=2, parts_per_day=2, seed=5,
             weighted=True, train_fraction=0.5, valid_fraction=0.1, test_fraction=0.4)
    assert main(_ingest_args(root, root / "store")) == 0
    return root


@pytest.fixture(scope="module")
def propagated(pristine):
    """The graph store with its propagate stage too."""
    shutil.copytree(pristine / "store", pristine / "full")
    assert main(["propagate", "--store", str(pristine / "full"), "--quiet", "--threads", "1"]) == 0
    return pristine / "full"


@pytest.fixture
def work(pristine, tmp_path):
    for name in ("data", "store"):
        shutil.copytree(pristine / name, tmp_path / name)
    return tmp_path


@pytest.fixture
def full(propagated, work):
    shutil.copytree(propagated, work / "full")
    return work / "full"


def _ingest_args(root, store, **options):
    args = {"--edges": root / "data" / "edges", "--nodes": root / "data" / "nodes.parquet",
            "--store": store, "--threads": "1"}
    args.update(options)
    flat = ["ingest", "--quiet"]
    for key, value in args.items():
        flat += [key] if value is True else [key, str(value)]
    return flat




def one_error_line(capsys, command):
    err = capsys.readouterr().err
    assert "Traceback" not in err
    assert err.count("\n") == 1 and err.startswith(f"bigprune {command}: error: "), err
    return err


# ---- damaging the inputs --------------------------------------------------------------------
def nodes_file(root):
    return root / "data" / "nodes.parquet"


def part(root, i=0):
    return sorted((root / "data" / "edges").rglob("*.parquet"))[i]


def rewrite(path, **columns):
    """Replace (or with None drop, or add) whole columns of a Parquet file."""
    table = pq.read_table(path)
    for name, values in columns.items():
        if values is None:
            table = table.drop([name])
        elif name in table.column_names:
            table = table.set_column(table.schema.get_field_index(name), name, values)
        else:
            table = table.append_column(name, values)
    pq.write_table(table, path)


def rename(path, old, new):
    table = pq.read_table(path)
    pq.write_table(table.rename_columns([new if c == old else c for c in table.column_names]), path)


def column(path, name):
    return pq.read_table(path).column(name).combine_chunks()


def with_value(path, name, row, value, type=None):
    values = column(path, name).to_pylist()
    values[row] = value
    return pa.array(values, type or column(path, name).type)


def features_as_lists(path):
    """The features as a plain list column (the generator writes fixed-size lists)."""
    return [list(v) for v in column(path, "features").to_pylist()]


def rows_of(path, split):
    return np.flatnonzero(np.asarray(column(path, "split").to_pylist(), dtype=object) == split)


def flip_bytes(path, start, stop):
    data = bytearray(path.read_bytes())
    for i in range(start, stop):
        data[i] ^= 0x5A
    path.write_bytes(bytes(data))


# Each case damages the inputs under ``r`` and returns (changed ingest options, expected text).
def _missing_node_id(r):
    rename(nodes_file(r), "node_id", "id")
    return {}, [str(nodes_file(r)), "missing column 'node_id'"]


def _edges_wrong_names(r):
    rename(part(r), "src", "source")
    return {}, [f"--edges {part(r)}", "missing column 'src'"]


def _float_node_ids(r):
    rewrite(nodes_file(r), node_id=pc.cast(column(nodes_file(r), "node_id"), pa.float64(), safe=False))
    return {}, [str(nodes_file(r)), "column 'node_id' has type double"]


def _string_labels(r):
    rewrite(nodes_file(r), label=pc.cast(column(nodes_file(r), "label"), pa.string()))
    return {}, [str(nodes_file(r)), "column 'label' has type string"]


def _integer_split(r):
    rewrite(nodes_file(r), split=pa.array(np.ones(NODES, dtype=np.int64)))
    return {}, [str(nodes_file(r)), "column 'split' has type int64"]


def _string_features(r):
    rewrite(nodes_file(r), features=pa.array([["1.0", "2.0"]] * NODES))
    return {}, [str(nodes_file(r)), "column 'features' has type list<", "use a list of floats"]


def _string_weights(r):
    rewrite(part(r), weight=pc.cast(column(part(r), "weight"), pa.string()))
    return {}, [str(part(r)), "column 'weight' has type string"]


def _float_edge_ids(r):
    rewrite(part(r), src=pc.cast(column(part(r), "src"), pa.float64(), safe=False))
    return {}, [str(part(r)), "column 'src' has type double", "ids must have one type"]


def _mixed_partition_id_types(r):
    for name in ("src", "dst"):
        rewrite(part(r, 2), **{name: pc.cast(column(part(r, 2), name), pa.string())})
    return {}, [str(part(r, 2)), "column 'src' has type string", "ids must have one type"]


def _weight_in_one_partition_only(r):
    rewrite(part(r, 1), weight=None)
    return {}, [str(part(r, 1)), "lacks a 'weight' column", str(part(r, 0))]


def _null_node_id(r):
    rewrite(nodes_file(r), node_id=with_value(nodes_file(r), "node_id", 17, None))
    return {}, [str(nodes_file(r)), "column 'node_id' is null at row 17"]


def _null_src(r):
    rewrite(part(r, 1), src=with_value(part(r, 1), "src", 7, None))
    return {}, [str(part(r, 1)), "column 'src' is null at row 7"]


def _null_dst(r):
    rewrite(part(r, 3), dst=with_value(part(r, 3), "dst", 0, None))
    return {}, [str(part(r, 3)), "column 'dst' is null at row 0"]


def _duplicate_node_id(r):
    ids = column(nodes_file(r), "node_id")
    rewrite(nodes_file(r), node_id=with_value(nodes_file(r), "node_id", 1500, ids[3].as_py()))
    return {}, [str(nodes_file(r)), f"repeats id {ids[3].as_py()}"]


def _unknown_node(r):
    rewrite(part(r, 2), dst=with_value(part(r, 2), "dst", 3, 424242))
    return {}, [str(part(r, 2)), "row 3 column 'dst' names node 424242", "not in --nodes"]


def _nan_feature(r):
    feats = features_as_lists(nodes_file(r))
    feats[10][3] = float("nan")
    rewrite(nodes_file(r), features=pa.array(feats, pa.list_(pa.float32())))
    return {}, [str(nodes_file(r)), "column 'features' row 10 value 3 is nan"]


def _infinite_feature(r):
    feats = features_as_lists(nodes_file(r))
    feats[1999][0] = -float("inf")
    rewrite(nodes_file(r), features=pa.array(feats, pa.list_(pa.float32())))
    return {}, [str(nodes_file(r)), "column 'features' row 1999 value 0 is -inf"]


def _null_inside_feature_list(r):
    feats = features_as_lists(nodes_file(r))
    feats[4][1] = None
    rewrite(nodes_file(r), features=pa.array(feats, pa.list_(pa.float32())))
    return {}, [str(nodes_file(r)), "column 'features' row 4 value 1 is nan"]


def _ragged_features(r):
    feats = features_as_lists(nodes_file(r))
    feats[7] = feats[7][:5]
    rewrite(nodes_file(r), features=pa.array(feats, pa.list_(pa.float32())))
    return {}, [str(nodes_file(r)), "column 'features' row 7 has 5 values, row 0 has 8"]


def _npy_nan(r):
    x = np.random.default_rng(0).normal(size=(NODES, 4))
    x[1500, 2] = np.nan
    np.save(r / "f.npy", x)
    return {"--features": r / "f.npy"}, [f"--features {r / 'f.npy'}", "row 1500 value 2 is nan"]


def _npy_row_mismatch(r):
    np.save(r / "f.npy", np.zeros((NODES - 1, 4), dtype=np.float32))
    return {"--features": r / "f.npy"}, [f"--features {r / 'f.npy'}", f"has {NODES - 1} rows but the node "
                                         f"table has {NODES}"]


def _npy_one_dimensional(r):
    np.save(r / "f.npy", np.zeros(NODES, dtype=np.float32))
    return {"--features": r / "f.npy"}, [f"--features {r / 'f.npy'}", "use a 2-D float array"]


def _npy_truncated(r):
    np.save(r / "f.npy", np.zeros((NODES, 4), dtype=np.float32))
    (r / "f.npy").write_bytes((r / "f.npy").read_bytes()[:-64])
    return {"--features": r / "f.npy"}, [f"--features {r / 'f.npy'}", "not a readable .npy file"]


def _npy_not_npy(r):
    (r / "f.npy").write_text("0.1,0.2\n")
    return {"--features": r / "f.npy"}, [f"--features {r / 'f.npy'}", "not a .npy file (no NumPy header)"]


def _labels_on_test_rows_only(r):
    split = np.asarray(column(nodes_file(r), "split").to_pylist(), dtype=object)
    answers = dict(zip(*(column(r / "data" / "answers.parquet", c).to_pylist() for c in ("node_id", "label"))))
    ids = column(nodes_file(r), "node_id").to_pylist()
    label = [answers.get(i) if s == "test" else None for i, s in zip(ids, split)]
    rewrite(nodes_file(r), label=pa.array(label, pa.int64()))
    first_train = int(np.flatnonzero((split == "train") | (split == "valid"))[0])
    return {}, [str(nodes_file(r)), f"column 'label' is null at row {first_train}, a train/valid row"]


def _class_without_train_node(r):
    row = int(rows_of(nodes_file(r), "valid")[4])
    rewrite(nodes_file(r), label=with_value(nodes_file(r), "label", row, 99))
    return {}, [str(nodes_file(r)), f"class 99 (row {row}, split valid) has no train node"]


def _negative_label(r):
    row = int(rows_of(nodes_file(r), "train")[0])
    rewrite(nodes_file(r), label=with_value(nodes_file(r), "label", row, -3))
    return {}, [str(nodes_file(r)), f"column 'label' row {row} holds -3"]


def _split_typo(r):
    rewrite(nodes_file(r), split=with_value(nodes_file(r), "split", 11, "Train"))
    return {}, [str(nodes_file(r)), "column 'split' row 11 holds 'Train'"]


def _bad_weight(value, shown):
    def damage(r):
        rewrite(part(r, 1), weight=with_value(part(r, 1), "weight", 4, value))
        return {}, [str(part(r, 1)), f"column 'weight' row 4 holds {shown}", "weights must be"]
    return damage


def _empty_partition(r):
    pq.write_table(pq.read_table(part(r, 1)).slice(0, 0), part(r, 1))
    return {}, [str(part(r, 1)), "the partition holds no rows"]


def _zero_byte_partition(r):
    part(r, 2).write_bytes(b"")
    return {}, [str(part(r, 2)), "not a readable Parquet file"]


def _empty_node_table(r):
    pq.write_table(pq.read_table(nodes_file(r)).slice(0, 0), nodes_file(r))
    return {}, [str(nodes_file(r)), "the node table has no rows"]


def _zero_byte_node_table(r):
    nodes_file(r).write_bytes(b"")
    return {}, [str(nodes_file(r)), "not a readable Parquet file"]


def _only_self_loops(r):
    rows = 0
    for i in range(4):
        rewrite(part(r, i), dst=column(part(r, i), "src"))
        rows += pq.ParquetFile(part(r, i)).metadata.num_rows
    return {}, ["--edges", f"none of the {rows} edge rows joins two different known nodes"]


def _truncated_partition(r):
    data = part(r, 3).read_bytes()
    part(r, 3).write_bytes(data[: len(data) // 2])
    return {}, [str(part(r, 3)), "not a readable Parquet file"]


def _truncated_node_table(r):
    data = nodes_file(r).read_bytes()
    nodes_file(r).write_bytes(data[:-100])
    return {}, [str(nodes_file(r)), "not a readable Parquet file"]


def _corrupt_edge_page(r):
    flip_bytes(part(r, 2), 4, 40)  # the first page header: the footer still reads
    return {}, [str(part(r, 2)), "cannot be read"]


def _corrupt_node_page(r):
    flip_bytes(nodes_file(r), 4, 40)
    return {}, [str(nodes_file(r)), "cannot be read"]


def _csv_partition(r):
    (part(r, 0).parent / "extra.parquet").write_text("src,dst\n1,2\n")
    return {}, [str(part(r, 0).parent / "extra.parquet"), "not a readable Parquet file"]


def _directory_as_nodes(r):
    (r / "data" / "nodes-dir.parquet").mkdir()
    return ({"--nodes": r / "data" / "nodes-dir.parquet"},
            [f"--nodes {r / 'data' / 'nodes-dir.parquet'}", "not a regular file"])


def _fifo_as_edges(r):
    os.mkfifo(r / "edges.parquet")
    return {"--edges": r / "edges.parquet"}, [f"--edges {r / 'edges.parquet'}", "not a regular file"]


def _fifo_as_nodes(r):
    os.mkfifo(r / "nodes.parquet")
    return {"--nodes": r / "nodes.parquet"}, [f"--nodes {r / 'nodes.parquet'}", "not a regular file"]


def _empty_edge_directory(r):
    (r / "none").mkdir()
    return {"--edges": r / "none"}, [f"--edges {r / 'none'}", "directory holds no files"]


def _glob_matches_nothing(r):
    pattern = r / "data" / "edges" / "day=1999-*" / "*.parquet"
    return {"--edges": pattern}, [f"--edges {pattern}", "the pattern matches no files"]


def _bad_budget(r):
    return {"--memory-budget": "lots"}, ["--memory-budget 'lots' is not a size"]


def _zero_threads(r):
    return {"--threads": "0"}, ["--threads 0 must be at least 1"]


INGEST_CASES = {
    "nodes: column node_id renamed": _missing_node_id,
    "edges: columns named source/dst": _edges_wrong_names,
    "nodes: float ids": _float_node_ids,
    "nodes: string labels": _string_labels,
    "nodes: integer split": _integer_split,
    "nodes: string features": _string_features,
    "edges: string weights": _string_weights,
    "edges: float ids": _float_edge_ids,
    "edges: string ids in one partition": _mixed_partition_id_types,
    "edges: weight column in some partitions only": _weight_in_one_partition_only,
    "nodes: null id": _null_node_id,
    "edges: null src": _null_src,
    "edges: null dst": _null_dst,
    "nodes: duplicate id": _duplicate_node_id,
    "edges: unknown node": _unknown_node,
    "nodes: NaN feature": _nan_feature,
    "nodes: infinite feature": _infinite_feature,
    "nodes: null inside a feature list": _null_inside_feature_list,
    "nodes: ragged feature lists": _ragged_features,
    "npy: NaN feature": _npy_nan,
    "npy: one row short": _npy_row_mismatch,
    "npy: 1-D array": _npy_one_dimensional,
    "npy: not an .npy file": _npy_not_npy,
    "npy: truncated": _npy_truncated,
    "nodes: labels on test rows only": _labels_on_test_rows_only,
    "nodes: class with no train node": _class_without_train_node,
    "nodes: negative label": _negative_label,
    "nodes: split typo": _split_typo,
    "edges: negative weight": _bad_weight(-0.5, "-0.5"),
    "edges: NaN weight": _bad_weight(float("nan"), "nan"),
    "edges: zero weight": _bad_weight(0.0, "0.0"),
    "edges: infinite weight": _bad_weight(float("inf"), "inf"),
    "edges: null weight": _bad_weight(None, "None"),
    "edges: partition with 0 rows": _empty_partition,
    "edges: zero-byte partition": _zero_byte_partition,
    "nodes: 0 rows": _empty_node_table,
    "nodes: zero-byte file": _zero_byte_node_table,
    "edges: only self loops": _only_self_loops,
    "edges: truncated partition": _truncated_partition,
    "nodes: truncated file": _truncated_node_table,
    "edges: corrupt page header": _corrupt_edge_page,
    "nodes: corrupt page header": _corrupt_node_page,
    "edges: a CSV named .parquet": _csv_partition,
    "nodes: a directory named like a file": _directory_as_nodes,
    "edges: a FIFO": _fifo_as_edges,
    "nodes: a FIFO": _fifo_as_nodes,
    "edges: empty directory": _empty_edge_directory,
    "edges: glob matching nothing": _glob_matches_nothing,
    "option: --memory-budget lots": _bad_budget,
    "option: --threads 0": _zero_threads,
}


@contextmanager
def fifo_guard(root):
    """If the code under test opens a FIFO below ``root`` for reading, open its write end and
    close it (the reader sees end of file), so a regression fails instead of hanging."""
    stop = threading.Event()

    def unblock():
        while not stop.is_set():
            for fifo in [p for p in root.iterdir() if p.is_fifo()]:
                try:
                    os.close(os.open(fifo, os.O_WRONLY | os.O_NONBLOCK))
                except OSError as exc:
                    if exc.errno != errno.ENXIO:  # ENXIO: nobody reads it yet
                        raise
            time.sleep(0.05)

    thread = threading.Thread(target=unblock, daemon=True)
    thread.start()
    try:
        yield
    finally:
        stop.set()
        thread.join()


@pytest.mark.parametrize("case", list(INGEST_CASES))
@pytest.mark.parametrize("fresh", [True, False], ids=["new store", "existing store"])
def test_ingest_refuses(work, capsys, case, fresh):
    store = work / ("new" if fresh else "store")
    before = None if fresh else tree_digest(store)
    options, expected = INGEST_CASES[case](work)
    capsys.readouterr()
    with fifo_guard(work):
        code = main(_ingest_args(work, store, **options))
    err = one_error_line(capsys, "ingest")
    assert code == 2, err
    for text in expected:
        assert text in err, (text, err)
    if fresh:
        assert not store.exists()
    else:
        assert tree_digest(store) == before


def test_drop_unknown_counts_what_it_drops(work, capsys):
    strangers = {part(work, 0): [(0, "src"), (5, "dst")], part(work, 3): [(9, "src")]}
    for path, cells in strangers.items():
        for row, name in cells:
            rewrite(path, **{name: with_value(path, name, row, 10**15 + row)})
    assert main(_ingest_args(work, work / "new")) == 2
    capsys.readouterr()
    assert main(_ingest_args(work, work / "new", **{"--drop-unknown": True})) == 0
    summary = json.loads(capsys.readouterr().out)
    # reference: rows naming a node outside the node table, counted by pyarrow's is_in
    known = column(nodes_file(work), "node_id")
    tables = [pq.read_table(p) for p in sorted((work / "data" / "edges").rglob("*.parquet"))]
    edges = pa.concat_tables(tables)
    inside = pc.and_(pc.is_in(edges["src"], value_set=known), pc.is_in(edges["dst"], value_set=known))
    assert summary["unknown_dropped"] == len(edges) - pc.sum(inside).as_py() == 3
    # reference: networkx Graph of the remaining rows (undirected, repeats merged, loops removed)
    kept = edges.filter(inside)
    g = nx.Graph(zip(kept["src"].to_pylist(), kept["dst"].to_pylist()))
    g.remove_edges_from(nx.selfloop_edges(g))
    assert summary["undirected_edges"] == g.number_of_edges()
    assert summary["edge_rows"] == len(edges)
    g.add_nodes_from(known.to_pylist())
    theirs = nx.to_scipy_sparse_array(g, nodelist=known.to_pylist(), weight=None, format="csr")
    graph = next((work / "new").glob("graph-*"))
    assert np.array_equal(np.load(graph / "indptr.npy"), theirs.indptr)
    assert np.array_equal(np.load(graph / "indices.npy"), theirs.indices)


def test_unreadable_partition(work, capsys):
    """chmod 000 does not stop root: drop the capabilities that let root ignore file modes
    (CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH) with util-linux setpriv, so the read really fails."""
    setpriv = shutil.which("setpriv")
    if setpriv is None:
        pytest.skip("util-linux setpriv is not installed")
    before = tree_digest(work / "store")
    part(work, 1).chmod(0)
    caps = "-dac_override,-dac_read_search"
    for store in (work / "store", work / "new"):
        run = subprocess.run([setpriv, f"--bounding-set={caps}", f"--inh-caps={caps}", sys.executable,
                              "-m", "bigprune", *_ingest_args(work, store)], capture_output=True, text=True)
        assert run.returncode == 2, run.stderr
        assert run.stderr.count("\n") == 1 and "Traceback" not in run.stderr, run.stderr
        assert f"--edges {part(work, 1)}: permission denied" in run.stderr
    assert tree_digest(work / "store") == before and not (work / "new").exists()


# ---- the store and the job file -------------------------------------------------------------
def test_store_of_a_newer_format(work, full, capsys):
    manifest = json.loads((work / "full" / "manifest.json").read_text())
    manifest["format_version"] += 1
    (work / "full" / "manifest.json").write_text(json.dumps(manifest))
    before = tree_digest(work / "full")
    expected = f"manifest.json: store format version {manifest['format_version']} is newer"
    assert main(_ingest_args(work, work / "full")) == 2
    assert expected in one_error_line(capsys, "ingest")
    assert main(["propagate", "--store", str(work / "full"), "--quiet"]) == 2
    assert expected in one_error_line(capsys, "propagate")
    assert main(["select", "--store", str(work / "full"), "--strategy", "random", "--budget", "5",
                 "--out", str(work / "pick.parquet"), "--quiet"]) == 2
    assert expected in one_error_line(capsys, "select")
    (work / "job.toml").write_text(JOB.replace('store = "store"', 'store = "full"'))
    assert main(["run", str(work / "job.toml"), "--quiet"]) == 2
    assert expected in one_error_line(capsys, "run")
    assert tree_digest(work / "full") == before and not (work / "pick.parquet").exists()


def test_unreadable_manifest(work, capsys):
    (work / "store" / "manifest.json").write_text("{not json")
    before = tree_digest(work / "store")
    assert main(_ingest_args(work, work / "store")) == 2
    assert "manifest.json: not a readable bigprune manifest" in one_error_line(capsys, "ingest")
    assert tree_digest(work / "store") == before


def test_store_path_is_a_file(work, capsys):
    (work / "afile").write_text("x")
    assert main(_ingest_args(work, work / "afile")) == 2
    assert f"--store {work / 'afile'}: exists and is not a directory" in one_error_line(capsys, "ingest")
    assert (work / "afile").read_text() == "x"


JOB = """store = "store"
memory_budget = "1GiB"
threads = 1
[ingest]
edges = "data/edges"
nodes = "data/nodes.parquet"
[[select]]
strategy = "random"
budget = 10
out = "pick.parquet"
"""

JOB_CASES = {
    "unknown top-level key": ("check", lambda t: "colour = 'blue'\n" + t, "{job}: unknown key 'colour'"),
    "unknown key in a table": ("run", lambda t: t.replace("[ingest]\n", "[ingest]\nedge_dir = 'x'\n"),
                               "{job}: [ingest]: unknown key 'edge_dir'"),
    "wrong type": ("run", lambda t: t.replace("threads = 1", "threads = '1'"),
                   "{job}: top level: threads = '1' should be an integer"),
    "wrong type in [[select]]": ("check", lambda t: t.replace("budget = 10", "budget = 'ten'"),
                                 "{job}: [[select]] #1: budget = 'ten' should be a number"),
    "bool for a path": ("run", lambda t: t.replace('nodes = "data/nodes.parquet"', "nodes = true"),
                        "{job}: [ingest]: nodes = True should be a path string"),
    "not TOML": ("run", lambda t: t.replace("[ingest]", "[ingest"), "{job}: not valid TOML"),
    "unknown strategy": ("check", lambda t: t.replace('"random"', '"randm"'),
                         "{job}: [[select]] #1: strategy = 'randm' is unknown"),
    "inputs checked too": ("check", lambda t: t.replace("data/nodes.parquet", "nodes.csv"),
                           "--nodes {dir}/nodes.csv: no such file"),
}


@pytest.mark.parametrize("case", list(JOB_CASES))
@pytest.mark.parametrize("fresh", [True, False], ids=["new store", "existing store"])
def test_job_file_refused(work, capsys, case, fresh):
    command, edit, expected = JOB_CASES[case]
    if fresh:
        shutil.rmtree(work / "store")
    before = None if fresh else tree_digest(work / "store")
    (work / "job.toml").write_text(edit(JOB))
    assert main([command, str(work / "job.toml"), "--quiet"]) == 2
    err = one_error_line(capsys, command)
    assert expected.format(job=work / "job.toml", dir=work) in err, err
    assert (not (work / "store").exists()) if fresh else tree_digest(work / "store") == before
    assert not (work / "pick.parquet").exists()


# ---- select -------------------------------------------------------------------------------
def _pool_size(store):
    split = np.load(next(store.glob("graph-*")) / "split.npy")
    return int((split == 1).sum())


SELECT_CASES = {
    "budget 0": (["--budget", "0"], "--budget 0: use a fraction in (0, 1] written with a decimal point"),
    "budget 1.5": (["--budget", "1.5"], "--budget 1.5: use a fraction in (0, 1] written with a decimal point"),
    "budget larger than pool": (["--budget", "{pool_plus}"], "larger than the training pool ({pool} nodes)"),
    "no targets": (["--targets", "unlabeled"], "--targets unlabeled: no node is in this set"),
    "out inside the store": (["--out", "{store}/picks.parquet"], "inside the store directory"),
    "out not parquet": (["--out", "{tmp}/picks.csv"], "must end in .parquet"),
    "unknown strategy": (["--strategy", "kcentre"], "--strategy kcentre: unknown; use one of"),
    "unknown targets": (["--targets", "everyone"], "--targets everyone: unknown"),
}


@pytest.mark.parametrize("case", list(SELECT_CASES))
def test_select_refuses(work, full, capsys, case):
    store = full
    before = tree_digest(store)
    pool = _pool_size(store)
    extra, expected = SELECT_CASES[case]
    fill = {"pool": pool, "pool_plus": pool + 1, "store": store, "tmp": work}
    args = {"--store": str(store), "--strategy": "kcenter", "--budget": "0.1", "--out": str(work / "picks.parquet")}
    args.update(dict(zip(extra[::2], (v.format(**fill) for v in extra[1::2]))))
    assert main(["select", "--quiet", *[x for kv in args.items() for x in kv]]) == 2
    err = one_error_line(capsys, "select")
    assert expected.format(**fill) in err, err
    assert tree_digest(store) == before
    assert not list(work.glob("picks.*")) and not list(store.glob("picks.*"))


def test_select_without_propagate(work, capsys):
    before = tree_digest(work / "store")
    assert main(["select", "--store", str(work / "store"), "--strategy", "random", "--budget", "5",
                 "--out", str(work / "p.parquet"), "--quiet"]) == 2
    assert "has no propagate stage yet; run bigprune propagate first" in one_error_line(capsys, "select")
    assert tree_digest(work / "store") == before

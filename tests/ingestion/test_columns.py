"""Input columns under other names (--src-col ... --features-col, and the job file's keys) and
string labels, on networkx's copy of Zachary's karate club (Zachary, 1977), whose ``club``
attribute holds the class names "Mr. Hi" and "Officer"."""
import json

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigprune.cli import main
from bigprune.common.store import Store

CLUB = nx.karate_club_graph()
IDS = np.arange(34, dtype=np.int64) * 1009 + 17
NAMES = [CLUB.nodes[i]["club"] for i in range(34)]
SPLIT = ["valid" if i % 5 == 0 else "train" if i % 3 else "test" for i in range(34)]
FEATURES = [[float(i % 7), float(NAMES[i] == "Officer") + 0.1 * i] for i in range(34)]


def _inputs(root, renamed):
    """The club as Parquet: default names and int labels, or other names and the club names."""
    root.mkdir()
    # Python's sorted() gives the class ids the tool must assign to the names.
    class_id = {name: i for i, name in enumerate(sorted(set(NAMES)))}
    labels = (pa.array([n if s != "test" else None for n, s in zip(NAMES, SPLIT)], pa.string()) if renamed
              else pa.array([class_id[n] if s != "test" else None for n, s in zip(NAMES, SPLIT)], pa.int64()))
    node_cols = ("member", "club", "emb") if renamed else ("node_id", "label", "features")
    pq.write_table(pa.table({node_cols[0]: IDS, "split": SPLIT, node_cols[1]: labels,
                             node_cols[2]: pa.array(FEATURES, pa.list_(pa.float32()))}), root / "nodes.parquet")
    edge_cols = ("from_member", "to_member") if renamed else ("src", "dst")
    edges = list(CLUB.edges())
    pq.write_table(pa.table({edge_cols[1]: [IDS[b] for _, b in edges], edge_cols[0]: [IDS[a] for a, _ in edges]}),
                   root / "edges.parquet")  # dst before src: columns are found by name, not place
    return root


RENAMED = ["--src-col", "from_member", "--dst-col", "to_member", "--id-col", "member",
           "--label-col", "club", "--features-col", "emb"]


@pytest.fixture(scope="module")
def stores(tmp_path_factory):
    root = tmp_path_factory.mktemp("columns")
    out = {}
    for name, renamed in (("plain", False), ("renamed", True)):
        data = _inputs(root / f"{name}-data", renamed)
        store = root / f"{name}-store"
        options = RENAMED if renamed else []
        assert main(["ingest", "--edges", str(data / "edges.parquet"), "--nodes", str(data / "nodes.parquet"),
                     "--store", str(store), "--quiet", *options]) == 0
        assert main(["propagate", "--store", str(store), "--quiet"]) == 0
        out[name] = Store(store)
    return out


def test_renamed_columns_and_string_labels_build_the_same_graph(stores):
    plain, renamed = stores["plain"], stores["renamed"]
    for name in ("label", "split", "indptr", "indices", "features"):
        assert np.array_equal(plain.load("graph", name), renamed.load("graph", name)), name
    assert plain.table("graph", "node_id").equals(renamed.table("graph", "node_id"))
    # numbered in Python's sorted() order of the names
    classes = renamed.table("graph", "classes")
    assert classes.column("name").to_pylist() == sorted(set(NAMES)) == ["Mr. Hi", "Officer"]
    assert classes.column("label").to_pylist() == [0, 1]
    # the integer path writes no class table and records no renamed column
    assert not (plain.stage_dir("graph") / "classes.parquet").exists()
    assert not any(k.endswith("_col") for k in plain.entry("graph")["params"])
    assert renamed.entry("graph")["params"]["label_col"] == "club"


def test_select_and_train_show_the_names_beside_the_ids(stores, tmp_path, capsys):
    store = stores["renamed"].path
    out = tmp_path / "picks.parquet"
    assert main(["select", "--store", str(store), "--strategy", "kmedian", "--budget", "6", "--out", str(out),
                 "--quiet"]) == 0
    report = json.loads(out.with_suffix(".json").read_text())
    assert report["class_names"] == {c: sorted(set(NAMES))[int(c)] for c in report["classes"]}
    picks = pq.read_table(out)
    for node, label in zip(picks.column("node_id").to_pylist(), picks.column("label").to_pylist()):
        # the name shown for a pick's class id is that member's club in networkx's graph
        assert report["class_names"][str(label)] == NAMES[int(np.flatnonzero(IDS == node)[0])]
    capsys.readouterr()
    assert main(["train", "--store", str(store), "--quiet", "--l2", "1"]) == 0
    result = json.loads(capsys.readouterr().out)
    assert result["class_names"] == {"0": "Mr. Hi", "1": "Officer"}
    assert set(result["valid"]["per_class"]) <= set(result["class_names"])
    assert main(["train", "--store", str(stores["plain"].path), "--quiet", "--l2", "1"]) == 0
    assert "class_names" not in json.loads(capsys.readouterr().out)


def test_the_job_file_takes_the_same_keys(stores, tmp_path, capsys):
    data = _inputs(tmp_path / "data", renamed=True)
    (tmp_path / "job.toml").write_text(
        'store = "store"\n[ingest]\nedges = "data/edges.parquet"\nnodes = "data/nodes.parquet"\n'
        'src_col = "from_member"\ndst_col = "to_member"\nid_col = "member"\nlabel_col = "club"\n'
        'features_col = "emb"\n')
    assert main(["check", str(tmp_path / "job.toml")]) == 0
    assert capsys.readouterr().out.startswith("ok: 34 nodes, 78 edge rows in 1 file(s)")
    assert main(["run", str(tmp_path / "job.toml"), "--quiet"]) == 0
    job_store = Store(tmp_path / "store")
    assert np.array_equal(job_store.load("graph", "label"), stores["renamed"].load("graph", "label"))
    capsys.readouterr()
    assert main(["run", str(tmp_path / "job.toml"), "--quiet"]) == 0
    assert capsys.readouterr().out.startswith("skip  ingest")
    del data


@pytest.mark.parametrize("options, expected", [
    ([], "missing column 'node_id' (needs node_id, split, label, features; has member, split, club, emb; "
         "--id-col NAME names another column)"),
    (["--id-col", "member", "--label-col", "club"],
     "missing column 'features' (needs member, split, club, features; has member, split, club, emb; "
     "--features-col NAME names another column, or give --features FILE.npy)"),
    (RENAMED[4:], "missing column 'src' (needs src, dst and optionally weight; has to_member, from_member; "
                  "--src-col and --dst-col name other columns)"),
])
def test_a_missing_column_names_the_option_that_would_find_it(tmp_path, capsys, options, expected):
    data = _inputs(tmp_path / "data", renamed=True)
    assert main(["ingest", "--edges", str(data / "edges.parquet"), "--nodes", str(data / "nodes.parquet"),
                 "--store", str(tmp_path / "store"), "--quiet", *options]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and expected in err, err
    assert not (tmp_path / "store").exists()


def test_float_labels_are_refused(tmp_path, capsys):
    data = _inputs(tmp_path / "data", renamed=False)
    table = pq.read_table(data / "nodes.parquet")
    table = table.set_column(2, "label", table.column("label").cast(pa.float64()))
    pq.write_table(table, data / "nodes.parquet")
    assert main(["ingest", "--edges", str(data / "edges.parquet"), "--nodes", str(data / "nodes.parquet"),
                 "--store", str(tmp_path / "store"), "--quiet"]) == 2
    assert ("column 'label' has type double; use int64 class ids or class names (strings), null where "
            "unknown") in capsys.readouterr().err

"""Ingest through a Dask cluster (``local:2``) against the single-server ingest of the same inputs.

The outside reference is the single-server path's bytes: its CSR is checked elsewhere against
networkx (Zachary's karate club) and scipy.sparse (tests/ingestion/test_ingest.py), so a cluster
ingest storing the very same files is right by the same checks.
"""
import hashlib
import importlib
import subprocess
import sys
from pathlib import Path

import pyarrow as pa
import pyarrow.parquet as pq
import pytest

from bigprune.common.errors import BudgetError, InputError
from bigprune.common.memory import parse_size
from bigprune.common.store import Store
from bigprune.ingestion.ingest import ingest
from bigprune.scenario.scenario import generate
from conftest import tree_digest

ROOT = Path(__file__).resolve().parents[2]
COUNTS = ("edge_rows", "unknown_dropped", "self_loops_dropped", "undirected_edges", "repeats_merged")
ingest_module = importlib.import_module("bigprune.ingestion.ingest")  # the package exports the function
clusterbuild = importlib.import_module("bigprune.ingestion.clusterbuild")


@pytest.fixture(scope="module")
def demo(tmp_path_factory):
    """The demo scenario's data, small: integer ids unweighted, string ids weighted."""
    root = tmp_path_factory.mktemp("cluster-ingest")
    for id_type, weighted in (("int64", False), ("string", True)):
        generate(root / id_type, nodes=2000, avg_degree=6, dim=8, days=2, parts_per_day=2, seed=11,
                 id_type=id_type, weighted=weighted)
    return root


def _sources(data):
    return data / "edges", data / "nodes.parquet"


def _stage_sha(path):
    """sha256 of every file of the committed graph stage."""
    folder = Store(path).stage_dir("graph")
    return {p.name: hashlib.sha256(p.read_bytes()).hexdigest() for p in sorted(folder.iterdir()) if p.is_file()}


def _small_budget(monkeypatch):
    """Plans as under a budget far below the data: the single server spills and builds in row
    blocks, the cluster writes several runs per spill file and merges several row blocks."""
    plan, workers = ingest_module._plan, clusterbuild.plan_workers
    monkeypatch.setattr(ingest_module, "_plan", lambda *a: plan(*a)._replace(edge_bytes=20_000))
    monkeypatch.setattr(clusterbuild, "plan_workers",
                        lambda *a: workers(*a)._replace(run_rows=700, block_bytes=60_000))


@pytest.mark.parametrize("id_type", ["int64", "string"])
@pytest.mark.parametrize("small", [False, True])
def test_cluster_stores_the_single_server_bytes(demo, dask_client, tmp_path, monkeypatch, id_type, small):
    if small:
        _small_budget(monkeypatch)
    args = _sources(demo / id_type)
    one = ingest(*args, tmp_path / "one", threads=1)
    two = ingest(*args, tmp_path / "two", client=dask_client)
    # reference: the single-server ingest of the same inputs, file by file and count by count
    assert _stage_sha(tmp_path / "two") == _stage_sha(tmp_path / "one")
    assert {k: two[k] for k in COUNTS} == {k: one[k] for k in COUNTS}
    assert two["weighted"] == (id_type == "string") and one["undirected_edges"] > 5000
    assert two["cluster"]["workers"] == 2 and two["cluster"]["partition_tasks"] == 4
    if small:
        assert one["row_blocks"] > 1 and two["row_blocks"] > 3
    info = Store(tmp_path / "two").entry("graph")["info"]
    assert {k: info[k] for k in COUNTS} == {k: one[k] for k in COUNTS}


def _name_unknown(path, row, value):
    """Edge row ``row`` of partition ``path`` names node ``value``, which the node table lacks."""
    table = pq.read_table(path)
    src = table.column("src").to_pylist()
    src[row] = value
    pq.write_table(table.set_column(0, "src", pa.array(src, table.schema.field("src").type)), path)


def _copy_data(data, to):
    import shutil

    shutil.copytree(data, to)
    return sorted((to / "edges").rglob("*.parquet"))


@pytest.mark.parametrize("id_type", ["int64", "string"])
def test_an_unknown_id_is_the_same_line_and_keeps_the_store(demo, dask_client, tmp_path, id_type):
    parts = _copy_data(demo / id_type, tmp_path / "data")
    store = tmp_path / "store"
    ingest(*_sources(tmp_path / "data"), store, client=dask_client)
    before = tree_digest(store)
    unknown = 123456789 if id_type == "int64" else "L-not-a-listing"
    _name_unknown(parts[3], 5, unknown)
    _name_unknown(parts[1], 40, unknown)  # the first bad row of the input, whichever task meets one first
    with pytest.raises(InputError) as here:
        ingest(*_sources(tmp_path / "data"), tmp_path / "fresh", threads=1)
    with pytest.raises(InputError) as there:
        ingest(*_sources(tmp_path / "data"), store, client=dask_client)
    # reference: the single server's line, which names the first bad row by file and row
    assert str(there.value) == str(here.value)
    assert f"{parts[1]}: row 40 column 'src' names node {unknown!r}" in str(there.value)
    assert "\n" not in str(there.value) and tree_digest(store) == before
    # the task of the last partition alone, whichever ran first above, names the same row
    with pytest.raises(InputError) as last:
        _spill_alone(tmp_path, store, id_type, first=3)
    assert str(last.value) == str(here.value)
    with pytest.raises(InputError):
        ingest(*_sources(tmp_path / "data"), tmp_path / "fresh-too", client=dask_client)
    assert not (tmp_path / "fresh-too").exists()
    # dropping them instead: the same bytes and counts as one server dropping them
    one = ingest(*_sources(tmp_path / "data"), tmp_path / "one", threads=1, drop_unknown=True)
    two = ingest(*_sources(tmp_path / "data"), tmp_path / "two", client=dask_client, drop_unknown=True)
    assert _stage_sha(tmp_path / "two") == _stage_sha(tmp_path / "one")
    assert {k: two[k] for k in COUNTS} == {k: one[k] for k in COUNTS} and two["unknown_dropped"] == 2


def _spill_alone(tmp_path, store, id_type, first):
    """The phase-1 task of partition ``first`` run in this process, against ``store``'s ids."""
    import numpy as np

    from bigprune.common.sources import edge_files
    from bigprune.ingestion.edges import EdgeFiles
    from bigprune.ingestion.idrows import IdTable
    from bigprune.ingestion.tasks import Grid, IdMap, spill_partitions

    edges = EdgeFiles(edge_files(tmp_path / "data" / "edges"), "int" if id_type == "int64" else "string")
    node_ids = Store(store).stage_dir("graph") / "node_id.parquet"
    slots = None
    if id_type == "int64":
        slots = tmp_path / "slots.npy"
        np.save(slots, IdTable(pq.read_table(node_ids).column("node_id").to_numpy()).table)
    ids = IdMap(str(node_ids), None if slots is None else str(slots), 256 << 20)
    spill_partitions(edges, first, first + 1, ids, Grid(2000, 1), str(tmp_path / "spill.bin"), 1000, "<i4",
                     False, 4 << 30)


def test_a_bad_weight_is_the_same_line(demo, dask_client, tmp_path):
    parts = _copy_data(demo / "string", tmp_path / "data")
    for path, row in ((parts[2], 7), (parts[3], 3)):
        table = pq.read_table(path)
        weight = table.column("weight").to_pylist()
        weight[row] = 0.0
        pq.write_table(table.set_column(2, "weight", pa.array(weight, pa.float32())), path)
    with pytest.raises(InputError) as here:
        ingest(*_sources(tmp_path / "data"), tmp_path / "one", threads=1)
    with pytest.raises(InputError) as there:
        ingest(*_sources(tmp_path / "data"), tmp_path / "two", client=dask_client)
    # reference: the single server's line
    assert str(there.value) == str(here.value)
    assert f"{parts[2]}: column 'weight' row 7 holds 0.0" in str(there.value)


def test_worker_plan_refuses_up_front_and_accepts_the_figure_it_names():
    from bigprune.ingestion.idrows import table_bytes

    nodes, rows = 40_000_000, 200_000_000
    with pytest.raises(BudgetError) as refused:
        clusterbuild.plan_workers(parse_size("1GiB"), nodes, rows, table_bytes(nodes), "int32", False)
    message = str(refused.value)
    assert "too small to ingest 40,000,000 nodes through the cluster: use at least" in message
    figure = parse_size(message.rsplit("use at least ", 1)[1].split(" (")[0].replace(" ", ""))
    plan = clusterbuild.plan_workers(figure, nodes, rows, table_bytes(nodes), "int32", False)
    assert plan.run_rows * clusterbuild.RUN_COPIES * 8 >= 64 << 20
    with pytest.raises(BudgetError):  # more than the 0.1 GiB the figure is rounded up by
        clusterbuild.plan_workers(figure - (110 << 20), nodes, rows, table_bytes(nodes), "int32", False)


def test_ingest_without_a_client_never_imports_dask(demo, tmp_path):
    code = (f"import sys; sys.path.insert(0, {str(ROOT)!r})\n"
            "from bigprune.ingestion.ingest import ingest\n"
            f"ingest({str(demo / 'int64' / 'edges')!r}, {str(demo / 'int64' / 'nodes.parquet')!r}, "
            f"{str(tmp_path / 'store')!r}, threads=1)\n"
            "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))\n")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, cwd=tmp_path)
    assert done.returncode == 0, done.stderr
    assert done.stdout.strip() == "[]"

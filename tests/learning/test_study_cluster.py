"""The study through a Dask cluster (bigprune/learning/studytasks.py): each cell a task.

Reference: the single-server study of the same store (its cells are checked against
scikit-learn in test_study.py and on Citeseer in test_meaning_and_outputs.py); through the
cluster every cell and output must be the same, apart from timings and the line saying where it
ran.
"""
import json
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from bigprune.common.schema import NO_LABEL
from bigprune.common.store import Store
from bigprune.learning.study import study
from conftest import add_propagate, random_symmetric, write_graph_store

ROOT = Path(__file__).resolve().parents[2]
PLAN = {"budgets": [0.1, 0.3, 1.0], "strategies": ["kmedian", "random"], "repeats": 2, "threads": 1}
CELLS = 1 + 2 + 2 * 2  # the full pool; kmedian ignores the seed; random at two repeats


pytestmark = pytest.mark.usefixtures("restore_threads")  # tests here set numba's threads


@pytest.fixture(scope="module")
def store(tmp_path_factory):
    """300 nodes, 4 classes in 8-d features: 120 train, 30 valid, 90 test."""
    rng = np.random.default_rng(7)
    n = 300
    label = rng.integers(0, 4, size=n)
    features = rng.normal(size=(n, 8)) + label[:, None]
    split = np.zeros(n, dtype=np.int8)
    split[:120], split[120:150], split[150:240] = 1, 2, 3
    label = np.where(split == 3, NO_LABEL, label)
    root = tmp_path_factory.mktemp("cluster-study")
    return add_propagate(write_graph_store(root / "store", random_symmetric(n, 0.03, rng), features,
                                           split, label))


@pytest.fixture(scope="module")
def single(store):
    out = store.path.parent / "single"
    return out, study(store, out, **PLAN)


@pytest.fixture(scope="module")
def clustered(store, single, dask_client):
    """The study through the cluster while a writer commits another propagate stage: the client
    pinned the first, so every cell must still read it. Then the same study again."""
    out = store.path.parent / "cluster"
    with store.reading():
        pinned = store.entry("propagate")["dir"]
        rng = np.random.default_rng(1)
        with Store(store.path).begin("propagate", params={"hops": 1, "norm": "sym"}) as w:
            w.save("hop_1", rng.normal(size=(300, 8)).astype(np.float32))  # noise: other scores
            w.save("pagerank", np.full(300, 1 / 300))
        assert Store(store.path).entry("propagate")["dir"] != pinned
        first = study(store, out, **PLAN, client=dask_client)
        report = (out / "report.md").read_text()  # before the rerun rewrites it
        again = study(store, out, **PLAN, client=dask_client)
    return out, first, report, again


def cells(out):
    """Each cell's record less its timing, by file name (as bench/resume.py's outputs() compares)."""
    found = {}
    for path in sorted((out / "cells").glob("*.json")):
        record = json.loads(path.read_text())
        record["result"].pop("seconds")
        found[path.name] = record
    return found


def table(out):
    """The table less its timings, as text (NaN, where a cell has no such figure, equals NaN)."""
    return json.dumps(pq.read_table(out / "table.parquet").drop(["seconds"]).to_pydict())


def test_cells_and_outputs_are_the_single_servers(single, clustered):
    (one, alone), (out, summary, report, _) = single, clustered
    assert summary["cells"] == {"run": CELLS, "skipped": 0, "workers": 2,
                                "memory_per_worker": alone["cells"]["memory_per_worker"], "cluster": True}
    mine, reference = cells(out), cells(one)
    assert len(reference) == CELLS and mine == reference  # keys too: they name the pinned stages
    assert table(out) == table(one)
    for part in ("recommendation", "fits", "settings", "diagnostics", "preferences"):
        assert summary[part] == alone[part]
    assert (out / "fits.json").read_bytes() == (one / "fits.json").read_bytes()
    for plot in ("error_curves.png", "per_class.png", "preference.png"):
        assert (out / plot).read_bytes() == (one / plot).read_bytes()
    assert " Ran on a Dask cluster with 2 workers." in report
    assert report.replace(" Ran on a Dask cluster with 2 workers.", "") == (one / "report.md").read_text()


def test_a_rerun_through_the_cluster_skips_every_cell(clustered):
    out, first, _, again = clustered
    assert again["cells"]["run"] == 0 and again["cells"]["skipped"] == CELLS
    assert again["recommendation"] == first["recommendation"] and not list(out.rglob("*.tmp"))


def test_a_study_without_a_client_imports_no_dask(store, clustered, tmp_path):
    script = (f"import sys; from bigprune.learning.study import study; "
              f"study({str(store.path)!r}, {str(tmp_path / 'out')!r}, budgets=[0.3, 1.0], "
              f"strategies=['random'], repeats=1, threads=1); "
              f"print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))")
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    done = subprocess.run([sys.executable, "-c", script], cwd=ROOT, env=env, capture_output=True,
                          text=True, check=True)
    assert done.stdout.strip().splitlines()[-1] == "[]"
    assert (tmp_path / "out" / "table.parquet").exists()

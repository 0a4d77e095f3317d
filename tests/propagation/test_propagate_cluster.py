"""The propagate stage through a Dask cluster gives the single server's bytes (issue 11).

The reference is the single-server stage run with the same options, budget and threads; its own
bytes are checked against scipy.sparse products and networkx.pagerank in test_propagate.py and
test_pagerank.py, so identity here carries those checks over to the cluster.
"""
import os
import signal
import subprocess
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest
from conftest import random_symmetric, write_graph_store

import bigprune.common.memory as memory
from bigprune.cluster.connect import cluster
from bigprune.propagation.propagate import propagate

# With the fixed overhead set to 0, this budget holds neither the CSR nor X of the 400 x 64
# graphs below: the grid way, with several blocks and chunks (as in test_propagate.py).
GRID_BUDGET = 50_000


def _graph(path, n, d, density, weighted, seed=5):
    rng = np.random.default_rng(seed)
    adj = random_symmetric(n, density, rng, weighted=weighted)
    split = rng.choice(4, size=n, p=[0.85, 0.05, 0.05, 0.05]).astype(np.int8)  # a few kept rows
    label = rng.integers(0, 3, size=n)
    return write_graph_store(path, adj, rng.normal(size=(n, d)), split, label, weighted=weighted)


def _stage_files(store):
    """Every file of the committed propagate stage, by name."""
    folder = store.path / store.entry("propagate")["dir"]
    return {path.name: path.read_bytes() for path in sorted(folder.iterdir())}


def _assert_same_stage(one, spread):
    expected, got = _stage_files(one), _stage_files(spread)
    assert sorted(got) == sorted(expected)
    for name in expected:
        assert got[name] == expected[name], name


@pytest.mark.parametrize("budget, norm, weighted, dtype, restrict", [
    ("1GiB", "sym", True, "float32", False),
    ("1GiB", "rw", False, "float16", True),
    (GRID_BUDGET, "sym", False, "float16", True),
    (GRID_BUDGET, "rw", True, "float32", False),
])
def test_the_cluster_commits_the_single_server_bytes(tmp_path, monkeypatch, dask_client, budget,
                                                     norm, weighted, dtype, restrict):
    monkeypatch.setattr(memory, "FIXED_OVERHEAD", 0)  # the plan is made on the client
    options = dict(hops=3, norm=norm, memory_budget=budget, dtype=dtype, restrict=restrict, threads=2)
    one = _graph(tmp_path / "one", 400, 64, 0.05, weighted)
    spread = _graph(tmp_path / "spread", 400, 64, 0.05, weighted)
    propagate(one, **options)
    propagate(spread, client=dask_client, **options)
    info, alone = spread.entry("propagate")["info"], one.entry("propagate")["info"]
    assert info["way"] == alone["way"] == ("memory" if budget == "1GiB" else "grid")
    if info["way"] == "grid":
        assert min(info["grid_blocks"]) > 1 and info["plan"]["edge_rows"] < info["nnz"]
    assert info["cluster"]["workers"] == 2 and info["cluster"]["tasks"] > 3 * 2
    assert info["pagerank_steps"] == alone["pagerank_steps"]
    assert ("computed_through.npy" in _stage_files(spread)) == restrict
    _assert_same_stage(one, spread)


# Tasks after hop 1 (its file is then complete in staging): their rows must be written again.
LATER_TASKS = ("propagate-hop-2", "propagate-hop-3", "pagerank-step")


def _kill_after_hop_1(client, address, pid, finished, ran):
    """SIGKILL worker ``pid`` as soon as the scheduler has given it a task after hop 1."""
    while not finished.is_set():
        held = client.processing().get(address, ())
        if any(name in str(key) for key in held for name in LATER_TASKS):
            os.kill(pid, signal.SIGKILL)
            ran["killed"] = sorted(map(str, held))
            return
        time.sleep(0.002)


def test_a_worker_killed_during_propagate_still_gives_the_single_server_bytes(tmp_path):
    options = dict(hops=3, threads=2)
    one = _graph(tmp_path / "one", 20_000, 32, 5e-4, True)
    spread = _graph(tmp_path / "spread", 20_000, 32, 5e-4, True)
    propagate(one, **options)
    with cluster("local:2") as client:
        address, victim = sorted(client.run(os.getpid).items())[0]
        finished, ran = threading.Event(), {}
        killer = threading.Thread(target=_kill_after_hop_1,
                                  args=(client, address, victim, finished, ran))
        killer.start()
        try:
            propagate(spread, client=client, **options)
        finally:
            finished.set()
            killer.join()
        assert ran.get("killed"), "the worker was not killed while the stage ran"
        assert victim not in client.run(os.getpid).values()
    _assert_same_stage(one, spread)


def test_propagate_without_a_client_never_imports_dask(small_store):
    script = ("import sys\n"
              "from bigprune.propagation.propagate import propagate\n"
              f"propagate({str(small_store.path)!r}, hops=2, restrict=True)\n"
              "print(sorted(m for m in sys.modules if m.split('.')[0] in ('dask', 'distributed')))\n")
    out = subprocess.run([sys.executable, "-c", script], capture_output=True, text=True, check=True,
                         cwd=Path(__file__).parents[2])
    assert out.stdout.strip() == "[]"
    assert small_store.entry("propagate")["params"]["restrict"]

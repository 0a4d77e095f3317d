"""The store under a reader and a committing writer: a reader keeps the commit it pinned.

The reader's data is checked against scipy.sparse products of the stage it pinned, and the
writer is shown to commit without waiting and to leave the pinned directory in place."""
import importlib
import os
import subprocess
import sys
from pathlib import Path

import numpy as np
import scipy.sparse as sp
from conftest import random_symmetric, write_graph_store

from bigprune.common.store import Store
from bigprune.propagation.propagate import propagate
from bigprune.selection.select import select

select_module = importlib.import_module("bigprune.selection.select")  # the package exports the function

ROOT = Path(__file__).resolve().parents[2]
READER = """
import signal, sys
import numpy as np
from bigprune.common.store import Store
signal.alarm(60)  # a writer that waited for this reader would otherwise hang the test
store = Store(sys.argv[1])
with store.reading():
    print(store.entry("propagate")["dir"], flush=True)
    sys.stdin.readline()  # the writer commits meanwhile
    np.save(sys.argv[2], store.load("propagate", "hop_2", mmap=False))
    print(store.entry("propagate")["params"]["norm"], flush=True)
"""


def _store(path, n=150, d=6, seed=0):
    rng = np.random.default_rng(seed)
    adj = random_symmetric(n, 0.05, rng)
    features = rng.normal(size=(n, d)).astype(np.float32)
    split = np.repeat(np.array([1, 2, 3], dtype=np.int8), n // 3)
    label = rng.integers(0, 3, size=n)
    return write_graph_store(path, adj, features, split, label), adj, features


def _sym_hops(adj, features, hops):
    """D^-1/2 (A+I) D^-1/2 applied ``hops`` times to X, with scipy (Wu et al., 2019, SGC)."""
    a = sp.csr_matrix(adj, dtype=np.float64) + sp.identity(adj.shape[0])
    scale = sp.diags(np.asarray(a.sum(axis=1)).ravel() ** -0.5)
    x = features.astype(np.float64)
    for _ in range(hops):
        x = scale @ (a @ (scale @ x))
    return x


def _stage_dirs(store):
    return sorted(p.name for p in store.path.iterdir() if p.is_dir() and not p.name.startswith("."))


def test_a_reader_process_keeps_its_stage_while_a_writer_commits(tmp_path):
    store, adj, features = _store(tmp_path / "store")
    propagate(store, hops=2, norm="sym", threads=1)
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([str(ROOT), os.environ.get("PYTHONPATH", "")]))
    reader = subprocess.Popen([sys.executable, "-c", READER, str(store.path), str(tmp_path / "read.npy")],
                              stdin=subprocess.PIPE, stdout=subprocess.PIPE, text=True, env=env)
    try:
        pinned = reader.stdout.readline().strip()
        assert pinned == store.entry("propagate")["dir"]
        # the writer commits another propagation while the reader holds the store: no wait
        propagate(Store(store.path), hops=2, norm="rw", threads=1)
        assert store.entry("propagate")["params"]["norm"] == "rw" and store.entry("propagate")["dir"] != pinned
        assert (store.path / pinned).is_dir()  # its removal is deferred: the reader may still read it
        out, _ = reader.communicate("go\n", timeout=60)
    finally:
        reader.kill()
    assert reader.returncode == 0 and out.strip() == "sym"
    # reference: the sym-normalised hops of the graph, computed with scipy; the reader read the
    # commit it pinned, not the rw one that replaced it
    np.testing.assert_allclose(np.load(tmp_path / "read.npy"), _sym_hops(adj, features, 2), rtol=1e-5, atol=1e-5)
    # with no reader left, the next commit removes what was deferred
    propagate(Store(store.path), hops=1, norm="rw", threads=1)
    assert _stage_dirs(store) == sorted([store.entry("graph")["dir"], store.entry("propagate")["dir"]])


def test_a_select_keeps_the_features_it_started_on_while_a_commit_replaces_them(tmp_path, monkeypatch):
    store, _, _ = _store(tmp_path / "store", n=300)
    propagate(store, hops=2, norm="sym", threads=1)
    # reference: the same select on the store left alone
    expected = select(store, "kcenter", 20, threads=1)["indices"]
    first = store.entry("propagate")["dir"]
    checked = select_module._check_computed

    def commit_midway(*args):  # after select read the manifest, before it opens the features
        checked(*args)
        propagate(Store(store.path), hops=2, norm="rw", threads=1)

    monkeypatch.setattr(select_module, "_check_computed", commit_midway)
    got = select(Store(store.path), "kcenter", 20, threads=1)["indices"]
    assert store.entry("propagate")["params"]["norm"] == "rw"  # the commit happened meanwhile
    np.testing.assert_array_equal(got, expected)
    assert (store.path / first).is_dir()  # deferred while select held the store
    monkeypatch.undo()
    with store.locked(), store.begin("propagate", params={}) as writer:  # the next locked writer sweeps it
        writer.save("hop_1", np.zeros((300, 6), np.float32))
    assert not (store.path / first).exists()


def test_a_writer_removes_superseded_stages_when_no_reader_holds_the_store(tmp_path):
    store, _, _ = _store(tmp_path / "store")
    propagate(store, hops=2, norm="sym", threads=1)
    first = store.entry("propagate")["dir"]
    propagate(store, hops=2, norm="rw", threads=1)
    assert not (store.path / first).exists()
    assert _stage_dirs(store) == sorted([store.entry("graph")["dir"], store.entry("propagate")["dir"]])

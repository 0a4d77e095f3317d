"""Shared fixtures: stores built straight from arrays, so stage tests need no ingest."""
import hashlib
from pathlib import Path

import numpy as np
import pyarrow as pa
import pytest
import scipy.sparse as sp

from bigprune.common.schema import NO_LABEL
from bigprune.common.store import Store


def write_graph_store(path, adjacency, features, split, label, node_ids=None, weighted=False):
    """Commit a graph stage from a symmetric scipy matrix (self loops and repeats removed)."""
    adj = sp.csr_matrix(adjacency, dtype=np.float32)
    adj.setdiag(0)
    adj.eliminate_zeros()
    adj.sort_indices()
    n = adj.shape[0]
    ids = np.arange(n, dtype=np.int64) * 7 + 100 if node_ids is None else node_ids
    store = Store(path)
    with store.begin("graph", params={"source": "test fixture"}) as w:
        w.write_table("node_id", pa.table({"node_id": ids}))
        w.save("split", np.asarray(split, dtype=np.int8))
        w.save("label", np.asarray(label, dtype=np.int64))
        w.save("indptr", adj.indptr.astype(np.int64))
        w.save("indices", adj.indices.astype(np.int32))
        if weighted:
            w.save("weight", adj.data.astype(np.float32))
        w.save("features", np.asarray(features, dtype=np.float32))
    return store


def random_symmetric(n, density, rng, weighted=False):
    upper = sp.random(n, n, density=density, random_state=rng, format="csr")
    upper = sp.triu(upper, k=1)
    if not weighted:
        upper.data[:] = 1.0
    else:
        upper.data = rng.uniform(0.1, 2.0, size=upper.nnz)
    return (upper + upper.T).tocsr()


@pytest.fixture
def small_store(tmp_path):
    """A random 300-node graph with 8-d features: 120 train, 30 valid, 90 test, 60 unsplit."""
    rng = np.random.default_rng(7)
    n = 300
    adj = random_symmetric(n, 0.03, rng)
    label = rng.integers(0, 4, size=n)
    features = rng.normal(size=(n, 8)) + label[:, None]
    split = np.zeros(n, dtype=np.int8)
    split[:120], split[120:150], split[150:240] = 1, 2, 3
    label = np.where(split == 3, NO_LABEL, label)
    label[240:] = NO_LABEL
    return write_graph_store(tmp_path / "store", adj, features, split, label)


def tree_digest(root):
    """sha256 over every path and file below ``root`` (a store must come back byte-identical)."""
    h = hashlib.sha256()
    for path in sorted(Path(root).rglob("*")):
        h.update(str(path.relative_to(root)).encode())
        if path.is_file():
            h.update(path.read_bytes())
    return h.hexdigest()

"""Shared fixtures: stores built straight from arrays, so stage tests need no ingest; and the
real Citeseer citation graph (tests/data/citeseer/), built through ingest and propagate."""
import hashlib
import socket
from collections import namedtuple
from pathlib import Path

import networkx as nx
import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq
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


def add_propagate(store):
    """Commit a propagate stage: hop_1 = D^-1/2 (A+I) D^-1/2 X, PageRank from networkx."""
    indptr, indices = store.load("graph", "indptr"), store.load("graph", "indices")
    n = len(indptr) - 1
    adj = sp.csr_matrix((np.ones(len(indices)), indices, indptr), shape=(n, n))
    a = adj + sp.identity(n)
    scale = sp.diags(1.0 / np.sqrt(np.asarray(a.sum(1)).ravel()))
    hop = (scale @ a @ scale @ store.load("graph", "features").astype(np.float64)).astype(np.float32)
    rank = nx.pagerank(nx.from_scipy_sparse_array(adj), alpha=0.85, tol=1e-12)
    with store.begin("propagate", params={"hops": 1, "norm": "sym"}) as w:
        w.save("hop_1", hop)
        w.save("pagerank", np.array([rank[i] for i in range(n)], dtype=np.float64))
    return store


@pytest.fixture
def skewed(tmp_path):
    """260 nodes, classes in proportions ~ 60/25/10/5 %: 140 train, 20 valid, 100 test.

    Train class 3 has 5 nodes, so a quota of 4 binds for every rule at budget 16.
    """
    rng = np.random.default_rng(11)
    n = 260
    label = rng.choice(4, size=n, p=[0.6, 0.25, 0.1, 0.05])
    label[:5] = 3
    label[5:140][label[5:140] == 3] = 0
    features = rng.normal(size=(n, 6)) + 1.5 * label[:, None]
    split = np.zeros(n, dtype=np.int8)
    split[:140], split[140:160], split[160:] = 1, 2, 3
    label = np.where(split == 3, NO_LABEL, label)
    adj = random_symmetric(n, 0.04, rng)
    return add_propagate(write_graph_store(tmp_path / "skewed", adj, features, split, label))


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


def free_port():
    """A local port nothing listens on (bound, then released): an address no scheduler answers."""
    with socket.socket() as sock:
        sock.bind(("127.0.0.1", 0))
        return sock.getsockname()[1]


def file_digests(folder, names=None):
    """sha256 of each file in ``folder`` (or of ``names`` there), by name."""
    folder = Path(folder)
    names = sorted(p.name for p in folder.iterdir() if p.is_file()) if names is None else names
    return {name: hashlib.sha256((folder / name).read_bytes()).hexdigest() for name in names}


def tree_digest(root):
    """sha256 over every path and file below ``root`` (a store must come back byte-identical)."""
    h = hashlib.sha256()
    for path in sorted(Path(root).rglob("*")):
        h.update(str(path.relative_to(root)).encode())
        if path.is_file():
            h.update(path.read_bytes())
    return h.hexdigest()


# Citeseer: 3,327 papers, 4,552 citation links, 3,703-word binary bags of words, 6 classes.
# Source: the Planetoid data set (Yang, Cohen & Salakhutdinov, 2016, "Revisiting Semi-Supervised
# Learning with Graph Embeddings"), from the authors' public repository, MIT licence
# (tests/data/citeseer/LICENSE and README.md, kept with the data).
CITESEER = Path(__file__).parent / "data" / "citeseer"
CITESEER_WORDS = 3703
Citeseer = namedtuple("Citeseer", ["store", "answers"])


def citeseer_features(root=CITESEER):
    """The bags of words, row-normalised (each paper's words sum to 1; a paper with no word stays
    zero) as in Kipf & Welling (2017) and Wu et al. (2019): dense float32 (3327 x 3703)."""
    nodes = pq.read_table(root / "nodes.parquet", columns=["node_id"]).column("node_id").to_numpy()
    assert np.array_equal(nodes, np.arange(len(nodes)))  # node_id is the row
    words = pq.read_table(root / "words.parquet")
    bag = sp.csr_matrix((np.ones(words.num_rows, dtype=np.float32),
                         (words.column("node_id").to_numpy(), words.column("word").to_numpy())),
                        shape=(len(nodes), CITESEER_WORDS))
    sums = np.asarray(bag.sum(axis=1)).ravel()
    sums[sums == 0] = 1.0
    return np.asarray((sp.diags(1.0 / sums) @ bag).todense(), dtype=np.float32)


def citeseer_splits(protocol, root=CITESEER):
    """Split per paper. "standard": the standard_split column (train 120, valid 500, test 1,000;
    Kipf & Welling, 2017); "pool": the same valid and test, and train for every other labelled
    paper (1,812)."""
    nodes = pq.read_table(root / "nodes.parquet")
    standard = nodes.column("standard_split").to_pylist()
    labelled = [v is not None for v in nodes.column("label").to_pylist()]
    if protocol == "standard":
        return standard
    if protocol == "pool":
        return [s if s is not None else ("train" if known else None)
                for s, known in zip(standard, labelled)]
    raise ValueError(f"unknown Citeseer protocol {protocol!r}: use standard or pool")


def build_citeseer(root, protocol):
    """``Citeseer(store, answers)`` under ``root``: a store built with the project's own ingest
    and propagate (2 hops, symmetric normalisation) and a Parquet file (node_id, label) of the
    1,000 test papers."""
    from bigprune import ingest, propagate

    root = Path(root)
    split = citeseer_splits(protocol)
    if not (root / "features.npy").exists():
        np.save(root / "features.npy", citeseer_features())
    nodes = pq.read_table(CITESEER / "nodes.parquet")
    table = pa.table({"node_id": nodes.column("node_id").cast(pa.int64()),
                      "split": pa.array(split, pa.string()),
                      "label": nodes.column("label").cast(pa.int64())})
    pq.write_table(table, root / f"nodes_{protocol}.parquet")
    store = root / f"store_{protocol}"
    ingest(CITESEER / "edges.parquet", root / f"nodes_{protocol}.parquet", store,
           features=root / "features.npy", threads=1)
    propagate(store, hops=2, norm="sym", threads=1)
    answers = root / "answers.parquet"
    if not answers.exists():
        test = np.array([s == "test" for s in split])
        pq.write_table(pa.table({"node_id": nodes.column("node_id").to_numpy()[test].astype(np.int64),
                                 "label": nodes.column("label").to_numpy(zero_copy_only=False)[test]
                                 .astype(np.int64)}), answers)
    return Citeseer(store, answers)


@pytest.fixture(scope="session")
def citeseer(tmp_path_factory):
    """``build(protocol)`` -> :func:`build_citeseer`, once per protocol per session."""
    root = tmp_path_factory.mktemp("citeseer")
    built = {}

    def build(protocol):
        if protocol not in built:
            built[protocol] = build_citeseer(root, protocol)
        return built[protocol]

    return build


@pytest.fixture
def restore_threads():
    """Every core for numba and FAISS again after the test (use with ``pytest.mark.usefixtures``)."""
    yield
    from bigprune.common.runtime import set_threads

    set_threads(None)


@pytest.fixture(scope="session")
def dask_client():
    """A ``local:2`` cluster (two worker processes, one thread each) shared by the cluster tests."""
    from bigprune.cluster.connect import cluster

    with cluster("local:2") as client:
        yield client

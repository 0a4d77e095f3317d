"""Ingest: the night's edge partitions and the node table become the store's graph stage."""
import time
from typing import NamedTuple

import numpy as np
import pyarrow as pa

from ..common.arrayfile import NpyFile
from .csrbuild import count_dtype
from ..common.errors import BudgetError
from .edges import (EdgeFiles, build_csr, duckdb_connection, duckdb_rows, explain_unmapped, explain_weight,
                    register_ids, scan_error)
from ..common.fingerprint import fingerprints
from .idrows import hashable, hashed_rows, table_bytes
from ..common.memory import DEFAULT_BUDGET, FIXED_OVERHEAD, MIB, format_size, parse_size, peak_rss, working_memory
from .columns import Columns
from .nodetable import NodeTable, copy_npy_features
from ..common.classes import class_table
from ..common.runtime import set_threads
from ..common.sources import edge_files, regular_file
from ..common.store import Store


def ingest(edges, nodes, store, features=None, memory_budget=DEFAULT_BUDGET, threads=None,
           drop_unknown=False, columns=Columns(), client=None):
    """Build the graph stage of ``store`` from Parquet edges and a node table.

    Parameters
    ----------
    edges : str or Path
        A Parquet file, a directory searched recursively, or a glob. Columns ``src``, ``dst``
        (same type as ``node_id``) and optionally ``weight`` (> 0).
    nodes : str or Path
        Parquet node table: ``node_id`` (unique), ``split`` (train/valid/test/null), ``label``
        (int, required for train and valid), ``features`` (list of floats) unless ``features``.
    store : str, Path or Store
        The store directory; created if missing.
    features : str or Path, optional
        An ``.npy`` float array, row ``i`` for the node in row ``i`` of the node table.
    memory_budget : str or int
        Peak memory the stage may use (``"4GiB"``).
    threads : int, optional
        Threads for DuckDB and numba (default: all available cores).
    drop_unknown : bool
        Drop (and count) edge rows naming nodes missing from the node table instead of refusing.
    columns : Columns
        The input columns playing ``src``, ``dst``, ``node_id``, ``label`` and ``features``
        (:func:`bigprune.ingestion.columns.columns`). String labels become class ids in sorted
        name order; the names go to the graph stage's ``classes.parquet``.
    client : distributed.Client, optional
        Map the edge partitions and build the CSR as tasks on this Dask cluster
        (``clusterbuild``), within ``memory_budget`` per worker process; the stage's files are
        byte for byte those of one server. The store must be on a file system every worker
        sees at the same path.

    Returns
    -------
    dict
        Counts: nodes, undirected edges, self loops dropped, repeats merged, seconds, peak RSS.

    Notes
    -----
    Edges are undirected: each row joins both ways. Self loops are dropped; a pair given several
    times (in either direction) becomes one edge keeping its largest weight, so repeating an
    edge never changes the graph.
    """
    started = time.time()
    budget = parse_size(memory_budget)
    threads = set_threads(threads)
    store = store if isinstance(store, Store) else Store(store)
    if client is not None:
        from ..cluster.connect import check_store

        check_store(client, store.path)  # a folder it makes for its probe goes again
    regular_file(nodes, "--nodes")
    if features is not None:
        regular_file(features, "--features")
    table = NodeTable(nodes, needs_features=features is None, columns=columns)
    partitions = EdgeFiles(edge_files(edges), table.id_kind, columns.src, columns.dst)
    n = table.rows
    index_dtype = np.int32 if n < 2**31 - 1 else np.int64
    hashed = hashable(table.file.schema_arrow.field(columns.node_id).type, partitions.files, index_dtype,
                      columns.src, columns.dst)
    if client is None:
        plan = _plan(budget, n, partitions.rows, table_bytes(n) if hashed else 0)
    else:
        from .clusterbuild import plan_workers

        plan = plan_workers(budget, n, partitions.rows, table_bytes(n) if hashed else 0, index_dtype,
                            partitions.weighted)
    table.load(hash_ids=hashed)
    inputs = {"edges": fingerprints(partitions.files), "nodes": fingerprints([nodes])}
    if features is not None:
        inputs["features"] = fingerprints([features])
    params = {"edges": str(edges), "nodes": str(nodes), "drop_unknown": bool(drop_unknown),
              "features": None if features is None else str(features), **_renamed(columns)}
    with store.locked(), store.begin("graph", params=params, inputs=inputs) as writer:
        # The node columns go to the store first so that only the id map stays for the edges.
        writer.write_table("node_id", pa.table({"node_id": table.id_array()}))
        writer.save("split", table.split)
        writer.save("label", table.label)
        if table.class_names is not None:
            writer.write_table("classes", class_table(table.class_names))
        table.split = table.label = None
        if features is None:
            dim = table.feature_dim()
            with _row_writer(writer, "features", n, dim) as out:
                table.copy_features(out, plan.chunk_bytes)
        else:
            dim = copy_npy_features(features, n, lambda d: _row_writer(writer, "features", n, d),
                                    plan.chunk_bytes)
        if client is None:
            counts = _build_here(partitions, table, writer, plan, index_dtype, threads, budget, drop_unknown)
        else:
            from .clusterbuild import build_on_cluster

            counts = build_on_cluster(client, partitions, table, index_dtype, writer, plan, budget, drop_unknown)
        summary = {"nodes": n, "feature_dim": dim, "weighted": bool(partitions.weighted),
                   "edge_files": len(partitions.files), **counts,
                   "memory_budget": format_size(budget)}
        writer.info.update(summary)
    summary.update(seconds=round(time.time() - started, 3), peak_rss=peak_rss())
    return summary


def _build_here(partitions, table, writer, plan, index_dtype, threads, budget, drop_unknown):
    """Map, check and build the CSR on this server (``build_csr``); returns its counts."""
    import duckdb

    n = table.rows
    con = None
    if plan.duckdb_bytes:
        con = duckdb_connection(writer.scratch(), plan.duckdb_bytes, threads)
        register_ids(con, table.id_array(), index_dtype)
        batches = duckdb_rows(con, partitions, index_dtype, BATCH_ROWS, drop_unknown)
    else:
        def unmapped():  # DuckDB only to locate the first bad row for the message
            con = duckdb_connection(writer.scratch(), DUCKDB_MIN, threads)
            register_ids(con, table.read_ids(), index_dtype)
            explain_unmapped(con, partitions)

        # The generator holds the only reference to the id map, so it is freed when the scan
        # ends and the CSR build has its memory.
        id_table, table.id_table, table.ids = table.id_table, None, None
        batches = hashed_rows(partitions, id_table, BATCH_ROWS, drop_unknown, unmapped,
                              lambda: explain_weight(partitions))
        del id_table
    pa.default_memory_pool().release_unused()  # Arrow's pool keeps the node table's batches
    try:
        counts = build_csr(batches, partitions, n, index_dtype, writer, edge_bytes=plan.edge_bytes)
    # DuckDB errors met mid-stream arrive as Arrow's OSError; pyarrow's own reads raise ArrowException
    except (duckdb.Error, OSError, pa.ArrowException) as exc:
        raise scan_error(exc, partitions, budget) from None
    if con is not None:
        con.close()
    return counts


def _renamed(columns):
    """The renamed input columns as stage parameters (none for the default names)."""
    return {f"{field}_col": name for field, name in columns.renamed().items()}


# Plans are made from the node table's metadata before any column is read. On the hash path
# (integer ids) the phases run one after the other and hold, per node:
# - reading the node table: ids, split and label (LOAD_NODE_BYTES) and the id hash table
#   (``table_bytes``), no edges;
# - the edge scan: the id hash table and the entry counts (``count_dtype``), beside the edges'
#   share (the mapped rows, in memory or spilled);
# - the CSR build: the counts plus row pointers and kept counts (and the in-memory path's
#   compacted row pointers): BUILD_NODE_BYTES beside the counts, with the edges' share.
# Measured (`bigprune ingest` on the scale ladder's inputs, VmRSS sampled every 0.1 s, 4 GiB):
# at 40M nodes the load peaked at 1893 MiB against 1564 MiB of arrays and 208 MiB after the
# imports, the scan at ~1440 MiB against 1068 MiB; at 4M nodes the same gaps were 158 and
# ~170 MiB. What the allocators keep is a few batches' worth, not a share of each node: the
# fixed overhead, SCAN_SLACK and the batch allowance cover it, and NODE_SLACK is a margin.
LOAD_NODE_BYTES = 17
BUILD_NODE_BYTES = 24
NODE_SLACK = 4
# pyarrow's read-ahead (``idrows.READ_BUFFER`` a column) and decoded batches of the partitions.
SCAN_SLACK = 64 * MIB
# The DuckDB path (string ids): the id map (id + index), split, label, entry counts and row
# pointers (45 B) plus what reading the node table left resident in the allocators (measured
# when the table was read whole: 20M nodes held ~1.0 GB more than the arrays before the edge
# scan; not measured again since it is read in batches).
NODE_BYTES = 80
# What DuckDB's hash join needs per node of the id map, and at least, to stream the join; its
# resident set runs about this much above its memory_limit (measured on 2 threads).
DUCKDB_NODE_BYTES = 64
DUCKDB_MIN = 256 * MIB
DUCKDB_SLACK = 160 * MIB
BATCH_ROWS = 1 << 20
MIN_EDGE_BYTES = 64 * MIB  # the least share the edge build works with


class Plan(NamedTuple):
    """How the budget is split: DuckDB's memory limit (0: ids mapped by the hash table), the edge
    build's share, and the feature copy's chunk."""

    duckdb_bytes: int
    edge_bytes: int
    chunk_bytes: int


def _plan(budget, nodes, edge_rows, hash_bytes=0):
    """Split the budget between the stage's phases; exit 3 up front when it cannot fit.

    With ``hash_bytes`` (the id hash table of integer ids) the ids are mapped without DuckDB;
    else DuckDB maps them within its own limit.
    """
    spare = working_memory(budget, "ingest")
    batch = BATCH_ROWS * 48
    if hash_bytes:
        counts = nodes * np.dtype(count_dtype(edge_rows)).itemsize
        # The edge scan and the CSR build hold these beside the edges' share; reading the node
        # table, before either, holds no edges.
        held = max(hash_bytes + counts + batch + SCAN_SLACK, counts + nodes * BUILD_NODE_BYTES)
        load = hash_bytes + nodes * LOAD_NODE_BYTES + batch
        return _split(budget, nodes, spare, 0, held + nodes * NODE_SLACK, load + nodes * NODE_SLACK)
    duck = min(max(DUCKDB_MIN, nodes * DUCKDB_NODE_BYTES), max(DUCKDB_MIN, spare // 3))
    return _split(budget, nodes, spare, duck, duck + DUCKDB_SLACK + nodes * NODE_BYTES + batch)


def _split(budget, nodes, spare, duckdb_bytes, held, alone=0):
    """The plan leaving ``spare - held`` bytes to the edges; exit 3 if that is too little or if
    ``alone`` (what a phase without edges holds) does not fit."""
    need = max(held + MIN_EDGE_BYTES, alone)
    if spare < need:
        raise BudgetError(f"--memory-budget {format_size(budget)} is too small to ingest {nodes:,} nodes: "
                          f"use at least {format_size(need + FIXED_OVERHEAD, up=True)}")
    edge_bytes = spare - held
    return Plan(duckdb_bytes, edge_bytes, max(16 * MIB, edge_bytes // 4))


class _row_writer:
    """Rows of a new ``.npy`` of the stage written with plain I/O (no lingering mapped pages)."""

    def __init__(self, writer, name, rows, dim):
        created = writer.array(name, (rows, dim), np.float32)
        del created
        self.file = NpyFile(writer.path / f"{name}.npy", writable=True)
        self.shape = (rows, dim)

    def __setitem__(self, rows, block):
        self.file.write(rows.start, block)

    def __enter__(self):
        return self

    def __exit__(self, *exc):
        self.file.close()
        return False

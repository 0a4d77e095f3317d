"""Ingest: the night's edge partitions and the node table become the store's graph stage."""
import time

import numpy as np
import pyarrow as pa

from .arrayfile import NpyFile
from .errors import BudgetError
from .edges import EdgeFiles, build_csr, duckdb_rows, explain_unmapped, explain_weight, register_ids, scan_error
from .fingerprint import fingerprints
from .idrows import IdTable, hashable, hashed_rows, table_bytes
from .memory import DEFAULT_BUDGET, FIXED_OVERHEAD, MIB, format_size, parse_size, peak_rss, working_memory
from .nodetable import NodeTable, copy_npy_features
from .runtime import set_threads
from .sources import edge_files, regular_file
from .store import Store


def ingest(edges, nodes, store, features=None, memory_budget=DEFAULT_BUDGET, threads=None,
           drop_unknown=False):
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
    import duckdb

    started = time.time()
    budget = parse_size(memory_budget)
    threads = set_threads(threads)
    store = store if isinstance(store, Store) else Store(store)
    regular_file(nodes, "--nodes")
    if features is not None:
        regular_file(features, "--features")
    table = NodeTable(nodes, needs_features=features is None)
    partitions = EdgeFiles(edge_files(edges), table.id_kind)
    n = table.rows
    index_dtype = np.int32 if n < 2**31 - 1 else np.int64
    hash_bytes = table_bytes(n) if hashable(table.file.schema_arrow.field("node_id").type, partitions.files,
                                            index_dtype) else 0
    duck_bytes, edge_bytes, chunk_bytes = _plan(budget, n, partitions.rows, hash_bytes)
    table.load()
    inputs = {"edges": fingerprints(partitions.files), "nodes": fingerprints([nodes])}
    if features is not None:
        inputs["features"] = fingerprints([features])
    params = {"edges": str(edges), "nodes": str(nodes), "drop_unknown": bool(drop_unknown),
              "features": None if features is None else str(features)}
    with store.locked(), store.begin("graph", params=params, inputs=inputs) as writer:
        if features is None:
            dim = table.feature_dim()
            with _row_writer(writer, "features", n, dim) as out:
                table.copy_features(out, chunk_bytes)
        else:
            dim = copy_npy_features(features, n, lambda d: _row_writer(writer, "features", n, d), chunk_bytes)
        writer.write_table("node_id", pa.table({"node_id": table.ids}))
        writer.save("split", table.split)
        writer.save("label", table.label)
        pa.default_memory_pool().release_unused()  # Arrow's pool keeps what the table reads freed
        con = None
        if duck_bytes:
            con = _duckdb(writer.scratch(), duck_bytes, threads)
            register_ids(con, table.ids, index_dtype)
            batches = duckdb_rows(con, partitions, index_dtype, BATCH_ROWS, drop_unknown)
        else:
            def unmapped():  # DuckDB only to locate the first bad row for the message
                con = _duckdb(writer.scratch(), DUCKDB_MIN, threads)
                register_ids(con, table.ids, index_dtype)
                explain_unmapped(con, partitions)

            ids = IdTable(table.ids.to_numpy())
            batches = hashed_rows(partitions, ids, BATCH_ROWS, drop_unknown, unmapped,
                                  lambda: explain_weight(partitions))
        try:
            counts = build_csr(batches, partitions, n, index_dtype, writer, edge_bytes=edge_bytes)
        # DuckDB errors met mid-stream arrive as Arrow's OSError; pyarrow's own reads raise ArrowException
        except (duckdb.Error, OSError, pa.ArrowException) as exc:
            raise scan_error(exc, partitions, budget) from None
        if con is not None:
            con.close()
        summary = {"nodes": n, "feature_dim": dim, "weighted": bool(partitions.weighted),
                   "edge_files": len(partitions.files), **counts,
                   "memory_budget": format_size(budget)}
        writer.info.update(summary)
    summary.update(seconds=round(time.time() - started, 3), peak_rss=peak_rss())
    return summary


# Bytes per node the stage holds: the id map (id + index), split, label, entry counts and row
# pointers (45 B) plus what reading the node table and its feature batches leaves resident in
# the allocators (measured: 20M nodes held ~1.0 GB more than the arrays before the edge scan).
NODE_BYTES = 80
# What DuckDB's hash join needs per node of the id map, and at least, to stream the join; its
# resident set runs about this much above its memory_limit (measured on 2 threads).
DUCKDB_NODE_BYTES = 64
DUCKDB_MIN = 256 * MIB
DUCKDB_SLACK = 160 * MIB
BATCH_ROWS = 1 << 20
# pyarrow decodes a whole row group before slicing it into batches, and the id table's build
# holds a copy of the ids: room for both on the hash path (measured: 20M nodes, 5M-row groups).
HASH_SLACK = 256 * MIB


def _plan(budget, nodes, edge_rows, hash_bytes=0):
    """Split the budget: DuckDB's limit, the edge build's share, the feature copy's chunk.

    With ``hash_bytes`` (the id hash table of integer ids) the ids are mapped without DuckDB,
    whose limit is then 0, as long as the build keeps its share; else DuckDB maps them.
    """
    spare = working_memory(budget, "ingest")
    if hash_bytes:
        edge_bytes = spare - hash_bytes - HASH_SLACK - nodes * NODE_BYTES - BATCH_ROWS * 48
        if edge_bytes >= 64 * MIB:
            return 0, edge_bytes, max(16 * MIB, edge_bytes // 4)
    duck = min(max(DUCKDB_MIN, nodes * DUCKDB_NODE_BYTES), max(DUCKDB_MIN, spare // 3))
    held = duck + DUCKDB_SLACK + nodes * NODE_BYTES + BATCH_ROWS * 48  # 48 B per row of Arrow batches
    edge_bytes = spare - held
    if edge_bytes < 64 * MIB:
        need = held + 64 * MIB + FIXED_OVERHEAD
        raise BudgetError(f"--memory-budget {format_size(budget)} is too small to ingest {nodes:,} nodes: "
                          f"use at least {format_size(need, up=True)}")
    return duck, edge_bytes, max(16 * MIB, edge_bytes // 4)


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


def _duckdb(spill_dir, memory_bytes, threads):
    import duckdb

    con = duckdb.connect()
    con.execute(f"SET memory_limit = '{memory_bytes // MIB}MB'")
    con.execute(f"SET temp_directory = '{str(spill_dir)}'")
    con.execute(f"SET threads = {int(threads)}")
    con.execute("SET preserve_insertion_order = false")
    con.execute("SET enable_progress_bar = false")
    return con

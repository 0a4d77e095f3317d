"""Ingest: the night's edge partitions and the node table become the store's graph stage."""
import time

import numpy as np
import pyarrow as pa

from .edges import BYTES_PER_EDGE_ROW, EdgeFiles, build_csr, register_ids, scan_error
from .fingerprint import fingerprints
from .memory import DEFAULT_BUDGET, MIB, format_size, parse_size, peak_rss, require, working_memory
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
    spare = working_memory(budget, "ingest")
    # The CSR build holds every edge row in memory (out-of-core ingest is planned separately).
    require(budget, partitions.rows * BYTES_PER_EDGE_ROW + n * 64, "ingest of "
            f"{partitions.rows:,} edge rows")
    duck_bytes = max(256 * MIB, spare - partitions.rows * BYTES_PER_EDGE_ROW)
    inputs = {"edges": fingerprints(partitions.files), "nodes": fingerprints([nodes])}
    if features is not None:
        inputs["features"] = fingerprints([features])
    params = {"edges": str(edges), "nodes": str(nodes), "drop_unknown": bool(drop_unknown),
              "features": None if features is None else str(features)}
    with store.locked(), store.begin("graph", params=params, inputs=inputs) as writer:
        chunk_bytes = max(16 * MIB, spare // 8)
        if features is None:
            out = writer.array("features", (n, table.feature_dim()), np.float32)
            table.copy_features(out, chunk_bytes)
        else:
            out = copy_npy_features(features, n, lambda d: writer.array("features", (n, d), np.float32),
                                    chunk_bytes)
        dim = out.shape[1]
        out.flush()
        del out
        writer.write_table("node_id", pa.table({"node_id": table.ids}))
        writer.save("split", table.split)
        writer.save("label", table.label)
        con = _duckdb(writer.scratch(), duck_bytes, threads)
        register_ids(con, table.ids, index_dtype)
        try:
            counts = build_csr(con, partitions, n, index_dtype, writer, batch_rows=1 << 20,
                               drop_unknown=drop_unknown)
        except (duckdb.Error, OSError) as exc:  # DuckDB errors met mid-stream arrive as Arrow's OSError
            raise scan_error(exc, partitions, budget) from None
        con.close()
        summary = {"nodes": n, "feature_dim": dim, "weighted": bool(partitions.weighted),
                   "edge_files": len(partitions.files), **counts,
                   "memory_budget": format_size(budget)}
        writer.info.update(summary)
    summary.update(seconds=round(time.time() - started, 3), peak_rss=peak_rss())
    return summary


def _duckdb(spill_dir, memory_bytes, threads):
    import duckdb

    con = duckdb.connect()
    con.execute(f"SET memory_limit = '{memory_bytes // MIB}MB'")
    con.execute(f"SET temp_directory = '{str(spill_dir)}'")
    con.execute(f"SET threads = {int(threads)}")
    con.execute("SET preserve_insertion_order = false")
    con.execute("SET enable_progress_bar = false")
    return con

"""Streaming the edge partitions: DuckDB id mapping, checks, and the CSR build."""
import copy
import errno
import os

import numpy as np
import pyarrow as pa
import pyarrow.compute  # noqa: F401  (pa.compute)

from ..common.errors import BudgetError, InputError
from .csrbuild import EdgeRows, build_in_blocks, build_in_memory, count_dtype, in_memory_bytes_per_row
from ..kernels.csr import count_endpoints
from ..common.memory import MIB, format_size
from ..common.runtime import progress
from ..common.sources import first_damaged, id_kind, is_numeric, open_parquet


class EdgeFiles:
    """The checked ``--edges`` partitions: same columns and id type in every file."""

    def __init__(self, files, node_id_kind, src="src", dst="dst"):
        self.files = files
        self.src, self.dst = src, dst
        self.rows = 0
        self.file_rows = []
        self.weighted = None
        for path in files:
            meta = open_parquet(path, "--edges")
            schema = meta.schema_arrow
            for column in (src, dst):
                if column not in schema.names:
                    raise InputError(f"--edges {path}: missing column {column!r} "
                                     f"(needs {src}, {dst} and optionally weight; has {', '.join(schema.names)}; "
                                     "--src-col and --dst-col name other columns)")
                kind = id_kind(schema.field(column).type)
                if kind != node_id_kind:
                    raise InputError(f"--edges {path}: column {column!r} has type {schema.field(column).type} "
                                     f"but the node ids in --nodes are {node_id_kind}; ids must have one type")
            has_weight = "weight" in schema.names
            if has_weight and not is_numeric(schema.field("weight").type):
                raise InputError(f"--edges {path}: column 'weight' has type {schema.field('weight').type}; "
                                 "use positive numbers")
            if self.weighted is None:
                self.weighted = has_weight
            elif has_weight != self.weighted:
                raise InputError(f"--edges {path}: {'has' if has_weight else 'lacks'} a 'weight' column "
                                 f"unlike {files[0]}; every partition needs the same columns")
            if meta.metadata.num_rows == 0:
                raise InputError(f"--edges {path}: the partition holds no rows; remove it or fill it")
            self.file_rows.append(meta.metadata.num_rows)
            self.rows += meta.metadata.num_rows

    def subset(self, files):
        """The same checked partitions restricted to ``files``; ``rows`` stays the whole input's
        count, which messages quote."""
        part = copy.copy(self)
        part.files = list(files)
        return part

    def endpoints_sql(self):
        """The two endpoint columns of the scan aliased ``e``, quoted for DuckDB."""
        return tuple('e."' + name.replace('"', '""') + '"' for name in (self.src, self.dst))

    def sql_source(self):
        names = ", ".join("'" + str(p).replace("'", "''") + "'" for p in self.files)
        return f"read_parquet([{names}], filename = true, file_row_number = true)"


def duckdb_rows(con, edges, index_dtype, batch_rows, drop_unknown=False, explained=None):
    """Yield ``(u, v, w, dropped)`` per batch of the partitions, ids mapped by DuckDB.

    ``con`` is a DuckDB connection holding the id map as table ``idmap(id, idx)``. Edge rows
    naming a node missing from the node table are an error, or dropped and counted (``dropped``)
    with ``drop_unknown``; a weight that is not finite and > 0 is an error, located in the
    partitions ``explained`` (default ``edges``).
    """
    explained = edges if explained is None else explained
    weight_sql = "e.weight::FLOAT AS w" if edges.weighted else "NULL::FLOAT AS w"
    src, dst = edges.endpoints_sql()
    query = (f"SELECT s.idx AS u, d.idx AS v, {weight_sql} FROM {edges.sql_source()} AS e "
             f"LEFT JOIN idmap AS s ON {src} = s.id LEFT JOIN idmap AS d ON {dst} = d.id")
    no_weight = np.empty(0, dtype=np.float32)
    reader = con.sql(query).to_arrow_reader(batch_rows)
    for batch in reader:
        dropped = 0
        if batch.column(0).null_count or batch.column(1).null_count:
            if not drop_unknown:
                reader.close()
                explain_unmapped(con, explained)
            known = pa.compute.and_(batch.column(0).is_valid(), batch.column(1).is_valid())
            dropped = len(batch) - pa.compute.sum(known).as_py()
            batch = batch.filter(known)
        u = batch.column(0).to_numpy().astype(index_dtype, copy=False)
        v = batch.column(1).to_numpy().astype(index_dtype, copy=False)
        w = no_weight
        if edges.weighted:
            w = batch.column(2).to_numpy(zero_copy_only=False)
            if not np.all((w > 0) & (w < np.inf)):  # also false for NaN and null
                reader.close()
                explain_weight(explained)
        yield u, v, w, dropped


def build_csr(batches, edges, node_count, index_dtype, writer, edge_bytes):
    """Symmetrise, drop loops, merge repeats; write indptr/indices(/weight).

    ``batches`` yields ``(u, v, w, dropped)``: dense rows (``index_dtype``), float32 weights
    (empty when unweighted) and the count of unknown-id rows dropped from the batch
    (``duckdb_rows`` or ``idrows.hashed_rows``). ``edge_bytes`` bounds what the build holds:
    when the edge rows and the whole adjacency fit it they stay in memory, else they are
    spilled and built in row blocks. Returns a dict of counts for the manifest.
    """
    in_memory = edges.rows * in_memory_bytes_per_row(index_dtype, edges.weighted) <= edge_bytes
    scratch = writer.scratch()
    rows = EdgeRows(edges.rows, index_dtype, edges.weighted, None if in_memory else scratch / "edges.bin")
    counts = np.zeros(node_count, dtype=count_dtype(edges.rows))
    loops, dropped = 0, 0
    with progress(total=edges.rows, desc="ingest edges", unit="edge") as bar:
        for u, v, w, batch_dropped in batches:
            rows.append(u, v, w)
            loops += count_endpoints(u, v, counts)
            dropped += batch_dropped
            bar.update(len(u))
    filled = rows.count
    require_edges(edges, filled, loops)
    if in_memory:
        unique, blocks = build_in_memory(rows, counts, writer), 1
    else:
        with progress(total=None, desc="ingest blocks", unit="block") as bar:
            unique, blocks = build_in_blocks(rows, counts, writer, edge_bytes, scratch, bar)
    return edge_counts(filled, dropped, loops, unique, blocks)


def require_edges(edges, filled, loops):
    """Refuse a graph without edges: every kept row (``filled``) was a self loop."""
    if filled == loops:
        raise InputError(f"--edges: none of the {edges.rows} edge rows joins two different known nodes; "
                         "the graph has no edges")


def edge_counts(filled, dropped, loops, unique, blocks):
    """The manifest's counts from the rows kept and dropped, the loops and the CSR's entries."""
    return {"edge_rows": int(filled + dropped), "unknown_dropped": int(dropped), "self_loops_dropped": int(loops),
            "undirected_edges": int(unique) // 2, "repeats_merged": int(filled - loops - int(unique) // 2),
            "row_blocks": int(blocks)}


def explain_unmapped(con, edges):
    """Find the first edge row whose src or dst is null or not in the node table, and say so."""
    src_sql, dst_sql = edges.endpoints_sql()
    row = con.execute(
        f"SELECT e.filename, e.file_row_number, {src_sql}, {dst_sql}, s.idx IS NULL AS bad_src "
        f"FROM {edges.sql_source()} AS e LEFT JOIN idmap AS s ON {src_sql} = s.id "
        f"LEFT JOIN idmap AS d ON {dst_sql} = d.id WHERE s.idx IS NULL OR d.idx IS NULL "
        f"ORDER BY e.filename, e.file_row_number LIMIT 1").fetchone()
    file, index, src, dst, bad_src = row
    column, value = (edges.src, src) if bad_src else (edges.dst, dst)
    if value is None:
        raise InputError(f"--edges {file}: column {column!r} is null at row {index}")
    raise InputError(f"--edges {file}: row {index} column {column!r} names node {value!r}, "
                     "which is not in --nodes")


def explain_weight(edges):
    """Find the first weight that is not a finite positive float32 and say where it is.

    Scanned with pyarrow, not DuckDB: DuckDB prunes row groups by their min/max statistics,
    which leave NaN out, so a filter for NaN finds nothing.
    """
    import pyarrow.parquet as pq

    for path in edges.files:
        row = 0
        for batch in pq.ParquetFile(path).iter_batches(columns=["weight"]):
            with np.errstate(over="ignore"):  # a float64 weight too large for float32 becomes inf
                w = batch.column(0).to_numpy(zero_copy_only=False).astype(np.float32)
            bad = np.flatnonzero(~((w > 0) & (w < np.inf)))
            if bad.size:
                value = batch.column(0)[int(bad[0])].as_py()
                raise InputError(f"--edges {path}: column 'weight' row {row + bad[0]} holds {value}; "
                                 "weights must be finite and > 0")
            row += len(batch)
    raise InputError("--edges: a weight is NaN, infinite or <= 0 but could not be located again")


def scan_error(exc, edges, budget):
    """The error to raise for a DuckDB failure while scanning the partitions.

    Out of memory is the budget's fault (exit 3); a damaged file is named (exit 2); a failed
    system call (``errno`` set: disk full, ...) and anything else come back unchanged, except
    that DuckDB's own report of a full disk under its spill files becomes the ENOSPC
    ``OSError`` that the command line turns into exit 3.
    """
    import duckdb

    if isinstance(exc, OSError) and exc.errno is not None:
        return exc
    full = os.strerror(errno.ENOSPC)
    # A full spill disk reaches DuckDB as "failed to offload data block", an Out of Memory Error
    # that blames 'max_temp_directory_size' (seen with a 1 MiB tmpfs), or as a failed write.
    if isinstance(exc, duckdb.Error) and ("max_temp_directory_size" in str(exc) or full in str(exc)):
        return OSError(errno.ENOSPC, full, "DuckDB's spill files in the store's .staging folder")
    if isinstance(exc, duckdb.OutOfMemoryException) or "Out of Memory Error" in str(exc):
        return BudgetError(f"--memory-budget {format_size(budget)}: DuckDB ran out of memory joining "
                           f"{edges.rows:,} edge rows; raise the budget")
    columns = [edges.src, edges.dst] + (["weight"] if edges.weighted else [])
    return first_damaged(edges.files, columns, "--edges") or exc


def duckdb_connection(spill_dir, memory_bytes, threads):
    """A DuckDB connection within ``memory_bytes``, spilling into ``spill_dir``."""
    import duckdb

    con = duckdb.connect()
    con.execute(f"SET memory_limit = '{memory_bytes // MIB}MB'")
    con.execute(f"SET temp_directory = '{str(spill_dir)}'")
    con.execute(f"SET threads = {int(threads)}")
    con.execute("SET preserve_insertion_order = false")
    con.execute("SET enable_progress_bar = false")
    return con


def register_ids(con, ids, index_dtype):
    """Give DuckDB the id map ``idmap(id, idx)``: node table row order is the dense index."""
    table = pa.table({"id": ids, "idx": pa.array(np.arange(len(ids), dtype=index_dtype))})
    con.register("idmap", table)
    return table

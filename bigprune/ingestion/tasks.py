"""The tasks of an ingest through the cluster, run on the workers (``clusterbuild`` plans them).

1. :func:`spill_partitions`, one task per group of partitions: read them, map their ids and check
   them as one server does, and spill both directions of every non-loop edge, grouped by a fixed
   grid of row ranges, into a spill file of its own.
2. :func:`merge_block`, one task per row block (consecutive ranges): gather the block's entries
   from every spill file, then scatter, sort and merge repeats with the single-server kernels,
   into raw files of the block.
3. :func:`place_block`: the block's rows written into ``indptr``, ``indices`` and ``weight`` at
   their offsets.

A spill file holds runs back to back; a run of ``E`` entries is its rows (``E`` row indices),
then its columns, then its weights (float32, weighted graphs only), each grouped by range;
``<spill>.cuts.npy`` (runs x ranges + 1, int64) gives run ``j``'s entries of range ``k`` as
``cuts[j, k]:cuts[j, k + 1]``. Every task writes the same bytes when run again.
"""
import os
from pathlib import Path
from typing import NamedTuple, Optional

import numpy as np
import pyarrow as pa
import pyarrow.parquet as pq

from ..cluster.tasks import worker_threads
from ..common.arrayfile import NpyFile, pread_into
from ..common.memory import chunk_ranges
from ..common.runtime import set_threads
from ..kernels.csr import compact_rows, count_rows, scatter_directed, sort_unique_rows, split_by_block
from .csrbuild import COPY_WINDOW
from .edges import duckdb_connection, duckdb_rows, explain_unmapped, explain_weight, register_ids, scan_error
from .idrows import IdTable, hashed_rows
from .ingest import BATCH_ROWS

# What one worker process keeps between the tasks of one ingest: the id map, keyed by its file.
_ID_MAPS = {}


class IdMap(NamedTuple):
    """Where a task finds the node ids: the staged ``node_id.parquet`` and, for plain integer ids,
    the saved slots of the client's id hash table (``hash_slots``; None: DuckDB joins the ids).
    DuckDB works within ``duckdb_bytes`` (on the hash path only to locate an unknown id)."""

    node_ids: str
    hash_slots: Optional[str]
    duckdb_bytes: int


class Grid(NamedTuple):
    """``ranges`` fixed row ranges of ``nodes`` rows: range ``k`` is rows ``bounds[k]:bounds[k + 1]``."""

    nodes: int
    ranges: int

    def bounds(self):
        return np.arange(self.ranges + 1, dtype=np.int64) * self.nodes // self.ranges


def cuts_path(spill):
    return Path(f"{spill}.cuts.npy")


def block_paths(scratch, block):
    """The raw files of a merged block: neighbours, weights and its rows' local end pointers."""
    return tuple(Path(scratch) / f"block-{block}.{part}.bin" for part in ("indices", "weight", "ptr"))


def forget_ids():
    """Drop this worker's cached id map (run on every worker once the partitions are spilled)."""
    _ID_MAPS.clear()


def _cached(path, load):
    if path not in _ID_MAPS:
        _ID_MAPS.clear()  # one ingest at a time: never keep a previous run's map
        _ID_MAPS[path] = load(path)
    return _ID_MAPS[path]


def _node_ids(path):
    return pq.read_table(path).column("node_id").combine_chunks()


def _hash_table(path):
    return IdTable.from_table(np.load(path))


def spill_partitions(edges, first, stop, ids, grid, spill, run_rows, index_dtype, drop_unknown, budget):
    """Phase 1 over ``edges.files[first:stop]``; returns ``(filled, loops, dropped)``: the rows
    kept, the self loops among them and the rows dropped for naming unknown nodes.

    Holds ``run_rows`` mapped rows (and both directions of them) before writing them as a run.
    A bad row is looked for in every partition up to this task's (``_looked_at``), so each task
    meeting one raises the very line one server raises.
    """
    import duckdb

    threads = set_threads(worker_threads())
    index_dtype = np.dtype(index_dtype)
    mine = edges.subset(edges.files[first:stop])
    looked_at = _looked_at(edges, stop)
    spill_dir = Path(spill).with_suffix(".duckdb")
    spill_dir.mkdir(exist_ok=True)
    con = None
    try:
        if ids.hash_slots is not None:
            def unmapped():  # DuckDB only to locate the first bad row for the message, as one server
                nonlocal con
                con = duckdb_connection(spill_dir, ids.duckdb_bytes, threads)
                register_ids(con, _node_ids(ids.node_ids), index_dtype)
                explain_unmapped(con, looked_at)

            batches = hashed_rows(mine, _cached(ids.hash_slots, _hash_table), BATCH_ROWS, drop_unknown,
                                  unmapped, lambda: explain_weight(looked_at))
        else:
            con = duckdb_connection(spill_dir, ids.duckdb_bytes, threads)
            register_ids(con, _cached(ids.node_ids, _node_ids), index_dtype)
            batches = duckdb_rows(con, mine, index_dtype, BATCH_ROWS, drop_unknown, looked_at)
        run_rows = max(1, min(run_rows, sum(edges.file_rows[first:stop])))
        return _spill(batches, grid.bounds(), run_rows, index_dtype, edges.weighted, spill)
    # DuckDB errors met mid-stream arrive as Arrow's OSError; pyarrow's own reads raise ArrowException
    except (duckdb.Error, OSError, pa.ArrowException) as exc:
        raise scan_error(exc, looked_at, budget) from None
    finally:
        if con is not None:
            con.close()


def _looked_at(edges, stop):
    """The partitions a task searches for the first bad row: those before its last one in the
    scan's order (a bad weight is the first in that order) and those whose path sorts before its
    last one's (an unknown id is the first by path and row, DuckDB's ORDER BY). The first bad row
    of the whole input lies there whenever the task's own partitions hold one."""
    last = max(str(path) for path in edges.files[:stop])
    return edges.subset([path for i, path in enumerate(edges.files) if i < stop or str(path) <= last])


def _spill(batches, bounds, run_rows, index_dtype, weighted, spill):
    """Buffer the mapped rows and write them as runs grouped by range; ``(filled, loops, dropped)``."""
    ranges = len(bounds) - 1
    u, v = np.empty(run_rows, dtype=index_dtype), np.empty(run_rows, dtype=index_dtype)
    w = np.empty(run_rows if weighted else 0, dtype=np.float32)
    rows, cols = np.empty(2 * run_rows, dtype=index_dtype), np.empty(2 * run_rows, dtype=index_dtype)
    ws = np.empty(2 * run_rows if weighted else 0, dtype=np.float32)
    runs, held, filled, dropped = [], 0, 0, 0
    with open(spill, "wb") as out:
        def write_run(count):
            cuts = np.empty(ranges + 1, dtype=np.int64)
            split_by_block(u[:count], v[:count], w[:count], bounds, rows, cols, ws, cuts)
            entries = int(cuts[-1])
            for part in (rows, cols, ws):
                part[:entries].tofile(out)
            runs.append(cuts)

        for bu, bv, bw, batch_dropped in batches:
            dropped += batch_dropped
            filled += len(bu)
            done = 0
            while done < len(bu):
                take = min(run_rows - held, len(bu) - done)
                u[held:held + take], v[held:held + take] = bu[done:done + take], bv[done:done + take]
                if weighted:
                    w[held:held + take] = bw[done:done + take]
                held, done = held + take, done + take
                if held == run_rows:
                    write_run(held)
                    held = 0
        if held or not runs:
            write_run(held)
    np.save(cuts_path(spill), np.stack(runs))
    entries = sum(int(cuts[-1]) for cuts in runs)
    return filled, filled - entries // 2, dropped


def merge_block(spills, first_range, stop_range, lo, hi, entries, index_dtype, weighted, raw):
    """Phase 2: rows ``lo..hi`` (ranges ``first_range..stop_range``, ``entries`` directed
    entries in all) gathered from every spill file, sorted and merged (a repeat keeps its
    largest weight); writes the ``raw`` files (``block_paths``) and returns the unique count."""
    set_threads(worker_threads())
    index_dtype = np.dtype(index_dtype)
    rows, cols = np.empty(entries, dtype=index_dtype), np.empty(entries, dtype=index_dtype)
    w = np.empty(entries if weighted else 0, dtype=np.float32)
    record = 2 * index_dtype.itemsize + (4 if weighted else 0)
    at = 0
    for spill in spills:
        fd = os.open(spill, os.O_RDONLY)
        try:
            start = 0
            for cuts in np.load(cuts_path(spill)):
                size, a, b = int(cuts[-1]), int(cuts[first_range]), int(cuts[stop_range])
                got = slice(at, at + b - a)
                pread_into(fd, rows[got], start + a * index_dtype.itemsize, spill)
                pread_into(fd, cols[got], start + (size + a) * index_dtype.itemsize, spill)
                if weighted:
                    pread_into(fd, w[got], start + 2 * size * index_dtype.itemsize + 4 * a, spill)
                at, start = at + b - a, start + size * record
        finally:
            os.close(fd)
    if at != entries:
        raise RuntimeError(f"row block {lo}..{hi}: the spill files hold {at} entries, the plan {entries}")
    local = np.zeros(hi - lo + 1, dtype=np.int64)
    count_rows(rows, lo, local[1:])
    np.cumsum(local, out=local)
    indices = np.empty(entries, dtype=index_dtype)
    weights = np.empty(entries if weighted else 0, dtype=np.float32)
    scatter_directed(rows, cols, w, lo, local[:-1].copy(), indices, weights)
    del rows, cols, w
    kept = np.empty(hi - lo, dtype=np.int64)
    sort_unique_rows(local, indices, weights, kept)
    ends = np.empty_like(local)
    compact_rows(local, kept, indices, weights, ends)
    unique = int(ends[-1])
    for values, path in zip((indices[:unique], weights[:unique], ends[1:]), raw):
        values.tofile(path)
    return unique


def place_block(stage, raw, lo, offset, unique, weighted):
    """Phase 3: the block's rows placed in the stage's ``indptr`` (from row ``lo + 1``),
    ``indices`` and ``weight`` (from entry ``offset``), which the client created."""
    stage = Path(stage)
    indices_raw, weights_raw, ends_raw = raw
    with NpyFile(stage / "indptr.npy", writable=True) as indptr:
        indptr.write(lo + 1, np.fromfile(ends_raw, dtype=np.int64) + offset)
    targets = [(indices_raw, "indices")] + ([(weights_raw, "weight")] if weighted else [])
    for source, name in targets:
        with open(source, "rb") as fh, NpyFile(stage / f"{name}.npy", writable=True) as out:
            step = max(1, COPY_WINDOW // out.dtype.itemsize)
            for start, stop in chunk_ranges(unique, step):
                out.write(offset + start, np.fromfile(fh, dtype=out.dtype, count=stop - start))

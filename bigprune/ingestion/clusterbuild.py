"""Building the CSR through a Dask cluster: the per-worker plan and the client's side of the tasks
in ``tasks`` (map and spill the partitions, merge each row block, place it).

The stored bytes are those of one server: a row's neighbours are sorted and its repeats merged
(largest weight kept) by the same kernels, and neither depends on the order in which the row's
entries arrive, so grouping rows into ranges and blocks differently changes nothing stored.
"""
import math
from pathlib import Path
from typing import NamedTuple

import numpy as np

from ..cluster.tasks import run_tasks, worker_count
from ..common.errors import BudgetError
from ..common.memory import FIXED_OVERHEAD, MIB, format_size, working_memory
from ..kernels.csr import block_bounds
from .csrbuild import ENTRY_BYTES
from .edges import edge_counts, require_edges
from .ingest import (BATCH_ROWS, DUCKDB_MIN, DUCKDB_NODE_BYTES, DUCKDB_SLACK, LOAD_NODE_BYTES, MIN_EDGE_BYTES,
                     NODE_BYTES, NODE_SLACK, SCAN_SLACK)
from .tasks import Grid, IdMap, block_paths, cuts_path, forget_ids, merge_block, place_block, spill_partitions

# What a merge task holds per row of its block: counts/pointers, their cursor copy, kept counts
# and the compacted pointers (int64 each).
ROW_BYTES = 40
# Copies of each mapped row a phase-1 task buffers: the row, and its two directions.
RUN_COPIES = 3
# Mapped edge rows a phase-1 task aims at (several partitions share a task below it), and the
# least a row block holds (each merge task reads a slice of every run of every spill file).
TASK_ROWS = 1 << 24
MIN_BLOCK_BYTES = 64 * MIB
# Fixed row ranges per row block, on average: the blocks are unions of whole ranges.
RANGES_PER_BLOCK = 8
MAX_RANGES = 1 << 16


class WorkerPlan(NamedTuple):
    """How one worker's budget is used: DuckDB's limit per task, the mapped rows a phase-1 task
    buffers per run, what a merge task may hold, and the client's feature copy chunk."""

    duckdb_bytes: int
    run_rows: int
    block_bytes: int
    chunk_bytes: int


def plan_workers(budget, nodes, edge_rows, hash_bytes, index_dtype, weighted):
    """The per-worker plan (the budget is per worker process, and the client keeps within it too);
    exit 3 up front when it cannot fit.

    The client reads the node table as one server does (``ingest._plan``'s load figures); a
    phase-1 task holds the id map (the hash table, or DuckDB's limit and the ids), a batch and
    its run buffer; a merge task holds its block's entries and rows and nothing else (the id map
    is dropped from every worker before the merge).
    """
    spare = working_memory(budget, "ingest")
    batch = BATCH_ROWS * 48
    record = 2 * np.dtype(index_dtype).itemsize + (4 if weighted else 0)
    if hash_bytes:
        duckdb_bytes = DUCKDB_MIN  # only to locate an unknown id for the message
        client = hash_bytes + nodes * (LOAD_NODE_BYTES + NODE_SLACK) + batch
        scan = hash_bytes + batch + SCAN_SLACK
    else:
        duckdb_bytes = min(max(DUCKDB_MIN, nodes * DUCKDB_NODE_BYTES), max(DUCKDB_MIN, spare // 3))
        client = nodes * NODE_BYTES + batch
        scan = duckdb_bytes + DUCKDB_SLACK + nodes * NODE_BYTES + batch
    need = max(client, scan + MIN_EDGE_BYTES)
    if spare < need:
        raise BudgetError(f"--memory-budget {format_size(budget)} is too small to ingest {nodes:,} nodes "
                          f"through the cluster: use at least {format_size(need + FIXED_OVERHEAD, up=True)} "
                          "(the budget is per worker)")
    return WorkerPlan(duckdb_bytes, (spare - scan) // (RUN_COPIES * record), spare,
                      max(16 * MIB, (spare - client) // 4))


def build_on_cluster(client, edges, table, index_dtype, writer, plan, budget, drop_unknown):
    """Map, spill, merge and place the edges as tasks; write indptr/indices(/weight) into the
    stage, whose ``node_id.parquet`` is written. ``table`` is the loaded :class:`NodeTable`:
    its id hash table (integer ids; else DuckDB maps the ids) is saved for the workers and
    dropped here with the ids. Returns the manifest's counts, plus the cluster's figures."""
    import pyarrow as pa

    scratch = writer.scratch()
    workers = worker_count(client)
    ids = IdMap(str(writer.path / "node_id.parquet"), None, plan.duckdb_bytes)
    if table.id_table is not None:
        np.save(scratch / "id-slots.npy", table.id_table.table)
        ids = ids._replace(hash_slots=str(scratch / "id-slots.npy"))
    table.id_table = table.ids = None
    pa.default_memory_pool().release_unused()  # Arrow's pool keeps the node table's batches
    index_dtype = np.dtype(index_dtype).str
    groups = _partition_groups(edges.file_rows, workers)
    grid = _grid(table.rows, edges.rows, plan.block_bytes, workers)
    spills = [str(scratch / f"spill-{t}.bin") for t in range(len(groups))]
    try:
        phase1 = run_tasks(client, spill_partitions,
                           [(edges, first, stop, ids, grid, spill, plan.run_rows, index_dtype, drop_unknown, budget)
                            for (first, stop), spill in zip(groups, spills)], "ingest partitions", "task")
    finally:
        client.run(forget_ids)
    filled, loops, dropped = (sum(result[i] for result in phase1) for i in range(3))
    require_edges(edges, filled, loops)

    blocks = _row_blocks(spills, grid, plan.block_bytes, workers)
    uniques = run_tasks(client, merge_block,
                        [(spills, block.first_range, block.stop_range, block.lo, block.hi, block.entries,
                          index_dtype, edges.weighted, block_paths(scratch, k)) for k, block in enumerate(blocks)],
                        "ingest blocks", "block")
    for spill in spills:
        _unlink(spill, cuts_path(spill))

    offsets = np.zeros(len(blocks) + 1, dtype=np.int64)
    np.cumsum(uniques, out=offsets[1:])
    total = int(offsets[-1])
    for name, size, dtype in [("indptr", table.rows + 1, np.int64), ("indices", total, index_dtype)] + (
            [("weight", total, np.float32)] if edges.weighted else []):
        created = writer.array(name, (size,), dtype)  # the file with its header; pages untouched
        del created
    run_tasks(client, place_block,
              [(str(writer.path), block_paths(scratch, k), block.lo, int(offsets[k]), uniques[k], edges.weighted)
               for k, block in enumerate(blocks)], "ingest placing", "block")
    for k in range(len(blocks)):
        _unlink(*block_paths(scratch, k))
    counts = edge_counts(filled, dropped, loops, total, len(blocks))
    counts["cluster"] = {"workers": workers, "partition_tasks": len(groups), "row_ranges": grid.ranges}
    return counts


class RowBlock(NamedTuple):
    """A merge task's rows ``lo..hi``: ranges ``first_range..stop_range``, ``entries`` in all."""

    first_range: int
    stop_range: int
    lo: int
    hi: int
    entries: int


def _row_blocks(spills, grid, block_bytes, workers):
    """The grid's ranges grouped into row blocks that fit ``_block_limit`` (a range above it
    gets a block of its own), from the entries each spill file holds per range."""
    entries = np.zeros(grid.ranges, dtype=np.int64)
    for spill in spills:
        entries += np.diff(np.load(cuts_path(spill)), axis=1).sum(axis=0)
    bounds = grid.bounds()
    costs = entries * ENTRY_BYTES + np.diff(bounds) * ROW_BYTES
    ranges = block_bounds(costs, _block_limit(block_bytes, int(costs.sum()), workers))
    return [RowBlock(int(a), int(b), int(bounds[a]), int(bounds[b]), int(entries[a:b].sum()))
            for a, b in zip(ranges[:-1], ranges[1:])]


def _partition_groups(file_rows, workers):
    """Consecutive partitions grouped into tasks of about ``TASK_ROWS`` rows, or fewer rows when
    that would leave fewer than two tasks per worker (a partition is never split)."""
    target = max(1, min(TASK_ROWS, math.ceil(sum(file_rows) / (2 * workers))))
    groups, first, held = [], 0, 0
    for i, rows in enumerate(file_rows):
        held += rows
        if held >= target:
            groups.append((first, i + 1))
            first, held = i + 1, 0
    if first < len(file_rows):
        groups.append((first, len(file_rows)))
    return groups


def _block_limit(block_bytes, total, workers):
    """What one row block may cost: the plan's figure, less when that would leave fewer than
    two blocks per worker (but never below ``MIN_BLOCK_BYTES``)."""
    return min(block_bytes, max(MIN_BLOCK_BYTES, math.ceil(total / (2 * workers))))


def _grid(nodes, edge_rows, block_bytes, workers):
    """Fixed row ranges about ``RANGES_PER_BLOCK`` to a row block of the expected cost (every
    edge row twice), so that blocks of whole ranges fit their limit however the degrees fall."""
    expected = 2 * edge_rows * ENTRY_BYTES + nodes * ROW_BYTES
    ranges = math.ceil(RANGES_PER_BLOCK * expected / _block_limit(block_bytes, expected, workers))
    return Grid(nodes, max(1, min(nodes, MAX_RANGES, ranges)))


def _unlink(*paths):
    for path in paths:
        Path(path).unlink(missing_ok=True)

"""The propagate stage on a Dask cluster, with the bytes of the single-server run.

The client makes the single server's plan from the per-worker budget and runs its way as tasks
(:mod:`bigprune.propagation.tasks`) writing their rows in place into the staged files:

- weighted degrees: one task per row block, each row summed in the single server's pieces;
  the scales and the needed hops (``restrict``) are made from them on the client, as on one
  server, and saved to scratch for the tasks;
- in memory: one task per row block per hop, each worker reading X_k once per hop;
- grid: one task per output block to bucket its entries, then one per output block per hop;
- PageRank: the product ``A @ share`` as one task per row block per step, into a scratch
  file (a worker keeps its blocks of the CSR between steps when the plan holds the CSR whole
  for PageRank); the float64 reductions over whole vectors (the dangling mass, the L1 change) stay on
  the client, on its threads, as on one server with the same ``threads``.
"""
import time

import numpy as np

from . import pagerank as _pagerank
from . import tasks
from .grid import Grid, part
from .hopplan import EDGE_BYTES
from .propagate import finish_hops, hop_file, scales_of, source_path
from .restrict import needed_through
from ..cluster.tasks import run_tasks, worker_count
from ..common.arrayfile import NpyFile, edge_chunks
from ..common.memory import chunk_ranges

# Row blocks per worker for the in-memory hops and the degrees: enough that a lost worker's
# share is small and the workers stay evenly busy. PageRank's product takes one per worker:
# each of its tasks reads the whole share vector, and a step is short beside Dask's round trip.
BLOCKS_PER_WORKER = 4


def run_on_cluster(client, graph, writer, n, d, nnz, hops, norm, storage, restrict, chosen):
    """The hops and PageRank of plan ``chosen`` as tasks; the stage's info (as on one server,
    with ``cluster``: the workers and the tasks run)."""
    scratch = writer.scratch()
    workers = worker_count(client)
    rows = max(1, -(-n // (BLOCKS_PER_WORKER * workers)))
    blocks = chunk_ranges(n, min(rows, chosen.block_rows) if not chosen.grid else rows)
    rank_blocks = chunk_ranges(n, -(-n // workers))
    whole = max(1, nnz)  # one chunk: every row summed at once
    streamed = max(1, min(chosen.edge_rows, nnz)) if chosen.grid else whole  # edge_chunks' size
    counted = {"tasks": 0}

    def mapped(function, pieces, desc, unit="block"):
        counted["tasks"] += len(pieces)
        return run_tasks(client, function, pieces, desc, unit)

    sums = _row_sums(mapped, graph, blocks, streamed, scratch / "strength.npy", n,
                     "propagate degrees")
    left, right = scales_of(_read(sums, n), norm)
    sym = right is not None
    np.save(scratch / "left.npy", left)
    del left, right
    through = None
    if restrict:
        with NpyFile(graph / "indices.npy") as indices:
            rows_per_chunk = chosen.edge_rows if chosen.grid else EDGE_BYTES // indices.dtype.itemsize
            through = needed_through(graph, hops, np.load(graph / "indptr.npy"),
                                     edge_chunks(indices, None, rows_per_chunk))
        np.save(scratch / "through.npy", through)
    needed = scratch / "through.npy" if restrict else None

    info = {}
    hop_seconds = []
    if chosen.grid:
        tic = time.perf_counter()
        out_bounds = chunk_ranges(n, chosen.out_rows)
        src_blocks = max(1, -(-n // chosen.src_rows))
        files = [scratch / f"grid_{i}.bin" for i in range(len(out_bounds))]
        offsets = mapped(tasks.grid_bucket, [(graph, a, b, chosen.src_rows, src_blocks, chosen.edge_rows,
                                              path) for (a, b), path in zip(out_bounds, files)],
                         "propagate grid")
        grid = Grid(n, out_bounds, chosen.src_rows, files, offsets, (graph / "weight.npy").exists())
        info.update({"grid_blocks": [len(out_bounds), src_blocks],
                     "grid_seconds": round(time.perf_counter() - tic, 3)})
    try:
        for hop in range(1, hops + 1):
            tic = time.perf_counter()
            source = source_path(graph, writer, hop)
            with hop_file(writer, hop, n, d, storage) as created:
                target = created.path
            if chosen.grid:
                pieces = [(part(grid, i), source, target, scratch / "left.npy", sym, needed, hop,
                           chosen.edge_rows) for i in range(len(grid.out_bounds))]
                mapped(tasks.grid_hop, pieces, f"propagate hop {hop}/{hops}")
            else:
                pieces = [(graph, source, target, scratch / "left.npy", sym, needed, hop, a, b)
                          for a, b in blocks]
                mapped(tasks.smooth_block, pieces, f"propagate hop {hop}/{hops}")
            hop_seconds.append(round(time.perf_counter() - tic, 3))
    finally:
        client.run(tasks.forget)  # the workers' X_k: PageRank's phase does not hold it
    info.update(finish_hops(writer, hops, through, hop_seconds))
    del through

    tic = time.perf_counter()
    chunk = whole if chosen.pagerank_whole else streamed
    if chunk != streamed:
        sums = _row_sums(mapped, graph, blocks, chunk, scratch / "strength_whole.npy", n,
                         "pagerank degrees")
    # One share file and one product file, written over at each step: a step's tasks all finish
    # before the next share is written, so a rerun task reads its own step's share.
    shares, product = scratch / "share.npy", scratch / "product.npy"
    for path in (shares, product):
        created = np.lib.format.open_memmap(path, mode="w+", dtype=np.float64, shape=(n,))
        del created  # never touched through the map: written with plain file I/O

    def gather(share, out):
        with NpyFile(shares, writable=True) as written:
            written.write(0, share)
        mapped(tasks.row_sums, [(graph, a, b, chunk, shares, product, chosen.pagerank_whole)
                                for a, b in rank_blocks], "pagerank step")
        with NpyFile(product) as summed:
            summed.read_into(0, out)

    try:
        scores, taken, change = _pagerank.iterate(_read(sums, n), gather)
    finally:
        client.run(tasks.forget)  # the CSR blocks kept for PageRank's steps
    writer.save("pagerank", scores)
    info.update({"pagerank_seconds": round(time.perf_counter() - tic, 3), "pagerank_steps": taken,
                 "pagerank_change": change})
    if not chosen.grid:
        info["block_rows"] = chosen.block_rows
    info["cluster"] = {"workers": workers, "tasks": counted["tasks"]}
    return info


def _row_sums(mapped, graph, blocks, chunk, path, n, desc):
    """A's row sums by ``tasks.row_sums`` over every row block into a new float64 (n,) file
    ``path``; the path."""
    created = np.lib.format.open_memmap(path, mode="w+", dtype=np.float64, shape=(n,))
    del created  # never touched through the map: the tasks write it
    mapped(tasks.row_sums, [(graph, a, b, chunk, None, path) for a, b in blocks], desc)
    return path


def _read(path, n):
    """A float64 (n,) file, read whole."""
    with NpyFile(path) as stored:
        return stored.read_into(0, np.empty(n))

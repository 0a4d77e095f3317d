"""The propagate stage's Dask tasks (planned by :mod:`bigprune.propagation.clusterhops`).

Each task reads its window of the graph stage's files and of the previous hop with plain file
I/O, runs the single server's kernel on it and writes its own rows in place, so every row is
summed in the single server's order and a task run again writes the same bytes.
"""
import os
import threading
from contextlib import nullcontext

import numpy as np

from . import grid as _grid
from ..cluster.tasks import worker_threads
from ..common.arrayfile import NpyFile
from ..common.runtime import set_threads
from ..kernels.pagerank import accumulate_rows
from ..kernels.spmm import balanced_bounds, scale_rows, smooth_rows
from .propagate import TASKS_PER_THREAD

# This worker process's inputs to the in-memory hop under way (X_k as smooth_rows reads it, the
# left scales and the needed hops, read once per hop rather than once per task), and PageRank's
# row blocks of the CSR when the plan holds the CSR whole (read once rather than once per step).
_HELD = {}
_HOLDING = threading.Lock()


def smooth_block(graph, source, target, scales, sym, through, level, a, b):
    """Rows ``a..b`` of hop ``level`` in memory: ``smooth_rows`` over the block's CSR rows.

    source : X_{level-1}'s file; target : the hop's file, written at rows a..b. scales : the
    float32 (n,) left scales' file, also the right ones when ``sym``. through : the needed
    hops' file (int8, n) or None.
    """
    threads = set_threads(worker_threads())
    x, left, needed = _hop_inputs(source, scales, sym, through, threads)
    with NpyFile(graph / "indptr.npy") as indptr_file:
        window = indptr_file.read(a, b + 1)
    lo, hi = int(window[0]), int(window[-1])
    # The kernel numbers rows as the whole CSR does: the block's offsets go at rows a..b, rebased
    # to its entries; rows before a are never read, so their pages are never touched.
    indptr = np.empty(b + 1, dtype=np.int64)
    np.subtract(window, lo, out=indptr[a:])
    with NpyFile(graph / "indices.npy") as indices:
        columns = indices.read(lo, hi)
    weights = _read_weights(graph, lo, hi)
    bounds = np.empty(threads * TASKS_PER_THREAD + 1, dtype=np.int64)
    balanced_bounds(indptr, a, b, bounds.shape[0] - 1, bounds)
    block = _held("block", (b - a, x.shape[1]), np.float32)
    smooth_rows(indptr, columns, weights, left, x, needed, level, bounds, block)
    with NpyFile(target, writable=True) as out:
        out.write(a, block)


def forget():
    """Drop what this worker holds (run on every worker after the hops and after PageRank)."""
    with _HOLDING:
        _HELD.clear()


def grid_bucket(graph, a, b, src_rows, blocks, edge_rows, path):
    """Output block rows ``a..b`` bucketed into ``path``; its offsets (see ``grid.bucket``)."""
    set_threads(worker_threads())
    with NpyFile(graph / "indptr.npy") as indptr:
        rows = indptr.read(a, b + 1)
    return _grid.bucket(graph, rows, src_rows, blocks, edge_rows, path)


def grid_hop(one, source, target, scales, sym, through, level, edge_rows):
    """The one output block of grid ``one`` at hop ``level`` (see ``grid.hop_block``)."""
    threads = set_threads(worker_threads())
    (a, b), = one.out_bounds
    if through is None:
        wanted = np.zeros(0, dtype=np.int8)
    else:
        with NpyFile(through) as needed:
            wanted = needed.read(a, b)
    with NpyFile(source) as x, NpyFile(target, writable=True) as out, NpyFile(scales) as left, \
            (NpyFile(scales) if sym else nullcontext()) as right:
        _grid.hop_block(one, x, out, left, right, wanted, level, edge_rows, threads)


def row_sums(graph, a, b, chunk, values, out, keep=False):
    """Rows ``a..b`` of ``A @ values`` (of A's row sums when ``values`` is None), float64,
    written at rows a..b of file ``out``.

    Each row is summed as ``accumulate_rows`` sums it over ``edge_chunks`` of ``chunk``
    entries: in pieces cut where the CSR's entries cross a multiple of ``chunk``.
    values : a float64 (n,) file or None. keep : hold the block's entries in this worker for
    the next call on the same rows (only when ``chunk`` covers the whole CSR: one piece).
    """
    set_threads(worker_threads())
    gathered = np.zeros(0)
    if values is not None:
        with NpyFile(values) as shares:
            gathered = shares.read_into(0, _held("share", shares.shape, np.float64))
    sums = _held("sums", (b - a,), np.float64)
    sums[:] = 0.0
    if keep:
        accumulate_rows(*_kept_block(graph, a, b), gathered, sums)
    else:
        _streamed_sums(graph, a, b, chunk, gathered, sums)
    with NpyFile(out, writable=True) as target:
        target.write(a, sums)


def _kept_block(graph, a, b):
    """Rows a..b of the CSR as ``accumulate_rows`` takes one chunk of it (rebased offsets, first
    entry 0, indices, weights), read once by this worker process."""
    key = (str(graph), a, b)
    with _HOLDING:
        blocks = _HELD.setdefault("blocks", {})
        if key not in blocks:
            with NpyFile(graph / "indptr.npy") as indptr_file:
                indptr = indptr_file.read(a, b + 1)
            lo, hi = int(indptr[0]), int(indptr[-1])
            indptr -= lo
            with NpyFile(graph / "indices.npy") as indices:
                blocks[key] = (indptr, 0, indices.read(lo, hi), _read_weights(graph, lo, hi))
        return blocks[key]


def _streamed_sums(graph, a, b, chunk, gathered, sums):
    """:func:`row_sums` reading the block's entries in pieces cut at multiples of ``chunk``."""
    with NpyFile(graph / "indptr.npy") as indptr_file:
        indptr = indptr_file.read(a, b + 1)
    lo, hi = int(indptr[0]), int(indptr[-1])
    indptr -= lo
    weighted = (graph / "weight.npy").exists()
    with NpyFile(graph / "indices.npy") as indices, \
            (NpyFile(graph / "weight.npy") if weighted else nullcontext()) as weights:
        size = max(0, min(chunk, hi - lo))
        index_buffer = np.empty(size, dtype=indices.dtype)
        weight_buffer = np.empty(size if weighted else 0, dtype=np.float32)
        first = lo
        while first < hi:
            stop = min(hi, (first // chunk + 1) * chunk)
            part = indices.read_into(first, index_buffer[:stop - first])
            part_weights = weights.read_into(first, weight_buffer[:stop - first]) if weighted \
                else weight_buffer
            accumulate_rows(indptr, first - lo, part, part_weights, gathered, sums)
            first = stop


def _hop_inputs(source, scales, sym, through, threads):
    """X_{k} (float32, scaled by the right scales when ``sym``), the left scales and the needed
    hops ((0,) when unrestricted), read once per hop by this worker process."""
    key = (str(source), os.stat(source).st_mtime_ns, str(scales), sym, str(through))
    with _HOLDING:
        if _HELD.get("key") != key:
            with NpyFile(source) as stored:
                # the previous hop's X is read over: never two at once, and no page faulted anew
                x = _held("x", stored.shape, np.float32)
                stored.read_parallel(0, x, threads)
            left = np.load(scales)
            if sym:
                scale_rows(x, left)
            needed = np.zeros(0, dtype=np.int8) if through is None else np.load(through)
            _HELD.update(key=key, inputs=(x, left, needed))
        return _HELD["inputs"]


def _held(name, shape, dtype):
    """This worker's buffer ``name``: the first ``shape[0]`` rows of one kept across tasks (and
    hops, and PageRank's steps) until :func:`forget`, grown when too small. A stage's tasks run
    one at a time per worker (``run_tasks``), so no two use it at once."""
    buffer = _HELD.get(name)
    if buffer is None or buffer.shape[0] < shape[0] or buffer.shape[1:] != tuple(shape[1:]) \
            or buffer.dtype != dtype:
        _HELD.pop(name, None)  # the old one goes before the new one exists
        buffer = _HELD[name] = np.empty(shape, dtype=dtype)
    return buffer[:shape[0]]


def _read_weights(graph, lo, hi):
    """Entries lo..hi of the weights, float32, or (0,) for an unweighted graph."""
    path = graph / "weight.npy"
    if not path.exists():
        return np.zeros(0, dtype=np.float32)
    with NpyFile(path) as weights:
        return weights.read(lo, hi)

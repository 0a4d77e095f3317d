"""Out-of-core hops by 2-D grid partitioning (GridGraph, Zhu et al., USENIX ATC 2015).

Rows are cut into output blocks and source blocks. :func:`build` streams the CSR once and writes,
per output block, one scratch file holding its entries bucketed by source block (local row and
column numbers, int32, rows sorted within each bucket; weights after them when the graph has
any). :func:`hop` then computes each output block with one float32 output window in memory,
reading each source window of ``X_k`` from disk in turn and streaming the bucket that joins the
two in chunks of entries. Nothing is memory-mapped: the windows and chunk buffers are all the
data a hop holds, whatever the size of the graph.
"""
import os
from collections import namedtuple
from contextlib import nullcontext

import numpy as np

from ..common.arrayfile import NpyFile, pread_into, pwrite_from
from ..kernels.grid import add_scaled_rows, bucket_edges, count_blocks, row_cuts, scatter_bucket
from ..kernels.spmm import scale_rows
from ..common.memory import chunk_ranges
from ..common.runtime import progress

Grid = namedtuple("Grid", "n out_bounds src_rows files offsets weighted")
Grid.__doc__ = """n : rows. out_bounds : list of (start, stop) output blocks. src_rows : rows per
source block. files : one bucket file per output block. offsets : per output block, int64
(source blocks + 1,), bucket j's entries are ``offsets[j]:offsets[j + 1]`` of that file.
weighted : whether the files carry weights."""


def build(graph, indptr, out_rows, src_rows, edge_rows, scratch):
    """Bucket the graph stage's CSR into a :class:`Grid` under directory ``scratch``.

    indptr : int64 (n + 1,), held whole. Entries are read ``edge_rows`` at a time.
    """
    n = indptr.shape[0] - 1
    blocks = max(1, -(-n // src_rows))
    out_bounds = chunk_ranges(n, out_rows)
    files, offsets = [], []
    with progress(total=int(indptr[-1]), desc="propagate grid", unit="entry") as bar:
        for i, (a, b) in enumerate(out_bounds):
            files.append(scratch / f"grid_{i}.bin")
            offsets.append(bucket(graph, indptr[a:b + 1], src_rows, blocks, edge_rows, files[-1]))
            bar.update(int(indptr[b] - indptr[a]))
    return Grid(n, out_bounds, src_rows, files, offsets, (graph / "weight.npy").exists())


def bucket(graph, rows, src_rows, blocks, edge_rows, path):
    """Write one output block's entries, bucketed by source block, to ``path``; its offsets.

    rows : int64, the block's part of ``indptr`` (its rows and one more; entry numbers of the
    whole CSR). blocks : source blocks of ``src_rows`` rows. Entries are read ``edge_rows`` at
    a time. Returns int64 (blocks + 1,): bucket j is entries ``offsets[j]:offsets[j + 1]``.
    """
    weighted = (graph / "weight.npy").exists()
    rows_out = np.empty(edge_rows, dtype=np.int32)
    cols_out = np.empty(edge_rows, dtype=np.int32)
    w_out = np.empty(edge_rows if weighted else 0, dtype=np.float32)
    starts = np.empty(blocks + 1, dtype=np.int64)
    lo, hi = int(rows[0]), int(rows[-1])
    with NpyFile(graph / "indices.npy") as indices, \
            (NpyFile(graph / "weight.npy") if weighted else nullcontext()) as weights:
        index_buffer = np.empty(edge_rows, dtype=indices.dtype)
        weight_buffer = np.empty(edge_rows if weighted else 0, dtype=np.float32)
        counts = np.zeros(blocks, dtype=np.int64)
        for first in range(lo, hi, edge_rows):
            count_blocks(indices.read_into(first, index_buffer[:min(edge_rows, hi - first)]),
                         src_rows, counts)
        offset = np.zeros(blocks + 1, dtype=np.int64)
        np.cumsum(counts, out=offset[1:])
        total = int(offset[-1])
        fd = os.open(path, os.O_RDWR | os.O_CREAT | os.O_TRUNC, 0o644)
        try:
            if total:
                os.posix_fallocate(fd, 0, total * (12 if weighted else 8))
            fill = offset[:-1].copy()
            for first in range(lo, hi, edge_rows):
                c = min(edge_rows, hi - first)
                part = indices.read_into(first, index_buffer[:c])
                part_w = weights.read_into(first, weight_buffer[:c]) if weighted else weight_buffer
                bucket_edges(rows, 0, first, part, part_w, src_rows, starts,
                             rows_out[:c], cols_out[:c], w_out[:c])
                for j in np.flatnonzero(starts[1:] > starts[:-1]):
                    s, t, at = starts[j], starts[j + 1], int(fill[j])
                    pwrite_from(fd, rows_out[s:t], 4 * at)
                    pwrite_from(fd, cols_out[s:t], 4 * (total + at))
                    if weighted:
                        pwrite_from(fd, w_out[s:t], 4 * (2 * total + at))
                    fill[j] += t - s
        finally:
            os.close(fd)
    return offset


def hop(grid, source, target, left, right, through, level, edge_rows, threads):
    """One hop ``X_level = Â X_{level-1}`` over the grid, block by block.

    source, target : :class:`NpyFile` of ``X_{level-1}`` and ``X_level`` (n, d), any float dtype.
    left, right : :class:`NpyFile` of the float32 (n,) row scales; ``right`` None for "rw".
    through : int8 (n,) or None: rows with ``through < level`` are skipped and written as NaN.
    """
    n, d = source.shape
    buffers = _buffers(grid, d, edge_rows, threads)
    none = np.zeros(0, dtype=np.int8)
    with progress(total=n, desc=f"propagate hop {level}", unit="row") as bar:
        for i, (a, b) in enumerate(grid.out_bounds):
            _block(grid, i, a, b, source, target, left, right,
                   none if through is None else through[a:b], level, edge_rows, threads, buffers)
            bar.update(b - a)


def part(grid, i):
    """Output block ``i`` of ``grid`` alone, as a :class:`Grid` of one block (a task's share)."""
    return grid._replace(out_bounds=[grid.out_bounds[i]], files=[grid.files[i]],
                         offsets=[grid.offsets[i]])


def hop_block(one, source, target, left, right, wanted, level, edge_rows, threads):
    """One hop (see :func:`hop`) for the single output block of ``one`` (see :func:`part`).

    wanted : int8, the block's rows of ``through``, or (0,) when every row is computed.
    """
    (a, b), = one.out_bounds
    buffers = _buffers(one, source.shape[1], edge_rows, threads)
    _block(one, 0, a, b, source, target, left, right, wanted, level, edge_rows, threads, buffers)


def _buffers(grid, d, edge_rows, threads):
    """The windows and chunk buffers of :func:`_block`, for the largest of ``grid``'s blocks."""
    out_rows = max(b - a for a, b in grid.out_bounds)
    x = np.empty((min(grid.n, grid.src_rows), d), dtype=np.float32)
    return (np.empty((out_rows, d), dtype=np.float32), x,
            np.empty(max(out_rows, x.shape[0]), dtype=np.float32),
            np.empty(edge_rows, dtype=np.int32), np.empty(edge_rows, dtype=np.int32),
            np.empty(edge_rows if grid.weighted else 0, dtype=np.float32),
            np.empty(threads * 8 + 1, dtype=np.int64))


def _block(grid, i, a, b, source, target, left, right, wanted, level, edge_rows, threads, buffers):
    """Output block ``i`` (rows ``a..b``): every source window and bucket, then scale and write.

    wanted : int8 (b - a,) or (0,), the block's rows of ``through``.
    """
    out, x, scale, rows, cols, weights, cuts = buffers
    none = np.zeros(0, dtype=np.float32)
    block = out[:b - a]
    if wanted.shape[0] and not (wanted >= level).any():
        block[:] = np.nan
        target.write(a, block)
        return
    block[:] = 0.0
    offset, total, path = grid.offsets[i], int(grid.offsets[i][-1]), grid.files[i]
    fd = os.open(path, os.O_RDONLY)
    try:
        for j, (s0, s1) in enumerate(chunk_ranges(grid.n, grid.src_rows)):
            lo, hi = int(offset[j]), int(offset[j + 1])
            both = max(a, s0), min(b, s1)  # rows whose self loop lives in this window
            if hi == lo and both[0] >= both[1]:
                continue
            window = source.read_parallel(s0, x[:s1 - s0], threads)
            factors = none if right is None else right.read_into(s0, scale[:s1 - s0])
            for first in range(lo, hi, edge_rows):
                c = min(edge_rows, hi - first)
                pread_into(fd, rows[:c], 4 * first, path)
                pread_into(fd, cols[:c], 4 * (total + first), path)
                if grid.weighted:
                    pread_into(fd, weights[:c], 4 * (2 * total + first), path)
                row_cuts(rows[:c], cuts.shape[0] - 1, cuts)
                scatter_bucket(rows[:c], cols[:c], weights[:c], factors, window, wanted, level, cuts, block)
            if both[0] < both[1]:
                add_scaled_rows(block[both[0] - a:both[1] - a], window[both[0] - s0:both[1] - s0],
                                factors[both[0] - s0:both[1] - s0])
    finally:
        os.close(fd)
    scale_rows(block, left.read_into(a, scale[:b - a]))
    if wanted.shape[0]:
        block[wanted < level] = np.nan
    target.write(a, block)

"""Kernels for the 2-D grid hop: bucketing CSR entries by source block and applying one bucket.

A bucket (i, j) holds the entries whose row lies in output block i and whose column lies in
source block j, as local row and column numbers, sorted by row (GridGraph, Zhu et al., USENIX
ATC 2015). Source blocks are ``block_rows`` rows each, so an entry's block is ``col // block_rows``.
"""
import numpy as np
from numba import njit, prange

from .prefetch import prefetch_row
from .spmm import AHEAD


@njit(cache=True)
def count_blocks(cols, block_rows, counts):
    """counts[b] += how many of ``cols`` fall in source block b.

    cols : int32/int64 (c,), read. counts : int64 (blocks,), updated.
    """
    for e in range(cols.shape[0]):
        counts[cols[e] // block_rows] += 1


@njit(cache=True)
def bucket_edges(indptr, row0, first, cols, weights, block_rows, starts, rows_out, cols_out, w_out):
    """Sort one chunk of CSR entries by source block, keeping their row order within each block.

    indptr : int64 (n + 1,), read. row0 : int, the output block's first row (local rows count
    from it). first : int, the chunk's first entry. cols : int32/int64 (c,), read.
    weights : float32 (c,) or (0,), read. starts : int64 (blocks + 1,), filled: block b's
    entries are ``[starts[b], starts[b + 1])`` of the outputs. rows_out, cols_out : int32 (c,),
    filled with local row (from ``row0``) and local column (within its block).
    w_out : float32 (c,) or (0,), filled.
    """
    count = cols.shape[0]
    blocks = starts.shape[0] - 1
    starts[:] = 0
    for e in range(count):
        starts[cols[e] // block_rows + 1] += 1
    for b in range(blocks):
        starts[b + 1] += starts[b]
    fill = starts[:blocks].copy()
    weighted = weights.shape[0] > 0
    if count == 0:
        return
    r = np.searchsorted(indptr, first, side="right") - 1
    for e in range(count):
        while indptr[r + 1] <= first + e:
            r += 1
        b = cols[e] // block_rows
        at = fill[b]
        fill[b] += 1
        rows_out[at] = r - row0
        cols_out[at] = cols[e] - b * block_rows
        if weighted:
            w_out[at] = weights[e]


@njit(cache=True)
def row_cuts(rows, parts, cuts):
    """Cut ``rows`` (sorted) into ``parts`` runs of about equal length that never split a row.

    rows : int32 (c,), read. cuts : int64 (parts + 1,), filled, ascending, from 0 to c.
    """
    count = rows.shape[0]
    cuts[0] = 0
    for p in range(1, parts):
        at = max(cuts[p - 1], (count * p) // parts)
        while at > 0 and at < count and rows[at] == rows[at - 1]:
            at += 1
        cuts[p] = at
    cuts[parts] = count


@njit(parallel=True, fastmath=True, cache=True)
def scatter_bucket(rows, cols, weights, scale, x, through, level, cuts, out):
    """out[rows[e]] += weights[e] * scale[cols[e]] * x[cols[e]] for one chunk of a bucket, one
    task per run of ``cuts``.

    rows, cols : int32 (c,), read (rows sorted). weights : float32 (c,) or (0,) for all-ones,
    read. scale : float32 (src rows,) or (0,) for all-ones, read: the source rows' right factors
    (applied here rather than to the window, which every output block reads again).
    x : float32 (src rows, d), the source window, read.
    through : int8 (out rows,) or (0,), read: rows with ``through[r] < level`` are skipped.
    cuts : int64 (tasks + 1,) from ``row_cuts``, read. out : float32 (out rows, d), updated;
    each task writes only its own rows.
    """
    weighted = weights.shape[0] > 0
    scaled = scale.shape[0] > 0
    restricted = through.shape[0] > 0
    d = x.shape[1]
    count = cols.shape[0]
    for t in prange(cuts.shape[0] - 1):
        for e in range(cuts[t], cuts[t + 1]):
            if e + AHEAD < count:
                prefetch_row(x, cols[e + AHEAD])
            r = rows[e]
            if restricted and through[r] < level:
                continue
            o = out[r]
            j = cols[e]
            xj = x[j]
            if weighted or scaled:
                c = (weights[e] if weighted else 1.0) * (scale[j] if scaled else 1.0)
                for k in range(d):
                    o[k] += c * xj[k]
            else:
                for k in range(d):
                    o[k] += xj[k]


@njit(parallel=True, cache=True)
def add_scaled_rows(out, x, scale):
    """out[i] += scale[i] * x[i] (the self loops of a window's rows), in place.

    out : float32 (m, d), updated. x : float32 (m, d), read. scale : float32 (m,) or (0,) for
    all-ones, read.
    """
    scaled = scale.shape[0] > 0
    for i in prange(out.shape[0]):
        c = scale[i] if scaled else np.float32(1.0)
        for k in range(out.shape[1]):
            out[i, k] += c * x[i, k]

"""Kernels that turn a stream of (u, v, w) edge rows into a symmetric CSR adjacency."""
import numpy as np
from numba import njit, prange


@njit(cache=True)
def count_endpoints(u, v, counts):
    """Add each non-loop edge to both endpoints' counts; return the number of self loops.

    u, v : int32/int64 (e,), read. counts : int32/int64 (n,), filled (incremented).
    """
    loops = 0
    for i in range(u.shape[0]):
        a, b = u[i], v[i]
        if a == b:
            loops += 1
        else:
            counts[a] += 1
            counts[b] += 1
    return loops


@njit(cache=True)
def scatter_edges(u, v, w, cursor, indices, weights):
    """Write each non-loop edge into both endpoints' rows, advancing ``cursor``.

    u, v : int (e,), read. w : float32 (e,) or (0,) when unweighted, read.
    cursor : int64 (n,), the next free slot of each row, updated.
    indices : int32/int64 (nnz,), filled. weights : float32 (nnz,) or (0,), filled.
    """
    weighted = weights.shape[0] > 0
    for i in range(u.shape[0]):
        a, b = u[i], v[i]
        if a == b:
            continue
        pa, pb = cursor[a], cursor[b]
        indices[pa] = b
        indices[pb] = a
        if weighted:
            weights[pa] = w[i]
            weights[pb] = w[i]
        cursor[a] = pa + 1
        cursor[b] = pb + 1


@njit(parallel=True, cache=True)
def sort_unique_rows(indptr, indices, weights, kept):
    """Sort each row's neighbours and merge repeats in place (a repeat keeps its largest weight).

    indptr : int64 (n + 1,), read. indices : (nnz,), rewritten: row r's unique neighbours start at
    ``indptr[r]``. weights : float32 (nnz,) or (0,), rewritten alongside. kept : int64 (n,), filled
    with each row's unique count.
    """
    weighted = weights.shape[0] > 0
    for r in prange(indptr.shape[0] - 1):
        start, stop = indptr[r], indptr[r + 1]
        if stop - start == 0:
            kept[r] = 0
            continue
        row = indices[start:stop]
        order = np.argsort(row, kind="mergesort")
        cols = row[order].copy()
        if weighted:
            ws = weights[start:stop][order].copy()
        out = start
        indices[out] = cols[0]
        if weighted:
            weights[out] = ws[0]
        for j in range(1, cols.shape[0]):
            if cols[j] == indices[out]:
                if weighted and ws[j] > weights[out]:
                    weights[out] = ws[j]
                continue
            out += 1
            indices[out] = cols[j]
            if weighted:
                weights[out] = ws[j]
        kept[r] = out - start + 1


@njit(cache=True)
def compact_rows(indptr, kept, indices, weights, new_indptr):
    """Close the gaps left by merged repeats, moving rows left in order.

    indptr : int64 (n + 1,), read. kept : int64 (n,), read. indices, weights : rewritten in place.
    new_indptr : int64 (n + 1,), filled.
    """
    weighted = weights.shape[0] > 0
    new_indptr[0] = 0
    for r in range(kept.shape[0]):
        src, dst, count = indptr[r], new_indptr[r], kept[r]
        if src != dst:
            for j in range(count):
                indices[dst + j] = indices[src + j]
                if weighted:
                    weights[dst + j] = weights[src + j]
        new_indptr[r + 1] = dst + count


@njit(cache=True)
def scatter_directed(rows, cols, w, first_row, cursor, indices, weights):
    """Write directed entries ``rows[i] -> cols[i]`` of one row block into its CSR slots.

    rows, cols : int (e,), read; rows lie in ``first_row .. first_row + len(cursor)``.
    w : float32 (e,) or (0,), read. cursor : int64 (block rows,), the next free slot of each
    row relative to the block, updated. indices, weights : the block's slots, filled.
    """
    weighted = weights.shape[0] > 0
    for i in range(rows.shape[0]):
        r = rows[i] - first_row
        p = cursor[r]
        indices[p] = cols[i]
        if weighted:
            weights[p] = w[i]
        cursor[r] = p + 1


@njit(cache=True)
def count_rows(rows, first_row, counts):
    """Count the directed entries of each row of one row block.

    rows : int (e,), read; rows lie in ``first_row .. first_row + len(counts)``.
    counts : int64 (block rows,), filled (incremented).
    """
    for i in range(rows.shape[0]):
        counts[rows[i] - first_row] += 1


@njit(cache=True)
def block_bounds(counts, limit):
    """Split rows into consecutive blocks holding at most ``limit`` entries each (a row larger
    than ``limit`` gets a block of its own). counts : int32/int64 (n,), read. Returns int64 bounds."""
    bounds = [0]
    total = 0
    for r in range(counts.shape[0]):
        if total > 0 and total + counts[r] > limit:
            bounds.append(r)
            total = 0
        total += counts[r]
    bounds.append(counts.shape[0])
    return np.array(bounds, dtype=np.int64)


@njit(cache=True)
def _block_table(bounds, shift):
    """table[k] = the block holding row ``k << shift``: one look-up and a step or two finds any
    row's block (blocks are consecutive row ranges), where a binary search per entry was the
    bucketing pass's largest cost."""
    last = bounds[-1] - 1
    table = np.empty((last >> shift) + 1, dtype=np.int64)
    b = 0
    for k in range(table.shape[0]):
        while (k << shift) >= bounds[b + 1]:
            b += 1
        table[k] = b
    return table


@njit(cache=True)
def _block_of(r, bounds, table, shift):
    b = table[r >> shift]
    while r >= bounds[b + 1]:
        b += 1
    return b


@njit(cache=True)
def split_by_block(u, v, w, bounds, rows, cols, weights, cuts):
    """Both directions of each non-loop edge, grouped by the row block of their row (stable).

    u, v : int (e,), read. w : float32 (e,) or (0,) when unweighted, read.
    bounds : int64 (blocks + 1,), read; every row lies in ``bounds[0] .. bounds[-1] - 1``.
    rows, cols : int (2e,), filled. weights : float32 (2e,) or (0,), filled.
    cuts : int64 (blocks + 1,), filled: block b's entries are ``cuts[b]:cuts[b + 1]``; the
    entries past ``cuts[-1]`` (two per self loop) are unused.
    """
    weighted = weights.shape[0] > 0
    blocks = bounds.shape[0] - 1
    shift = 0
    while (bounds[-1] >> shift) > 65536:  # a table of at most 64K entries stays in cache
        shift += 1
    table = _block_table(bounds, shift)
    cuts[:] = 0
    for i in range(u.shape[0]):
        if u[i] != v[i]:
            cuts[_block_of(u[i], bounds, table, shift) + 1] += 1
            cuts[_block_of(v[i], bounds, table, shift) + 1] += 1
    for b in range(blocks):
        cuts[b + 1] += cuts[b]
    cursor = cuts[:blocks].copy()
    for i in range(u.shape[0]):
        a, c = u[i], v[i]
        if a == c:
            continue
        for r, col in ((a, c), (c, a)):
            b = _block_of(r, bounds, table, shift)
            p = cursor[b]
            rows[p] = r
            cols[p] = col
            if weighted:
                weights[p] = w[i]
            cursor[b] = p + 1
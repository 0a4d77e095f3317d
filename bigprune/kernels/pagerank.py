"""Kernels for PageRank power iteration on a symmetric CSR adjacency, one chunk of entries at a time."""
import numpy as np
from numba import njit, prange

from .prefetch import prefetch

# Entries ahead whose value the gather asks the cache for: the values are read at random, one
# cache line each. Measured on a 2M-node, 40M-entry CSR (2 threads, shared machine): the step's
# gather took about half the time with the hint (16, 32 and 64 ahead within noise of each other).
AHEAD = 32


@njit(parallel=True, cache=True)
def accumulate_rows(indptr, first, indices, weights, values, acc):
    """acc[r] += sum_e w_e * values[indices[e]] over the entries e of row r held in this chunk.

    The chunk is entries ``first .. first + len(indices)`` of the CSR; rows cut by the chunk's
    ends get their part here and the rest from the neighbouring chunk. With ``values`` empty the
    sum is of the weights alone (each row's strength, its degree when unweighted).

    indptr : int64 (n + 1,), read. first : int, the chunk's first entry.
    indices : int32/int64 (c,), read. weights : float32 (c,) or (0,) for all-ones, read.
    values : float64 (n,) or (0,), read. acc : float64 (n,), updated; each row has one writer.
    """
    count = indices.shape[0]
    if count == 0:
        return
    last = first + count
    weighted = weights.shape[0] > 0
    gather = values.shape[0] > 0
    rows = values.reshape(-1, 1)  # the prefetch hint takes a 2-D array
    r0 = np.searchsorted(indptr, first, side="right") - 1
    r1 = np.searchsorted(indptr, last - 1, side="right") - 1
    for r in prange(r0, r1 + 1):
        lo = max(indptr[r], first) - first
        hi = min(indptr[r + 1], last) - first
        total = 0.0
        for e in range(lo, hi):
            if gather and e + AHEAD < count:
                prefetch(rows, indices[e + AHEAD], 0)
            w = weights[e] if weighted else 1.0
            total += w * values[indices[e]] if gather else w
        acc[r] += total


# The vector sums (dangling mass, L1 change) add fixed blocks of rows, each in row order, then
# the blocks in order: the same float64 result whatever the thread count (a parallel reduction's
# order follows the threads), so one server at any --threads and a cluster's client agree.
SUM_BLOCKS = 256


@njit(parallel=True, cache=True)
def spread_share(x, inv_strength, share):
    """share = x * inv_strength; returns the dangling mass (x summed over rows without out-weight).

    x, inv_strength : float64 (n,), read (inv_strength 0 where a row has no out-weight).
    share : float64 (n,), filled.
    """
    n = x.shape[0]
    size = (n + SUM_BLOCKS - 1) // SUM_BLOCKS
    partial = np.zeros(SUM_BLOCKS)
    for b in prange(SUM_BLOCKS):
        total = 0.0
        for i in range(b * size, min(n, (b + 1) * size)):
            share[i] = x[i] * inv_strength[i]
            if inv_strength[i] == 0.0:
                total += x[i]
        partial[b] = total
    dangling = 0.0
    for b in range(SUM_BLOCKS):
        dangling += partial[b]
    return dangling


@njit(parallel=True, cache=True)
def finish_step(x, damping, teleport, x_new):
    """x_new = damping * x_new + teleport in place; returns the L1 change ``sum |x_new - x|``.

    x : float64 (n,), read. x_new : float64 (n,), updated (it holds the gathered sums on entry).
    """
    n = x.shape[0]
    size = (n + SUM_BLOCKS - 1) // SUM_BLOCKS
    partial = np.zeros(SUM_BLOCKS)
    for b in prange(SUM_BLOCKS):
        total = 0.0
        for j in range(b * size, min(n, (b + 1) * size)):
            value = damping * x_new[j] + teleport
            x_new[j] = value
            total += abs(value - x[j])
        partial[b] = total
    change = 0.0
    for b in range(SUM_BLOCKS):
        change += partial[b]
    return change

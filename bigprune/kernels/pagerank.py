"""Kernels for PageRank power iteration on a symmetric CSR adjacency."""
from numba import njit, prange


@njit(parallel=True, cache=True)
def row_strength(indptr, weights, strength):
    """Each row's total edge weight (its degree when unweighted).

    indptr : int64 (n + 1,), read. weights : float32 (nnz,) or (0,) for all-ones, read.
    strength : float64 (n,), filled.
    """
    weighted = weights.shape[0] > 0
    for r in prange(indptr.shape[0] - 1):
        start, stop = indptr[r], indptr[r + 1]
        if weighted:
            total = 0.0
            for e in range(start, stop):
                total += weights[e]
            strength[r] = total
        else:
            strength[r] = stop - start


@njit(parallel=True, cache=True)
def pagerank_step(indptr, indices, weights, inv_strength, x, damping, share, x_new):
    """One power-iteration step; returns the L1 change ``sum |x_new - x|``.

    x_new[j] = damping * (sum_e w_e * share[i_e] + dangling / n) + (1 - damping) / n with
    share = x * inv_strength, where the sum runs over row j (the CSR is symmetric, so row j lists
    j's in-neighbours) and ``dangling`` is the mass of rows without out-weight, spread uniformly.

    indptr : int64 (n + 1,), read. indices : int32/int64 (nnz,), read.
    weights : float32 (nnz,) or (0,) for all-ones, read. inv_strength : float64 (n,), read,
    0 where a row has no out-weight. x : float64 (n,), read. share : float64 (n,), scratch.
    x_new : float64 (n,), filled.
    """
    weighted = weights.shape[0] > 0
    n = x.shape[0]
    dangling = 0.0
    for i in prange(n):
        share[i] = x[i] * inv_strength[i]
        if inv_strength[i] == 0.0:
            dangling += x[i]
    teleport = (damping * dangling + (1.0 - damping)) / n
    change = 0.0
    for j in prange(n):
        total = 0.0
        if weighted:
            for e in range(indptr[j], indptr[j + 1]):
                total += weights[e] * share[indices[e]]
        else:
            for e in range(indptr[j], indptr[j + 1]):
                total += share[indices[e]]
        value = damping * total + teleport
        x_new[j] = value
        change += abs(value - x[j])
    return change

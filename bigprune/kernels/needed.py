"""Kernel for target-restricted hops: which rows each hop must compute."""
import numpy as np
from numba import njit


@njit(cache=True)
def spread_needed(indptr, first, indices, through, level):
    """Mark the neighbours of rows needed at hop ``level`` as needed at hop ``level - 1``.

    ``through[i]`` is the last hop at which row i must be computed; a row needed at hop k needs
    its neighbours (and itself, through the self loop) at hop k - 1. Rows raised in this call to
    ``level - 1`` do not spread further in it, so one call per level over all chunks is exact.

    indptr : int64 (n + 1,), read. first : int, the chunk's first entry.
    indices : int32/int64 (c,), entries ``first .. first + c`` of the CSR, read.
    through : int8 (n,), updated.
    """
    count = indices.shape[0]
    if count == 0:
        return
    last = first + count
    r0 = np.searchsorted(indptr, first, side="right") - 1
    r1 = np.searchsorted(indptr, last - 1, side="right") - 1
    lower = level - 1
    for r in range(r0, r1 + 1):
        if through[r] < level:
            continue
        for e in range(max(indptr[r], first) - first, min(indptr[r + 1], last) - first):
            c = indices[e]
            if through[c] < lower:
                through[c] = lower

"""Kernel for label homophily: how many labelled neighbours share a node's label."""
from numba import njit, prange


@njit(parallel=True, cache=True)
def agreement(indptr, indices, neighbour_label, missing, nodes, first, own_label, same, labelled):
    """Count, for each node, its labelled neighbours and those with the node's own label.

    indptr : int64 (w + 1,), read, CSR row pointers of rows ``first .. first + w - 1``,
    relative to the start of ``indices``. indices : int32/int64 (nnz_window,), read.
    neighbour_label : int64 (N,), read, a node's label where it counts as labelled, else ``missing``.
    nodes : int64 (q,), read, rows to count, each in ``[first, first + w)``.
    own_label : int64 (q,), read. same : int64 (q,), filled. labelled : int64 (q,), filled.
    """
    for i in prange(nodes.shape[0]):
        row = nodes[i] - first
        agree = 0
        known = 0
        for e in range(indptr[row], indptr[row + 1]):
            other = neighbour_label[indices[e]]
            if other != missing:
                known += 1
                if other == own_label[i]:
                    agree += 1
        same[i] = agree
        labelled[i] = known

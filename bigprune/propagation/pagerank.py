"""PageRank (Page et al., 1999) by power iteration over the graph stage's CSR.

The propagate stage computes it (see :mod:`bigprune.propagation.propagate`), with the CSR in memory or
streamed from its files one chunk of entries per read when it does not fit the budget (the four
float64 n-vectors stay in memory); :func:`pagerank_scores` reads it.
Dangling rows (isolated nodes, or rows whose weights sum to zero) spread their mass uniformly and
teleporting is uniform, as in ``networkx.pagerank``. The stopping rule differs on purpose:
networkx stops when ``sum |x - x_last| < n * tol``, which for millions of nodes stops before the
first step has settled; here the L1 change itself must fall below ``TOL``. Scores sum to 1, and
the error left after stopping is at most ``TOL * DAMPING / (1 - DAMPING)`` in L1.
"""
import numpy as np

from ..kernels.pagerank import accumulate_rows, finish_step, spread_share
from ..common.runtime import progress
from ..common.store import Store

DAMPING = 0.85
TOL = 1e-9
MAX_ITER = 1000


def pagerank_scores(store):
    """The committed PageRank scores, float64 (n,), memory-mapped read-only.

    Parameters
    ----------
    store : str, Path or Store
    """
    store = store if isinstance(store, Store) else Store(store)
    return store.load("propagate", "pagerank")


def power_iteration(indptr, chunks, damping=DAMPING, tol=TOL, max_iter=MAX_ITER):
    """PageRank of a symmetric CSR adjacency whose entries arrive in chunks.

    Parameters
    ----------
    indptr : int64 (n + 1,)
    chunks : callable returning an iterator of ``(first entry, indices, weights)``, each step
        calling it once (see :func:`bigprune.common.arrayfile.edge_chunks`: the whole CSR in memory as
        one chunk, or streamed from its files); ``weights`` is (0,) for an unweighted graph.
    damping, tol, max_iter : the damping factor, the L1 change to stop at, the step limit

    Returns
    -------
    scores : float64 (n,), summing to 1
    steps : int, the steps taken
    change : float, the L1 change of the last step (``>= tol`` only if ``max_iter`` ran out)
    """
    none = np.zeros(0)
    strength = np.zeros(indptr.shape[0] - 1)
    for first, indices, weights in chunks():
        accumulate_rows(indptr, first, indices, weights, none, strength)

    def gather(share, out):
        out[:] = 0.0
        for first, indices, weights in chunks():
            accumulate_rows(indptr, first, indices, weights, share, out)

    return iterate(strength, gather, damping, tol, max_iter)


def iterate(strength, gather, damping=DAMPING, tol=TOL, max_iter=MAX_ITER):
    """The power iteration itself, given each row's strength and the sparse product.

    strength : float64 (n,), each row's summed weights; overwritten (it becomes their inverse).
    gather : callable ``gather(share, out)`` filling float64 ``out`` (n,) with ``A @ share``,
        each row summed as :func:`power_iteration` sums it.
    Returns what :func:`power_iteration` returns.
    """
    n = strength.shape[0]
    inv_strength = strength
    np.divide(1.0, inv_strength, out=inv_strength, where=inv_strength > 0)
    x = np.full(n, 1.0 / max(n, 1))
    x_new, share = np.empty(n), np.empty(n)
    change, steps = (np.inf if n else 0.0), 0
    with progress(desc="pagerank", unit="step") as bar:
        while steps < max_iter and change >= tol:
            dangling = spread_share(x, inv_strength, share)
            gather(share, x_new)
            teleport = (damping * dangling + (1.0 - damping)) / max(n, 1)
            change = finish_step(x, damping, teleport, x_new)
            x, x_new = x_new, x
            steps += 1
            bar.update(1)
            bar.set_postfix_str(f"change {change:.1e}")
    return x, steps, float(change)

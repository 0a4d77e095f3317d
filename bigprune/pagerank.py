"""PageRank (Page et al., 1999) by power iteration over the graph stage's CSR.

The propagate stage computes it (see :mod:`bigprune.propagate`); :func:`pagerank_scores` reads it.
Dangling rows (isolated nodes, or rows whose weights sum to zero) spread their mass uniformly and
teleporting is uniform, as in ``networkx.pagerank``. The stopping rule differs on purpose:
networkx stops when ``sum |x - x_last| < n * tol``, which for millions of nodes stops before the
first step has settled; here the L1 change itself must fall below ``TOL``. Scores sum to 1, and
the error left after stopping is at most ``TOL * DAMPING / (1 - DAMPING)`` in L1.
"""
import numpy as np

from .kernels.pagerank import pagerank_step, row_strength
from .runtime import progress
from .store import Store

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


def power_iteration(indptr, indices, weights, damping=DAMPING, tol=TOL, max_iter=MAX_ITER):
    """PageRank of a symmetric CSR adjacency.

    Parameters
    ----------
    indptr : int64 (n + 1,)
    indices : int32 or int64 (nnz,)
    weights : float32 (nnz,), or (0,) for an unweighted graph
    damping, tol, max_iter : the damping factor, the L1 change to stop at, the step limit

    Returns
    -------
    scores : float64 (n,), summing to 1
    steps : int, the steps taken
    change : float, the L1 change of the last step (``>= tol`` only if ``max_iter`` ran out)
    """
    n = indptr.shape[0] - 1
    strength = np.empty(n, dtype=np.float64)
    row_strength(indptr, weights, strength)
    inv_strength = np.divide(1.0, strength, out=np.zeros(n), where=strength > 0)
    del strength
    x = np.full(n, 1.0 / max(n, 1))
    x_new, share = np.empty(n), np.empty(n)
    change, steps = (np.inf if n else 0.0), 0
    with progress(desc="pagerank", unit="step") as bar:
        while steps < max_iter and change >= tol:
            change = pagerank_step(indptr, indices, weights, inv_strength, x, damping, share, x_new)
            x, x_new = x_new, x
            steps += 1
            bar.update(1)
            bar.set_postfix_str(f"change {change:.1e}")
    return x, steps, float(change)

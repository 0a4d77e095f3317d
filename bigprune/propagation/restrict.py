"""Target-restricted hops: the rows each hop must compute so that later stages lose nothing.

The select stage reads the training pool and the target rows of one hop, and the proxy model
the pool and validation rows. So the rows needed at the last hop K are the labelled training
pool, the validation split and the test split; a row needed at hop k needs its neighbours and
itself at hop k - 1 (the self loop of ``Â``). The needed sets shrink as k grows, so one int8
per row says it all: ``through[i]`` is the last hop at which row i is computed (0: only the
input features). Rows not computed at a hop hold NaN there; ``through`` is committed as
``computed_through.npy``. Nodes without a split (``--targets unlabeled``) are not kept.
"""
import numpy as np

from ..common.arrayfile import NpyFile
from ..kernels.needed import spread_needed
from ..common.schema import NO_LABEL, SPLIT_CODES

WINDOW_ROWS = 1 << 16  # rows of split and label read at a time


def needed_through(graph, hops, indptr, chunks):
    """The last hop each row must be computed at, int8 (n,).

    graph : the graph stage's directory. hops : int, 1 to 127. indptr : int64 (n + 1,).
    chunks : the CSR's entries, see :func:`bigprune.common.arrayfile.edge_chunks`.
    """
    n = indptr.shape[0] - 1
    through = np.zeros(n, dtype=np.int8)
    with NpyFile(graph / "split.npy") as split, NpyFile(graph / "label.npy") as label:
        for start in range(0, n, WINDOW_ROWS):
            stop = min(n, start + WINDOW_ROWS)
            s, y = split.read(start, stop), label.read(start, stop)
            keep = ((s == SPLIT_CODES["train"]) & (y != NO_LABEL)) | (s == SPLIT_CODES["valid"]) \
                | (s == SPLIT_CODES["test"])
            through[start:stop][keep] = hops
    for level in range(hops, 1, -1):
        for first, indices, _ in chunks():
            spread_needed(indptr, first, indices, through, level)
    return through


def skipped_per_hop(through, hops):
    """Rows left uncomputed at hops 1..K, as a list of ints."""
    counts = np.bincount(through, minlength=hops + 1)
    return [int(counts[:k].sum()) for k in range(1, hops + 1)]

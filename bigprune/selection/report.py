"""The selection report: coverage of the targets, load, classes and graph diagnostics."""
import numpy as np

from ..kernels.homophily import agreement
from ..common.memory import chunk_ranges
from ..common.schema import NO_LABEL, SPLIT_CODES

CAUTION = ("A pruned training set can serve small classes and sub-groups worse than the full "
           "pool: check per-class and per-group accuracy before deploying a model trained on it.")
QUANTILES = {"p50": 0.5, "p90": 0.9, "p99": 0.99}


def coverage(dist, assign, k, asked=None):
    """Coverage and load of the selection.

    dist : float64 (m,), each target's L2 distance to its nearest selected node.
    assign : int64 (m,), that node's rank. k : int, selected count.
    asked : float or None, the radius ``--radius`` asked for.
    The radius (the largest distance) can be set by a few outlying targets: ``within`` gives
    the share of targets at most the radius, the p90 and the p99 distance (and ``asked``) away.
    """
    load = np.bincount(assign, minlength=k)
    cover = {"radius": float(dist.max()), "mean": float(dist.mean())}
    cover.update({name: float(np.quantile(dist, q)) for name, q in QUANTILES.items()})
    limits = {"radius": cover["radius"], "p90": cover["p90"], "p99": cover["p99"]}
    if asked is not None:
        limits["asked"] = float(asked)
    cover["within"] = {name: float(np.mean(dist <= r)) for name, r in limits.items()}
    return {"coverage": cover, "load": {"max": int(load.max()), "mean": float(load.mean())}}


def class_counts(labels):
    """``{label: count}`` with string keys (JSON objects need them), in label order."""
    values, counts = np.unique(labels, return_counts=True)
    return {str(int(v)): int(c) for v, c in zip(values, counts)}


def changes(selected, included):
    """How the selection relates to the include list: ``{kept, added, dropped}`` node counts."""
    kept = int(np.isin(included, selected).sum())
    return {"kept": kept, "added": int(len(selected)) - kept, "dropped": int(len(included)) - kept}


def node_homophily(store, nodes, window_rows):
    """Each node's label homophily, float64 (len(nodes),) for ``nodes`` (sorted int64 dense
    indices): the share of its labelled neighbours (split train or valid, with a label) that
    carry its own label; NaN for a node with no labelled neighbour. The CSR is read one window
    of rows at a time, once."""
    split = store.load("graph", "split", mmap=False)
    label = store.load("graph", "label", mmap=False)
    known = np.isin(split, [SPLIT_CODES["train"], SPLIT_CODES["valid"]]) & (label != NO_LABEL)
    neighbour_label = np.where(known, label, NO_LABEL).astype(np.int64)
    indptr = store.load("graph", "indptr", mmap=False)
    out = np.full(len(nodes), np.nan)
    starts = [a for a, _ in chunk_ranges(len(indptr) - 1, window_rows)]
    cuts = list(np.searchsorted(nodes, starts)) + [len(nodes)]
    for first, lo, hi in zip(starts, cuts[:-1], cuts[1:]):
        if hi == lo:
            continue
        part = nodes[lo:hi]
        last = int(part[-1]) + 1
        indices = store.load("graph", "indices")
        window = np.array(indices[indptr[first]:indptr[last]])
        del indices
        same = np.empty(len(part), dtype=np.int64)
        labelled = np.empty(len(part), dtype=np.int64)
        agreement(indptr[first:last + 1] - indptr[first], window, neighbour_label, NO_LABEL,
                  part, first, label[part], same, labelled)
        seen = labelled > 0
        out[lo:hi][seen] = same[seen] / labelled[seen]
    return out


def homophily(store, nodes, window_rows):
    """Mean label homophily of ``nodes`` (sorted int64 dense indices) over those with at least
    one labelled neighbour (:func:`node_homophily`); None when there is none."""
    return _mean_seen(node_homophily(store, nodes, window_rows))


def diagnostics(describe, selected, pool):
    """Mean degree, PageRank and homophily of the selection beside the whole pool.

    describe : a :func:`describer` of the pool."""
    return {"selected": describe(selected), "pool": describe(pool)}


def ranking_profile(describe, ranking, pool, parts=5):
    """What a ranking rule prefers: mean degree, PageRank and homophily of each of ``parts``
    consecutive slices of ``ranking`` (pool nodes, best first; slices differ in size by at
    most one node, as ``numpy.array_split``), beside the whole pool (``describe``: a
    :func:`describer` of the pool)."""
    slices = np.array_split(np.asarray(ranking, dtype=np.int64), parts)
    shares, at = [], 0
    for part in slices:
        shares.append({"from": at / len(ranking), "to": (at + len(part)) / len(ranking),
                       "nodes": int(len(part)), **describe(part)})
        at += len(part)
    return {"parts": shares, "pool": describe(pool)}


def describer(store, pool, window_rows):
    """A function: nodes of ``pool`` -> their mean degree, PageRank and homophily. Every pool
    node's homophily is computed once (one pass over the CSR) and averaged per call."""
    pool = np.sort(pool)
    degree = np.diff(store.load("graph", "indptr", mmap=False))
    rank = store.load("propagate", "pagerank", mmap=False)
    values = node_homophily(store, pool, window_rows)

    def describe(nodes):
        nodes = np.sort(nodes)
        return {"degree": float(degree[nodes].mean()), "pagerank": float(rank[nodes].mean()),
                "homophily": _mean_seen(values[np.searchsorted(pool, nodes)])}

    return describe


def _mean_seen(values):
    seen = ~np.isnan(values)
    return float(values[seen].mean()) if seen.any() else None

"""``kmeans``: k-means over the targets, then the nearest pool node to each centroid.

The targets' rows are clustered with FAISS k-means into one cluster per free pick; clusters are
served largest first, each by its nearest candidate not yet chosen (exact: a flat search). With
more picks than targets, the clusters are served again in the same order, each by its next
nearest candidate. Once the picks left equal the picks the class quotas still need, a cluster
is served by its nearest candidate of a class still short.
"""
import faiss
import numpy as np

from ..common.memory import chunk_ranges
from ..common.runtime import progress

# FAISS k-means rounds, and the training rows it keeps per centroid (its own default is 256).
ROUNDS = 20
ROWS_PER_CENTROID = 256
# Neighbours fetched per centroid in the first search; a centroid whose neighbours are all taken
# is searched again with FETCH_GROWTH times as many.
FIRST_FETCH = 16
FETCH_GROWTH = 4


def clusters(read_targets, targets, count, width, seed, sample_rows, chunk_rows):
    """FAISS k-means with ``count`` centroids over at most ``sample_rows`` targets (a seeded
    sample), then every target assigned in chunks. Returns (centroids float32 (count, d),
    sizes int64 (count,))."""
    rng = np.random.default_rng(seed)
    keep = min(targets, max(count, min(sample_rows, ROWS_PER_CENTROID * count)))
    sample = np.arange(targets) if keep == targets else np.sort(rng.choice(targets, keep, replace=False))
    train = np.concatenate([read_targets(sample[a:b]) for a, b in chunk_ranges(keep, chunk_rows)])
    kmeans = faiss.Kmeans(width, count, niter=ROUNDS, seed=int(seed) % (2**31), verbose=False,
                          min_points_per_centroid=1, max_points_per_centroid=ROWS_PER_CENTROID)
    kmeans.train(np.ascontiguousarray(train, dtype=np.float32))
    del train
    sizes = np.zeros(count, dtype=np.int64)
    with progress(total=targets, desc="kmeans assign", unit="target") as bar:
        for start, stop in chunk_ranges(targets, chunk_rows):
            nearest = kmeans.index.search(read_targets(np.arange(start, stop)), 1)[1][:, 0]
            sizes += np.bincount(nearest, minlength=count)
            bar.update(stop - start)
    return kmeans.centroids.copy(), sizes


def serve(candidates, centroids, sizes, initial, klass, deficit, picks):
    """Pick ``picks`` candidates after ``initial``: each cluster (largest first, rounds until
    done) takes its nearest candidate not yet chosen.

    candidates : float32 (n, d). klass : int64 (n,), class index per candidate; deficit :
    int64 (classes,), picks each class still needs after ``initial``. Returns int64 order.
    """
    n = len(candidates)
    index = faiss.IndexFlatL2(candidates.shape[1])
    index.add(np.ascontiguousarray(candidates))
    queue = np.argsort(-sizes, kind="stable")
    fetch = min(n, FIRST_FETCH + len(initial))
    lists = list(index.search(np.ascontiguousarray(centroids[queue]), fetch)[1])
    walked = np.zeros(len(queue), dtype=np.int64)  # each list's prefix known to be taken
    taken = np.zeros(n, dtype=bool)
    taken[initial] = True
    deficit = deficit.copy()
    short = int(np.maximum(deficit, 0).sum())
    order = list(np.asarray(initial, dtype=np.int64))
    with progress(total=picks, desc="kmeans picks", unit="pick") as bar:
        while len(order) - len(initial) < picks:
            for at, cluster in enumerate(queue):
                left = picks - (len(order) - len(initial))
                if left == 0:
                    break
                wanted = deficit > 0 if left <= short else None
                c = _next_free(index, centroids[cluster], lists, at, walked, taken, klass, wanted)
                taken[c] = True
                order.append(c)
                short -= int(deficit[klass[c]] > 0)
                deficit[klass[c]] -= 1
                bar.update(1)
    return np.asarray(order, dtype=np.int64)


def _next_free(index, centroid, lists, at, walked, taken, klass, wanted):
    """The nearest candidate to ``centroid`` not taken, of a ``wanted`` class (bool per class)
    when given; the cluster's list ``lists[at]`` is fetched again, longer, when it runs out."""
    while True:
        row = lists[at]
        for j in range(walked[at], len(row)):
            c = int(row[j])
            if taken[c]:
                walked[at] += int(j == walked[at])
                continue
            if wanted is None or wanted[klass[c]]:
                return c
        if len(row) == index.ntotal:  # callers ask for no more picks than there are candidates
            raise RuntimeError("kmeans: no candidate left to serve a cluster")
        more = min(index.ntotal, FETCH_GROWTH * len(row))
        lists[at] = index.search(np.ascontiguousarray(centroid[None, :]), more)[1][0]

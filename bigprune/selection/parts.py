"""Targets split into parts for select through a cluster: FAISS k-means over a seeded sample of
the target rows, then each target in the part of its nearest centroid (read in chunks)."""
import faiss
import numpy as np

from ..common.memory import chunk_ranges

# Parts per worker: two keep every worker busy while the larger parts finish.
PARTS_PER_WORKER = 2
# Target rows sampled per part to train the centroids, and k-means rounds.
SAMPLE_PER_PART = 1024
ROUNDS = 20
# The parts do not depend on --seed, so that kcenter and kmedian stay seed-free (the study runs
# them once per budget).
PARTS_SEED = 0


def count_parts(workers, targets, picks):
    """Parts for ``workers``: two per worker, at least 2, at most ``targets // picks`` (a part
    gets the whole budget, so fewer targets than picks would waste its picks), never more
    than ``targets``."""
    return int(min(targets, max(2, min(PARTS_PER_WORKER * workers, targets // max(picks, 1)))))


def split_targets(read_targets, targets, width, parts, chunk_rows):
    """Each target's part, int32 (targets,) in ``[0, parts)``.

    read_targets(positions) : float32 rows of the targets at sorted ``positions``. The
    centroids are trained on at most ``SAMPLE_PER_PART * parts`` rows; all rows are then read
    ``chunk_rows`` at a time to assign them.
    """
    rng = np.random.default_rng(PARTS_SEED)
    keep = min(targets, SAMPLE_PER_PART * parts)
    sample = np.arange(targets) if keep == targets else np.sort(rng.choice(targets, keep, replace=False))
    train = np.concatenate([read_targets(sample[a:b]) for a, b in chunk_ranges(keep, chunk_rows)])
    kmeans = faiss.Kmeans(width, parts, niter=ROUNDS, seed=PARTS_SEED, verbose=False,
                          min_points_per_centroid=1, max_points_per_centroid=SAMPLE_PER_PART)
    kmeans.train(np.ascontiguousarray(train, dtype=np.float32))
    del train
    part = np.empty(targets, dtype=np.int32)
    for start, stop in chunk_ranges(targets, chunk_rows):
        rows = np.ascontiguousarray(read_targets(np.arange(start, stop)), dtype=np.float32)
        part[start:stop] = kmeans.index.search(rows, 1)[1][:, 0]
    return part

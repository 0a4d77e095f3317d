"""The greedy's target side: targets sorted into groups, brought up to date with new centres lazily.

Targets are grouped by k-means (groups of at most ``GROUP_ROWS``), and a new centre is only
queued: a group catches up when its upper bound could be the farthest target or the radius
(usually 2-3 groups per pick), and all of them at the end. Catching up on a few centres skips
the groups and the single targets that the triangle inequality rules out; on many centres a
float32 FAISS product screens them and only those that can win are measured exactly. Every
distance that decides anything is exact float64, so none of this changes the result.
Targets whose rows do not fit the budget stay on disk (:class:`RowChunks`): a copy sorted by
group is written once to a scratch file and groups are read back with ``pread``.
"""
import math
import os

import faiss
import numpy as np

from ..common.arrayfile import NpyFile
from ..kernels import kcenter as kern
from ..common.memory import chunk_ranges

# Largest group of targets kept in memory (bounds a product block's rows).
GROUP_ROWS = 4096
# A group catches up on at most this many centres one at a time; beyond, a product screens them
# (measured on the 2M-node scenario: one centre at a time costs ~1 us per target and centre).
SCALAR_MAX = 8
# float32 entries of one product block (8 MiB).
PRODUCT_ITEMS = 1 << 21


class RowChunks:
    """Target rows that stay on disk: the greedy reads them ``chunk_rows`` at a time, keeps a
    copy sorted by group in the directory ``scratch`` and reads it back one group at a time.

    shape : (m, d). take : callable, sorted int64 positions -> float32 rows.
    group_rows : int, largest group read at once.
    """

    def __init__(self, shape, take, chunk_rows, scratch, group_rows):
        self.shape, self.take = tuple(shape), take
        self.chunk_rows, self.scratch, self.group_rows = int(chunk_rows), scratch, int(group_rows)

    def chunks(self):
        """(first position, float32 rows) over all rows, in order."""
        for lo, hi in chunk_ranges(self.shape[0], self.chunk_rows):
            yield lo, np.ascontiguousarray(self.take(np.arange(lo, hi, dtype=np.int64)), dtype=np.float32)


class TargetGroups:
    """Targets sorted into groups (k-means clusters, split to at most ``group_rows``), with the
    per-group bounds the kernels use, brought up to date lazily.

    Centres are queued, not applied: a group catches up on the centres it has not seen only
    when it is read (its maximum could be the farthest target or the radius) or at the end.
    A group's stale maximum is an upper bound (distances only fall), so the farthest target is
    found by refreshing the groups whose bound is the largest until the largest is current.
    """

    def __init__(self, source, seed):
        on_disk = isinstance(source, RowChunks)
        m, d = source.shape
        chunks = source.chunks if on_disk else (lambda: iter([(0, source)]))
        clusters = max(1, min(m, int(round(math.sqrt(m)))))
        labels = np.zeros(m, dtype=np.int64)
        if clusters > 1:
            kmeans = faiss.Kmeans(d, clusters, niter=10, seed=int(seed) % (2**31), verbose=False,
                                  max_points_per_centroid=128, min_points_per_centroid=1)
            if on_disk:  # k-means trains on 128 points per cluster at most anyway
                rng = np.random.default_rng(seed)
                kmeans.train(source.take(np.sort(rng.choice(m, size=min(m, 128 * clusters), replace=False))))
            else:
                kmeans.train(source)
            centres = kmeans.centroids.astype(np.float64)
            for start, rows in chunks():
                labels[start:start + len(rows)] = kmeans.index.search(rows, 1)[1][:, 0]
        else:
            total = np.zeros(d)
            for _, rows in chunks():
                total += rows.sum(axis=0, dtype=np.float64)
            centres = (total / m)[None, :]
        raw = np.empty(m, dtype=np.float64)
        for start, rows in chunks():
            kern.distances_to(rows, centres, labels[start:start + len(rows)], raw[start:start + len(rows)])
        self.order = np.argsort(labels, kind="stable").astype(np.int64)
        self.position = np.empty(m, dtype=np.int64)
        self.position[self.order] = np.arange(m)
        sizes = np.bincount(labels, minlength=clusters)
        del labels
        self.offsets, owner = _split(sizes, source.group_rows if on_disk else GROUP_ROWS)
        self.mus = np.ascontiguousarray(centres[owner])
        self.to_centre = raw[self.order]
        del raw
        self.radius = np.maximum.reduceat(self.to_centre, self.offsets[:-1])
        self.file = self.points = None
        if on_disk:
            self.file = _sorted_copy(source, chunks, self.position)
            self.buffer = np.empty((int(np.diff(self.offsets).max()), d), dtype=np.float32)
        else:
            self.points = np.ascontiguousarray(source[self.order])
        self.dist = np.full(m, np.inf)
        self.assign = np.full(m, -1, dtype=np.int64)
        self.active = np.ones(m, dtype=np.uint8)
        groups = len(self.offsets) - 1
        self.top_all = np.full(groups, np.inf)
        self.top_active = self.top_all.copy()
        self.top_index = self.order[self.offsets[:-1]].copy()  # lowest index: groups keep order
        self.seen = np.zeros(groups, dtype=np.int64)
        self.picks = np.empty((64, d), dtype=np.float32)
        self.pick_norms = np.empty(64)
        self.slots = np.empty(64, dtype=np.int64)
        self.count = 0
        self.tol = 4.0 * (d + 4) * 2.0 ** -24  # twice gamma_(d+4) for float32
        self.exact = self.screened = self.refreshes = self.bytes_read = 0

    def close(self):
        if self.file is not None:
            self.file.close()
            os.unlink(self.file.path)
            self.file = None

    def add(self, centre, slot):
        """Queue the candidate ``centre`` (float32 (d,)), which took ``slot`` in the selection."""
        if self.count == len(self.slots):
            grow = 2 * self.count
            self.picks = np.concatenate([self.picks, np.empty_like(self.picks)])[:grow]
            self.pick_norms = np.concatenate([self.pick_norms, np.empty(self.count)])
            self.slots = np.concatenate([self.slots, np.empty(self.count, dtype=np.int64)])
        self.picks[self.count] = centre
        kern.squared_norms(self.picks[self.count:self.count + 1], self.pick_norms[self.count:self.count + 1])
        self.slots[self.count] = slot
        self.count += 1

    def _rows(self, g):
        lo, hi = self.offsets[g], self.offsets[g + 1]
        if self.file is None:
            return self.points[lo:hi]
        self.bytes_read += (hi - lo) * self.buffer.shape[1] * 4
        return self.file.read_into(lo, self.buffer[:hi - lo])

    def _refresh(self, g):
        """Bring group ``g`` up to date with every queued centre, then its maxima."""
        first, count = int(self.seen[g]), self.count
        lo, hi = self.offsets[g], self.offsets[g + 1]
        if first < count:
            self.refreshes += 1
            block = self._rows(g)
            rows, slots = self.picks[first:count], self.slots[first:count]
            dist, assign = self.dist[lo:hi], self.assign[lo:hi]
            if count - first <= SCALAR_MAX:
                self.exact += kern.apply_centres(block, self.to_centre[lo:hi], self.mus[g],
                                                 self.radius[g], self.top_all[g], rows, slots, dist, assign)
            else:
                gaps = np.empty(count - first)
                kern.gaps_to(rows, self.mus[g], gaps)
                keep = np.flatnonzero(gaps - self.radius[g] < self.top_all[g])
                tnorm = np.empty(hi - lo)
                kern.squared_norms(block, tnorm)
                step = max(1, PRODUCT_ITEMS // (hi - lo))
                for a in range(0, len(keep), step):
                    part = keep[a:a + step]
                    chosen = np.ascontiguousarray(rows[part])
                    approx = faiss.pairwise_distances(block, chosen)
                    self.exact += kern.screen_centres(block, approx, tnorm, self.pick_norms[first + part],
                                                      chosen, slots[part], self.tol, dist, assign)
                    self.screened += approx.size
            self.seen[g] = count
        self._tops(g)

    def _tops(self, g):
        lo, hi = self.offsets[g], self.offsets[g + 1]
        self.top_all[g], self.top_active[g], self.top_index[g] = kern.group_tops(
            self.dist[lo:hi], self.active[lo:hi], self.order[lo:hi])

    def farthest(self):
        """(target, distance) of the farthest active target, lowest index on ties; (-1, -1)."""
        while True:
            best = self.top_active.max()
            if best < 0:
                return -1, -1.0
            tied = np.flatnonzero(self.top_active == best)
            stale = tied[self.seen[tied] < self.count]
            if len(stale) == 0:
                return int(self.top_index[tied].min()), float(best)
            for g in stale:
                self._refresh(g)

    def radius_now(self):
        """The largest distance of any target to the centres so far."""
        while True:
            g = int(np.argmax(self.top_all))
            if self.seen[g] >= self.count:
                return float(self.top_all[g])
            self._refresh(g)

    def count_within(self, r):
        """How many targets lie within ``r`` of the centres so far (exact: a group whose
        stale maximum exceeds ``r`` is brought up to date first)."""
        total = 0
        for g in range(len(self.seen)):
            lo, hi = self.offsets[g], self.offsets[g + 1]
            if self.top_all[g] <= r:  # an upper bound: distances only fall
                total += int(hi - lo)
                continue
            if self.seen[g] < self.count:
                self._refresh(g)
            total += int(np.count_nonzero(self.dist[lo:hi] <= r))
        return total

    def start_from(self, dist, assign):
        """Targets start at ``dist`` / ``assign`` ((m,), caller's order), not infinity."""
        self.dist[:] = dist[self.order]
        self.assign[:] = assign[self.order]
        self.seen[:] = self.count
        for g in range(len(self.seen)):
            self._tops(g)

    def _groups_of(self, positions):
        return np.unique(np.searchsorted(self.offsets, positions, side="right") - 1)

    def deactivate(self, targets):
        """Keep ``targets`` (int64 array) out of the farthest search from the start."""
        self.active[self.position[targets]] = 0
        for g in self._groups_of(self.position[targets]):
            self._tops(g)

    def set_aside(self, target):
        pos = self.position[target]
        self.active[pos] = 0
        self._tops(int(np.searchsorted(self.offsets, pos, side="right") - 1))

    def row(self, target):
        pos = int(self.position[target])
        if self.file is None:
            return self.points[pos]
        return self.file.read(pos, pos + 1)[0]

    def sample(self, size, seed):
        """float32 rows of up to ``size`` random targets (for tuning the index)."""
        m = len(self.dist)
        pick = self.position[np.sort(np.random.default_rng(seed).choice(m, size=min(m, size), replace=False))]
        if self.file is None:
            return self.points[pick]
        return np.stack([self.file.read(int(p), int(p) + 1)[0] for p in pick])

    def result(self):
        """dist and assign in the caller's target order, every group up to date."""
        for g in range(len(self.seen)):
            self._refresh(g)
        return self.dist[self.position], self.assign[self.position]

    def stats(self):
        pairs = max(1, self.count * len(self.dist))
        out = {"clusters": len(self.seen), "skipped": max(0.0, 1.0 - (self.exact + self.screened) / pairs),
               "exact_share": self.exact / pairs, "refreshes": self.refreshes}
        if self.file is not None or self.bytes_read:
            out["target_bytes_read"] = int(self.bytes_read)
        return out


def _split(sizes, group_rows):
    """Group offsets (int64 (G + 1,)) cutting each cluster of ``sizes`` into near-equal pieces of
    at most ``group_rows``, and each group's cluster (int64 (G,)); empty clusters get none."""
    cuts, owner, start = [0], [], 0
    for c, size in enumerate(sizes.tolist()):
        pieces = -(-size // group_rows)
        for i in range(1, pieces + 1):
            cuts.append(start + (size * i) // pieces)
            owner.append(c)
        start += size
    return np.asarray(cuts, dtype=np.int64), np.asarray(owner, dtype=np.int64)


def _sorted_copy(source, chunks, position):
    """Write the rows of ``source`` in group order to a scratch ``.npy``; returns it open."""
    m, d = source.shape
    path = os.path.join(source.scratch, f"targets-{os.getpid()}-{id(source):x}.npy")
    mapped = np.lib.format.open_memmap(path, mode="w+", dtype=np.float32, shape=(m, d))
    del mapped  # written with pwrite only: no page of it enters RSS
    out = NpyFile(path, writable=True)
    for start, rows in chunks():
        dest = position[start:start + len(rows)]
        by = np.argsort(dest, kind="stable")
        dest, rows = dest[by], rows[by]
        breaks = np.flatnonzero(np.diff(dest) != 1) + 1
        for a, b in zip([0, *breaks.tolist()], [*breaks.tolist(), len(dest)]):
            out.write(int(dest[a]), rows[a:b])
    return out

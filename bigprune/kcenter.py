"""The pruned greedy behind ``kcenter`` (k-supplier) and ``kcenter-pool`` (farthest-first).

k-supplier (Hochbaum & Shmoys, 1986): repeat until ``k`` are chosen: take the target farthest
from the chosen set, choose the candidate nearest to it, lower every target's distance. The
nearest-candidate query is exact (a flat scan, or IVF with certified rescans, see
:class:`Nearest`), so the radius is at most 3x the optimum. Farthest-first over the pool
itself (Gonzalez, 1985) is the same loop with targets = candidates and "nearest candidate of a
target" = the target itself, a 2-approximation of k-center.

Speed: targets are grouped by k-means (groups of at most ``GROUP_ROWS``), and a new centre is
only queued: a group catches up when its upper bound could be the farthest target or the radius
(usually 2-3 groups per pick), and all of them at the end. Catching up on a few centres skips
the groups and the single targets that the triangle inequality rules out; on many centres a
float32 FAISS product screens them and only those that can win are measured exactly. Every
distance that decides anything is exact float64, so none of this changes the result; on noisy
features, where distances concentrate and the triangle inequality prunes ~10%, the queue is
what saves the work (2M-node scenario: select 25.0 s -> 3.1 s, the same selection).
Targets whose rows do not fit the budget stay on disk (:class:`RowChunks`): a copy sorted by
group is written once to a scratch file and groups are read back with ``pread``.

Set-aside rule: once a target has been served (its nearest candidate is chosen) it cannot get
closer with an exact query, so it leaves the farthest search; its distance is still kept up to
date for the report. If every target is set aside (or covered at distance 0) before ``k`` picks,
the remaining picks continue farthest-first over the candidates, starting from the chosen set.
"""
import math
import os
from contextlib import contextmanager
from dataclasses import dataclass, field

import faiss
import numpy as np

from .arrayfile import NpyFile
from .kernels import kcenter as kern
from .memory import chunk_ranges
from .runtime import progress

# Pools up to this size are searched exactly (one flat scan per query is cheap there).
FLAT_MAX = 50_000
# nprobe grows until the first IVF pass is exact for this share of hard sampled targets.
RECALL_GOAL = 0.99
RECALL_SAMPLE = 512
# Relative slack on float32 distances from FAISS when deciding which IVF lists to rescan.
SLACK = 1e-4
# A flat scan replaces IVF when the hard sampled queries rescan more than this share of lists.
FLAT_SHARE = 0.5
# Largest group of targets kept in memory (bounds a product block's rows).
GROUP_ROWS = 4096
# A group catches up on at most this many centres one at a time; beyond, a product screens them
# (measured on the 2M-node scenario: one centre at a time costs ~1 us per target and centre).
SCALAR_MAX = 8
# float32 entries of one product block (8 MiB).
PRODUCT_ITEMS = 1 << 21


@dataclass
class Outcome:
    """What the greedy returns.

    order : int64 (k,), chosen candidate rows, in the order they were chosen (fewer in radius
        mode).
    dist : float64 (m,), each target's L2 distance to its nearest chosen candidate.
    assign : int64 (m,), position in ``order`` of that candidate.
    trace : float64 (len(order),), the radius (max of ``dist``) after each pick (NaN for
        initial picks given with their coverage, ``covered``, but the last).
    stats : dict, JSON-ready counters (index kind, recall, share of updates skipped, ...).
    """

    order: np.ndarray
    dist: np.ndarray
    assign: np.ndarray
    trace: np.ndarray
    stats: dict = field(default_factory=dict)


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


class _Targets:
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


class Nearest:
    """Exact nearest-candidate queries: a flat scan for small pools, a certified IVF above.

    IVF answers from the ``nprobe`` closest lists first; then every list that could still hold
    a closer candidate (``||q - centre|| - reach < best``, where ``reach`` is the farthest member
    from the list centre) is scanned too, so the answer is exact. The farthest targets the
    greedy asks about are outliers, exactly where plain IVF misses: one miss on the last
    uncovered target sets the radius (measured: +19% at n = 100k).
    ``nlist`` defaults to ~sqrt(n): on 1M x 64 (2 shared cores), 4*sqrt(n) lists took ~6x
    longer to train and fill than sqrt(n) lists.
    """

    def __init__(self, candidates, queries, exact=False, seed=0, nlist=None):
        n, d = candidates.shape
        self.stats = {"index": "flat", "recall": 1.0}
        self.scanned = self.queries = 0
        if exact or n <= FLAT_MAX:
            self.index = faiss.IndexFlatL2(d)
            self.index.add(candidates)
            return
        rng = np.random.default_rng(seed)
        nlist = int(nlist or max(16, round(math.sqrt(n))))
        self.quantizer = faiss.IndexFlatL2(d)
        self.index = faiss.IndexIVFFlat(self.quantizer, d, nlist)
        self.index.cp.min_points_per_centroid = 1
        self.index.cp.seed = int(seed) % (2**31)
        sample = np.sort(rng.choice(n, size=min(n, 32 * nlist), replace=False))
        self.index.train(candidates[sample])
        self.centres = self.quantizer.reconstruct_n(0, nlist).astype(np.float64)
        self.reach = np.zeros(nlist)
        for start in range(0, n, 1 << 16):
            chunk = np.ascontiguousarray(candidates[start:start + (1 << 16)])
            gap, lists = self.quantizer.search(chunk, 1)
            self.index.add_core(len(chunk), faiss.swig_ptr(chunk), None, faiss.swig_ptr(lists))
            np.maximum.at(self.reach, lists[:, 0], np.sqrt(np.maximum(gap[:, 0], 0.0)))
        self.reach *= 1.0 + SLACK
        self.stats = {"index": "ivf"}  # query() certifies from here on, also while tuning
        tuned = self._tune(candidates, queries, rng)
        self.stats = {"index": "ivf", "nlist": nlist, **tuned}
        if tuned["sample_lists_per_query"] > FLAT_SHARE * nlist:
            # Distances concentrate (e.g. noisy features): the certified rescans would read most
            # lists for every query, and a flat scan reads each row once (measured on the
            # 6M-node scenario: 201 of 245 lists per query, 1.3 ms against ~0.5 ms flat).
            self.index = self.quantizer = None
            self.index = faiss.IndexFlatL2(d)
            self.index.add(candidates)
            self.stats = {"index": "flat", "recall": 1.0, "ivf_tried": self.stats}

    def _tune(self, candidates, queries, rng):
        """Smallest nprobe whose first pass finds the exact answer for ``RECALL_GOAL`` of hard
        sampled targets (those farthest from their list centre, like the greedy's queries)."""
        pick = np.sort(rng.choice(len(queries), size=min(len(queries), 16 * RECALL_SAMPLE),
                                  replace=False))
        spread = self.quantizer.search(queries[pick], 1)[0][:, 0]
        sample = queries[np.sort(pick[np.argsort(-spread, kind="stable")[:RECALL_SAMPLE]])]
        truth = faiss.knn(sample, candidates, 1)[1][:, 0]
        nprobe = 1
        while True:
            self.index.nprobe = nprobe
            first = float(np.mean(self.index.search(sample, 1)[1][:, 0] == truth))
            if first >= RECALL_GOAL or nprobe >= self.index.nlist:
                break
            nprobe = min(2 * nprobe, self.index.nlist)
        recall = float(np.mean([self.query(q) == t for q, t in zip(sample, truth)]))
        lists = self.scanned / max(1, self.queries)
        self.scanned = self.queries = 0
        return {"nprobe": nprobe, "first_pass_recall": first, "recall": recall,
                "sample_lists_per_query": lists}

    def query(self, vector):
        """Row of the candidate nearest to ``vector`` (float32 (d,))."""
        distance, label = self.index.search(vector[None, :], 1)
        found = int(label[0, 0])
        if self.stats["index"] == "flat":
            return found
        self.queries += 1
        best = math.sqrt(max(float(distance[0, 0]), 0.0)) if found >= 0 else math.inf
        gaps = np.sqrt(((self.centres - vector) ** 2).sum(1))
        maybe = np.flatnonzero(gaps - self.reach < best * (1.0 + SLACK))
        if len(maybe) > self.index.nprobe:
            maybe = maybe[np.argsort(gaps[maybe], kind="stable")]
            self.scanned += len(maybe)
            nprobe = self.index.nprobe
            self.index.nprobe = len(maybe)
            try:
                distance, label = self.index.search_preassigned(
                    vector[None, :], 1, maybe[None, :].astype(np.int64),
                    gaps[maybe][None, :].astype(np.float32) ** 2)
            finally:
                self.index.nprobe = nprobe
            if label[0, 0] >= 0 and distance[0, 0] < best * best:
                found = int(label[0, 0])
        else:
            self.scanned += self.index.nprobe
        return found

    def summary(self):
        out = dict(self.stats)
        if self.queries:
            out["lists_per_query"] = self.scanned / self.queries
        return out


def greedy(targets, candidates, k, initial=(), pool_targets=False, exact=False, seed=0,
           nlist=None, desc="kcenter", radius=None, allowed=None, covered=None):
    """Choose ``k`` candidate rows that cover the targets (see the module docstring).

    Parameters
    ----------
    targets : float32 (m, d), or :class:`RowChunks` (rows kept on disk). Ignored (the
        candidates are used) when ``pool_targets``.
    candidates : float32 (n, d).
    k : int, 1 <= k <= n, total picks including ``initial``.
    initial : int sequence, candidate rows chosen first (in this order), e.g. an earlier selection.
    pool_targets : bool, farthest-first over the candidates themselves (Gonzalez).
    exact : bool, always use the flat index (IVF answers are exact too, up to float32 ties).
    seed : int, for k-means and the IVF index.
    radius : float or None. If given, stop as soon as every target lies within ``radius`` (at
        most ``k`` picks, no fill): the shortest greedy prefix that reaches it.
    allowed : int sequence or None, the only candidate rows that may be picked after
        ``initial`` (default all), e.g. one class's rows when a class quota must be met; the
        nearest-candidate query searches only these. With ``pool_targets`` the picks stop when
        they run out, so give ``k <= len(initial) + len(allowed)``.
    covered : (dist float64 (m,), assign int64 (m,)) or None: the targets' coverage by the
        ``initial`` picks, already known (e.g. from :func:`cover` or an earlier outcome);
        the initial picks are then not measured again.

    Returns
    -------
    Outcome
    """
    candidates = np.ascontiguousarray(candidates, dtype=np.float32)
    state = _Targets(candidates if pool_targets else _as_source(targets), seed)
    try:
        rows = None if allowed is None else np.asarray(allowed, dtype=np.int64)
        nearest = None
        if pool_targets and rows is not None:
            state.deactivate(np.setdiff1d(np.arange(len(candidates)), rows))
        elif not pool_targets:
            nearest = Nearest(candidates if rows is None else candidates[rows],
                              state.sample(16 * RECALL_SAMPLE, seed), exact, seed, nlist)
        with _one_faiss_thread():
            return _greedy(state, nearest, candidates, k, initial, pool_targets, seed, desc,
                           radius, rows, covered)
    finally:
        state.close()


@contextmanager
def _one_faiss_thread():
    """One query or one group's product at a time runs faster on one FAISS thread (measured:
    2.5 ms against 14 ms with two threads, flat 100k x 64; 0.22 ms for a 142 x 1000 product
    against 4-9 ms for numpy's threaded BLAS on the shared 2-core machine): the thread team
    costs more than the work it splits."""
    threads = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)
    try:
        yield
    finally:
        faiss.omp_set_num_threads(threads)


def _as_source(targets):
    if isinstance(targets, RowChunks):
        return targets
    return np.ascontiguousarray(targets, dtype=np.float32)


def _greedy(state, nearest, candidates, k, initial, pool_targets, seed, desc, radius, rows,
            covered):
    chosen = np.zeros(len(candidates), dtype=bool)
    order, trace = [], []

    def take(c, measure=True):
        chosen[c] = True
        order.append(c)
        if measure:
            state.add(candidates[c], len(order) - 1)
        trace.append(state.radius_now())

    for c in initial:
        take(int(c), measure=covered is None)
    if covered is not None:
        state.start_from(np.asarray(covered[0], dtype=np.float64),
                         np.asarray(covered[1], dtype=np.int64))
        if order:  # only the radius after the last initial pick is known
            trace[:] = [math.nan] * (len(order) - 1) + [state.radius_now()]
    queries = filled = 0
    with progress(total=k, desc=desc, unit="pick") as bar:
        bar.update(len(order))
        while len(order) < k and not (radius is not None and state.radius_now() <= radius):
            target, far = state.farthest()
            if target < 0 or (far <= 0 and not pool_targets):
                break
            if pool_targets:
                c = target
            else:
                c = nearest.query(state.row(target))
                c = c if rows is None else int(rows[c])
                queries += 1
            state.set_aside(target)
            if not chosen[c]:
                take(c)
                bar.update(1)
    if len(order) < k and radius is None and not pool_targets:
        # Every target is served: spread the rest over the candidates, farthest first.
        more = greedy(None, candidates, k, initial=order, pool_targets=True, seed=seed,
                      desc=desc + " (fill)", allowed=rows).order[len(order):]
        filled = len(more)
        for c in more:
            take(int(c))
    dist, assign = state.result()
    stats = {"queries": queries, "filled": filled,
             "set_aside": int(len(state.active) - state.active.sum()), **state.stats()}
    if nearest is not None:
        stats.update(nearest.summary())
    return Outcome(np.asarray(order, dtype=np.int64), dist, assign, np.asarray(trace), stats)


def cover(targets, centres, seed=0):
    """Exact distance of each target to its nearest centre, and that centre's position.

    targets : float32 (m, d) or :class:`RowChunks`. centres : float32 (s, d), s >= 1.
    Returns dist float64 (m,) and assign int64 (m,), ties to the earlier centre.
    """
    state = _Targets(_as_source(targets), seed)
    try:
        centres = np.ascontiguousarray(centres, dtype=np.float32)
        for slot in range(len(centres)):
            state.add(centres[slot], slot)
        with _one_faiss_thread():
            return state.result()
    finally:
        state.close()

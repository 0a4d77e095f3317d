"""The pruned greedy behind ``kcenter`` (k-supplier) and ``kcenter-pool`` (farthest-first).

k-supplier (Hochbaum & Shmoys, 1986): repeat until ``k`` are chosen: take the target farthest
from the chosen set, choose the candidate nearest to it, lower every target's distance. The
nearest-candidate query is exact (a flat scan, or IVF with certified rescans, see
:class:`Nearest`), so the radius is at most 3x the optimum. Farthest-first over the pool
itself (Gonzalez, 1985) is the same loop with targets = candidates and "nearest candidate of a
target" = the target itself, a 2-approximation of k-center.

Speed: targets are grouped by k-means and each update skips the clusters and the single targets
that the triangle inequality rules out (``bigprune.kernels.kcenter.update``); every distance that
is computed is exact, so the pruning never changes the result.

Set-aside rule: once a target has been served (its nearest candidate is chosen) it cannot get
closer with an exact query, so it leaves the farthest search; its distance is still kept up to
date for the report. If every target is set aside (or covered at distance 0) before ``k`` picks,
the remaining picks continue farthest-first over the candidates, starting from the chosen set.
"""
import math
from dataclasses import dataclass, field

import faiss
import numpy as np

from .kernels import kcenter as kern
from .runtime import progress

# Pools up to this size are searched exactly (one flat scan per query is cheap there).
FLAT_MAX = 50_000
# nprobe grows until the first IVF pass is exact for this share of hard sampled targets.
RECALL_GOAL = 0.99
RECALL_SAMPLE = 512
# Relative slack on float32 distances from FAISS when deciding which IVF lists to rescan.
SLACK = 1e-4


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


class _Targets:
    """Targets sorted by k-means cluster, with the per-cluster bounds the kernels use."""

    def __init__(self, points, seed):
        m, d = points.shape
        groups = max(1, min(m, int(round(math.sqrt(m)))))
        if groups > 1:
            kmeans = faiss.Kmeans(d, groups, niter=10, seed=int(seed) % (2**31), verbose=False,
                                  max_points_per_centroid=128, min_points_per_centroid=1)
            kmeans.train(points)
            centres = kmeans.centroids.astype(np.float64)
            labels = kmeans.index.search(points, 1)[1][:, 0].astype(np.int64)
        else:
            centres = points.mean(axis=0, dtype=np.float64)[None, :]
            labels = np.zeros(m, dtype=np.int64)
        self.order = np.argsort(labels, kind="stable").astype(np.int64)
        self.position = np.empty(m, dtype=np.int64)
        self.position[self.order] = np.arange(m)
        self.cluster = labels[self.order]
        self.points = np.ascontiguousarray(points[self.order])
        self.offsets = np.zeros(groups + 1, dtype=np.int64)
        np.cumsum(np.bincount(labels, minlength=groups), out=self.offsets[1:])
        self.centres = np.ascontiguousarray(centres)
        self.to_centre = np.empty(m, dtype=np.float64)
        kern.distances_to(self.points, self.centres, self.cluster, self.to_centre)
        self.radius = np.zeros(groups, dtype=np.float64)
        np.maximum.at(self.radius, self.cluster, self.to_centre)
        self.dist = np.full(m, np.inf)
        self.assign = np.full(m, -1, dtype=np.int64)
        self.active = np.ones(m, dtype=np.uint8)
        sizes = np.diff(self.offsets)
        self.top_all = np.where(sizes > 0, np.inf, -1.0)
        self.top_active = self.top_all.copy()
        self.top_index = np.where(sizes > 0, self.order[np.minimum(self.offsets[:-1], m - 1)], -1)
        self.computed = np.zeros(groups, dtype=np.int64)
        self.updates = 0
        self.distances = 0

    def add(self, centre, slot):
        """Lower the distances after the candidate ``centre`` (float32 (d,)) took ``slot``."""
        kern.update(self.points, self.offsets, self.order, self.to_centre, self.centres,
                    self.radius, centre.astype(np.float64), slot, self.dist, self.assign,
                    self.active, self.top_all, self.top_active, self.top_index, self.computed)
        self.updates += 1
        self.distances += int(self.computed.sum())

    def farthest(self):
        """(target, distance) of the farthest active target, lowest index on ties; (-1, -1)."""
        best = self.top_active.max()
        if best < 0:
            return -1, -1.0
        tied = np.flatnonzero(self.top_active == best)
        return int(self.top_index[tied[np.argmin(self.top_index[tied])]]), float(best)

    def start_from(self, dist, assign):
        """Targets start at ``dist`` / ``assign`` ((m,), caller's order), not infinity."""
        self.dist[:] = dist[self.order]
        self.assign[:] = assign[self.order]
        self.top_all[:] = -1.0
        np.maximum.at(self.top_all, self.cluster, self.dist)
        for g in range(len(self.top_all)):
            kern.refresh_cluster(self.offsets, self.order, self.dist, self.active, g,
                                 self.top_active, self.top_index)

    def deactivate(self, targets):
        """Keep ``targets`` (int64 array) out of the farthest search from the start."""
        self.active[self.position[targets]] = 0
        for g in np.unique(self.cluster[self.position[targets]]):
            kern.refresh_cluster(self.offsets, self.order, self.dist, self.active, g,
                                 self.top_active, self.top_index)

    def set_aside(self, target):
        pos = self.position[target]
        self.active[pos] = 0
        kern.refresh_cluster(self.offsets, self.order, self.dist, self.active,
                             self.cluster[pos], self.top_active, self.top_index)

    def radius_now(self):
        return float(self.top_all.max())

    def row(self, target):
        return self.points[self.position[target]]

    def result(self):
        """dist and assign in the caller's target order."""
        return self.dist[self.position], self.assign[self.position]


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
        self.stats = {"index": "ivf", "nlist": nlist, **self._tune(candidates, queries, rng)}

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
        self.scanned = self.queries = 0
        return {"nprobe": nprobe, "first_pass_recall": first, "recall": recall}

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
    targets : float32 (m, d). Ignored (the candidates are used) when ``pool_targets``.
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
    targets = candidates if pool_targets else np.ascontiguousarray(targets, dtype=np.float32)
    state = _Targets(targets, seed)
    rows = None if allowed is None else np.asarray(allowed, dtype=np.int64)
    nearest = None
    if pool_targets and rows is not None:
        state.deactivate(np.setdiff1d(np.arange(len(candidates)), rows))
    elif not pool_targets:
        nearest = Nearest(candidates if rows is None else candidates[rows], targets, exact, seed,
                          nlist)
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
    # One query at a time runs faster on one FAISS thread (measured: 2.5 ms against 14 ms with
    # two threads, flat 100k x 64): the OpenMP team costs more than the scan it splits.
    faiss_threads = faiss.omp_get_max_threads()
    faiss.omp_set_num_threads(1)
    try:
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
    finally:
        faiss.omp_set_num_threads(faiss_threads)
    if len(order) < k and radius is None and not pool_targets:
        # Every target is served: spread the rest over the candidates, farthest first.
        more = greedy(None, candidates, k, initial=order, pool_targets=True, seed=seed,
                      desc=desc + " (fill)", allowed=allowed).order[len(order):]
        filled = len(more)
        for c in more:
            take(int(c))
    dist, assign = state.result()
    stats = {"clusters": len(state.radius), "queries": queries, "filled": filled,
             "set_aside": int(len(state.active) - state.active.sum()),
             "skipped": 1.0 - state.distances / max(1, state.updates * len(state.dist))}
    if nearest is not None:
        stats.update(nearest.summary())
    return Outcome(np.asarray(order, dtype=np.int64), dist, assign, np.asarray(trace), stats)


def cover(targets, centres, seed=0):
    """Exact distance of each target to its nearest centre, and that centre's position.

    targets : float32 (m, d). centres : float32 (s, d), s >= 1.
    Returns dist float64 (m,) and assign int64 (m,), ties to the earlier centre.
    """
    state = _Targets(np.ascontiguousarray(targets, dtype=np.float32), seed)
    centres = np.ascontiguousarray(centres, dtype=np.float32)
    for slot in range(len(centres)):
        state.add(centres[slot], slot)
    return state.result()

"""The pruned greedy behind ``kcenter`` (k-supplier) and ``kcenter-pool`` (farthest-first).

k-supplier (Hochbaum & Shmoys, 1986): repeat until ``k`` are chosen: take the target farthest
from the chosen set, choose the candidate nearest to it, lower every target's distance. The
nearest-candidate query is exact (a flat scan, or IVF with certified rescans, see
:class:`Nearest`), so the radius is at most 3x the optimum. Farthest-first over the pool
itself (Gonzalez, 1985) is the same loop with targets = candidates and "nearest candidate of a
target" = the target itself, a 2-approximation of k-center.

Speed: the target side (:mod:`bigprune.selection.targetgroups`) groups the targets and applies new centres
lazily, skipping what the triangle inequality rules out; every distance that decides anything
is exact float64, so the result is that of the plain greedy. On noisy features, where distances
concentrate and the triangle inequality prunes ~10%, the queued centres are what save the work
(2M-node scenario: select 25.0 s -> 3.1 s, the same selection). Targets whose rows do not fit
the budget stay on disk (:class:`~bigprune.selection.targetgroups.RowChunks`).

Set-aside rule: once a target has been served (its nearest candidate is chosen) it cannot get
closer with an exact query, so it leaves the farthest search; its distance is still kept up to
date for the report. If every target is set aside (or covered at distance 0) before ``k`` picks,
the remaining picks continue farthest-first over the candidates, starting from the chosen set.
"""
import math
from contextlib import contextmanager
from dataclasses import dataclass, field

import faiss
import numpy as np

from ..common.runtime import progress
from .targetgroups import GROUP_ROWS, PRODUCT_ITEMS, RowChunks, TargetGroups

# select and strategies plan and build the target side through this module.
__all__ = ["GROUP_ROWS", "PRODUCT_ITEMS", "Nearest", "Outcome", "RowChunks", "cover", "greedy"]

# Pools up to this size are searched exactly (one flat scan per query is cheap there).
FLAT_MAX = 50_000
# nprobe grows until the first IVF pass is exact for this share of hard sampled targets.
RECALL_GOAL = 0.99
RECALL_SAMPLE = 512
# Relative slack on float32 distances from FAISS when deciding which IVF lists to rescan.
SLACK = 1e-4
# A flat scan replaces IVF when the hard sampled queries rescan more than this share of lists.
FLAT_SHARE = 0.5


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
           nlist=None, desc="kcenter", radius=None, allowed=None, covered=None, cover=None):
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
    cover : float in (0, 1] or None (every target), with ``radius``: stop as soon as this share
        of the targets lies within ``radius`` instead.
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
    state = TargetGroups(candidates if pool_targets else _as_source(targets), seed)
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
                           _goal(state, radius, cover), rows, covered)
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


def _goal(state, radius, cover):
    """None (no radius), or a test of whether the picks so far reach ``radius`` for every
    target or, with ``cover``, for that share of them."""
    if radius is None:
        return None
    if cover is None or cover >= 1:
        return lambda: state.radius_now() <= radius
    need = math.ceil(round(cover * len(state.dist), 9))
    return lambda: state.count_within(radius) >= need


def _greedy(state, nearest, candidates, k, initial, pool_targets, seed, desc, reached, rows,
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
        while len(order) < k and not (reached is not None and reached()):
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
    if len(order) < k and reached is None and not pool_targets:
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
    state = TargetGroups(_as_source(targets), seed)
    try:
        centres = np.ascontiguousarray(centres, dtype=np.float32)
        for slot in range(len(centres)):
            state.add(centres[slot], slot)
        with _one_faiss_thread():
            return state.result()
    finally:
        state.close()

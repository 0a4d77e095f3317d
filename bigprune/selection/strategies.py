"""Selection strategies: each takes a :class:`Problem` and returns a :class:`Choice`.

Every strategy returns exactly ``problem.k`` distinct nodes of ``problem.pool`` (dense indices,
the pool left after any exclusion), in the order they were chosen; ``problem.initial`` (the
must-include list, possibly empty) always comes first. In radius mode (``kcenter`` only) the
count is whatever the radius needs. Per-class quotas hold for every rule:

- ranking rules (``random``, ``degree``, ``pagerank``, ``entropy``, ``el2n``, ``age``, ``ddd``,
  ``influence``): the best-ranked nodes of each under-served class are reserved first, the
  remaining slots go to the best-ranked of the rest (the top-k with the fewest swaps);
- ``kmedian`` / ``kmeans``: quotas are met as they pick: once the picks left equal the picks the
  quotas still need, only nodes of classes still short are offered (the greedy's next best of
  those, or the cluster's nearest of those);
- ``stratified``: the class counts are the largest-remainder rounding of the pool's
  proportions, raised to the quotas (the raise is paid by the other classes, proportionally);
- ``kcenter`` / ``kcenter-pool``: the greedy runs unconstrained, then its latest picks from
  classes above quota are dropped and each under-served class gets its share by continuing the
  same greedy (from the kept picks) with only that class's nodes as candidates: the farthest
  target, then its nearest node of that class. Late picks matter least (the radius trace never
  rises, so the early prefix keeps the coverage it bought). In radius mode nothing is dropped:
  the quota picks come on top of the prefix that reaches the radius.
"""
import math
from collections import Counter, namedtuple
from dataclasses import dataclass, field
from functools import cached_property

import numpy as np

from ..common.errors import InputError
from ..common.schema import NO_LABEL, SPLIT_CODES
from ..learning.proxy import fit_tuned
from .hardness import DDD_MEMBERS, age_scores, ddd_scores, el2n_scores, entropy_scores
from .influence import influence_scores
from .kcenter import RowChunks, cover, greedy
from .kmeans import clusters, serve
from .kmedian import PAIR_BYTES, neighbour_lists, plan_neighbours
from .kmedian import greedy as facility_greedy
from .reasons import QUOTA, forced, reasons
from ..common.memory import chunk_ranges, rows_per_chunk

# Valid rows the hardness rules' proxy penalty is chosen on, at most (a seeded sample above).
VALID_ROWS = 100_000

Choice = namedtuple("Choice", "order reason outcome info", defaults=(None, None))
Choice.__doc__ = """order : int64 (k,), dense indices. reason : object (k,), why each pick is
there (:mod:`bigprune.selection.reasons`). outcome : the kcenter ``Outcome`` whose
``dist``/``assign`` are the report's targets' coverage, or None (the report computes it).
info : dict or None, JSON-ready facts for the report (greedy counters, how scores were made);
a ranking rule adds ``"ranking"``, the whole pool best first (int64), which the select stage
takes out and profiles by fifths (:func:`bigprune.selection.report.ranking_profile`)."""


@dataclass
class Problem:
    """Everything a strategy may use.

    store : Store with committed graph and propagate stages.
    pool : int64 (n,), sorted dense indices of the candidates (training pool minus exclusions).
    targets : int64 (m,), sorted. k : int, picks (in radius mode: the pool size, an upper bound).
    initial : int64 (s,), pool nodes that must be chosen, first (s <= k).
    seed : int. embedding : path of the (N, d) ``.npy`` holding the distance space.
    window_rows : int, rows read per window from the embedding file (planned from the budget).
    label : int64 (N,), every node's label. quota : {class: minimum count} (capped at the
    class's pool size). radius : float or None, kcenter's radius mode; cover : float in (0, 1)
    or None (every target), the share of targets the radius mode brings within ``radius``.
    proxy_rows : int, rows per chunk when the proxy model trains (planned from the budget).
    target_chunk : None (target rows are held in memory) or (chunk rows, group rows, scratch
    directory): the greedy keeps them on disk (see :class:`bigprune.selection.kcenter.RowChunks`).
    rule_bytes : int, memory the rule may hold. ensemble : int, ``ddd``'s proxies.
    """

    store: object
    pool: np.ndarray
    targets: np.ndarray
    k: int
    initial: np.ndarray
    seed: int
    embedding: object
    window_rows: int
    label: np.ndarray
    quota: dict = field(default_factory=dict)
    radius: float = None
    proxy_rows: int = 65536
    target_chunk: tuple = None
    rule_bytes: int = 1 << 30
    cover: float = None
    ensemble: int = DDD_MEMBERS

    def rows(self, index):
        """Rows ``index`` (sorted int64) of the embedding as float32 (len, d).

        The file is mapped one window at a time, so its pages leave RSS as each window closes.
        """
        index = np.asarray(index, dtype=np.int64)
        width = np.load(self.embedding, mmap_mode="r").shape[1]
        out = np.empty((len(index), width), dtype=np.float32)
        if len(index) == 0:
            return out
        cuts = np.searchsorted(index, [a for a, _ in chunk_ranges(int(index[-1]) + 1, self.window_rows)])
        bounds = list(cuts) + [len(index)]
        for lo, hi in zip(bounds[:-1], bounds[1:]):
            if hi > lo:
                window = np.load(self.embedding, mmap_mode="r")
                out[lo:hi] = window[index[lo:hi]]
                del window
        return out

    @cached_property
    def pool_rows(self):
        return self.rows(self.pool)

    @cached_property
    def target_rows(self):
        return self.rows(self.targets)

    @property
    def target_source(self):
        """What the greedy and the coverage read targets from: their rows, or a RowChunks."""
        if self.target_chunk is None:
            return self.target_rows
        chunk_rows, group_rows, scratch = self.target_chunk
        width = np.load(self.embedding, mmap_mode="r").shape[1]
        return RowChunks((len(self.targets), width), lambda at: self.rows(self.targets[at]),
                         chunk_rows, scratch, group_rows)

    @cached_property
    def pool_label(self):
        return self.label[self.pool]

    @cached_property
    def proxy_l2(self):
        """The hardness rules' proxy penalty, chosen as ``train`` chooses it: on the store's
        labelled valid rows (at most ``VALID_ROWS`` of them, a seeded sample), from the grid of
        :func:`bigprune.learning.proxy.fit_tuned`. JSON-ready ``{"l2", "chosen_by", ...}``."""
        split = self.store.load("graph", "split", mmap=False)
        valid = np.flatnonzero((split == SPLIT_CODES["valid"]) & (self.label != NO_LABEL))
        if len(valid) > VALID_ROWS:
            valid = np.sort(np.random.default_rng(self.seed).choice(valid, VALID_ROWS, replace=False))
        _, choice = fit_tuned(self.pool_rows, self.pool_label, np.arange(len(self.pool)),
                              valid=(self.rows(valid), self.label[valid], np.arange(len(valid))),
                              chunk_rows=self.proxy_rows)
        return choice

    def read_targets(self, positions):
        """Rows of the targets at ``positions`` (sorted int64) as float32."""
        return self.rows(self.targets[positions])

    def class_deficits(self):
        """Each pool node's class index (int64 (n,)) and the picks each class still needs
        after ``initial`` (int64 (classes,)), for the rules that meet quotas as they pick."""
        classes, klass = np.unique(self.pool_label, return_inverse=True)
        short = self.deficits(self.initial)
        return klass.astype(np.int64), np.array([short.get(int(c), 0) for c in classes], dtype=np.int64)

    def pool_positions(self, nodes):
        """Positions in ``pool`` of pool nodes ``nodes``."""
        return np.searchsorted(self.pool, nodes)

    def deficits(self, chosen):
        """``{class: picks still missing}`` for the classes that ``chosen`` leaves below quota."""
        have = Counter(self.label[np.asarray(chosen, dtype=np.int64)].tolist())
        return {c: q - have[c] for c, q in sorted(self.quota.items()) if q > have[c]}


def largest_remainder(total, sizes, floors):
    """Split ``total`` picks over classes of ``sizes`` in proportion, each at least its floor.

    Hamilton's largest-remainder rounding of ``total * size / sum(sizes)``; classes whose share
    falls below their floor are fixed at the floor and the rest is shared again among the
    others (ties in the remainders go to the earlier class). Exact integer arithmetic.
    sizes, floors : int (c,), ``floors <= sizes`` and ``sum(floors) <= total <= sum(sizes)``.
    Returns int64 (c,), summing to ``total``, each within ``[floor, size]``.
    """
    sizes = [int(s) for s in sizes]
    floors = [int(f) for f in floors]
    fixed = [False] * len(sizes)
    while True:
        free = [c for c in range(len(sizes)) if not fixed[c]]
        share = total - sum(f for f, done in zip(floors, fixed) if done)
        weight = sum(sizes[c] for c in free)
        low = [c for c in free if share * sizes[c] < floors[c] * weight]
        if not low or not free:
            break
        for c in low:
            fixed[c] = True
    counts = list(floors)
    if free and weight > 0:
        remainders = []
        for c in free:
            counts[c], rest = divmod(share * sizes[c], weight)
            remainders.append((-rest, c))
        for _, c in sorted(remainders)[:share - sum(counts[c] for c in free)]:
            counts[c] += 1
    return np.asarray(counts, dtype=np.int64)


def _pick(problem, ranking, info=None):
    """``initial``, then the quota reservations and the best of the rest, in ``ranking`` order.

    ranking : int64, pool nodes best first (``initial`` members are skipped). A reserved node
    ranked below the budget's cut is a quota pick. Returns a :data:`Choice`.
    """
    rest = ranking[~np.isin(ranking, problem.initial)]
    take = np.zeros(len(rest), dtype=bool)
    labels = problem.label[rest]
    for c, need in problem.deficits(problem.initial).items():
        take[np.flatnonzero(labels == c)[:need]] = True
    free = problem.k - len(problem.initial) - int(take.sum())
    beyond = take & (np.arange(len(rest)) >= problem.k - len(problem.initial))
    take[np.flatnonzero(~take)[:free]] = True
    order = np.concatenate([problem.initial, rest[take]]).astype(np.int64)
    quota = len(problem.initial) + np.flatnonzero(beyond[take])
    return Choice(order, reasons(len(order), len(problem.initial), quota=quota), None, info)


def _ranked(problem, score, info=None):
    """The Choice of a ranking rule: pool nodes by decreasing ``score`` (aligned with ``pool``,
    ties to the lower index) through :func:`_pick`, with the whole ranking in ``info``."""
    ranking = problem.pool[np.argsort(-score, kind="stable")]
    return _pick(problem, ranking, {**(info or {}), "ranking": ranking})


def _with_quotas(problem, outcome, pool_targets):
    """Meet the quotas after a greedy run (see the module docstring).

    Returns (order, reason, outcome or None, info); the outcome covers the report's targets.
    """
    order = problem.pool[outcome.order]
    filled = outcome.stats.get("filled", 0)
    reason = reasons(len(order), len(problem.initial), fill=np.arange(len(order) - filled, len(order)))
    short = problem.deficits(order)
    if not short:
        return order, reason, (None if pool_targets else outcome), {}
    dropped = 0
    if problem.radius is None:
        keep, dropped = _drop_surplus(problem, order, sum(short.values()))
        order, reason = order[keep], reason[keep]
    covered = None
    if not pool_targets:  # measure the kept picks once; each class's run then starts from them
        covered = (outcome.dist, outcome.assign) if dropped == 0 else cover(
            problem.target_source, problem.pool_rows[problem.pool_positions(order)], problem.seed)
    for c, need in short.items():
        members = problem.pool[(problem.pool_label == c) & ~np.isin(problem.pool, order)]
        offer = np.concatenate([order, members])
        rows = problem.pool_rows[problem.pool_positions(offer)]
        outcome = greedy(None if pool_targets else problem.target_source, rows, len(order) + need,
                         initial=np.arange(len(order)), pool_targets=pool_targets,
                         seed=problem.seed, desc=f"quota {c}",
                         allowed=np.arange(len(order), len(offer)), covered=covered)
        reason = np.concatenate([reason, np.full(len(outcome.order) - len(order), QUOTA, dtype=object)])
        order = offer[outcome.order]
        covered = None if pool_targets else (outcome.dist, outcome.assign)
    info = {"quota_swaps": {"dropped": dropped, "added": {str(c): n for c, n in short.items()}}}
    return order, reason, (None if pool_targets else outcome), info


def _drop_surplus(problem, order, count):
    """Which picks to keep (bool (len(order),)) once the ``count`` latest picks that are neither
    included nor needed by a quota are dropped, and how many were dropped."""
    have = Counter(problem.label[order].tolist())
    keep = np.ones(len(order), dtype=bool)
    dropped = 0
    for i in range(len(order) - 1, len(problem.initial) - 1, -1):
        if dropped == count:
            break
        c = int(problem.label[order[i]])
        if have[c] > problem.quota.get(c, 0):
            keep[i] = False
            have[c] -= 1
            dropped += 1
    return keep, dropped


def kcenter(problem):
    """k-supplier greedy: targets are the target nodes, candidates the pool (3-approximation).

    In radius mode, the shortest greedy prefix whose radius is at most ``problem.radius`` (with
    ``problem.cover``: that brings that share of the targets within it).
    """
    radius_mode = problem.radius is not None
    outcome = greedy(problem.target_source, problem.pool_rows,
                     len(problem.pool) if radius_mode else problem.k,
                     initial=problem.pool_positions(problem.initial), seed=problem.seed,
                     radius=problem.radius, cover=problem.cover)
    if radius_mode:
        _check_reached(problem, outcome.dist)
    order, reason, covering, info = _with_quotas(problem, outcome, pool_targets=False)
    return Choice(order, reason, covering, {**info, "greedy": outcome.stats})


def _check_reached(problem, dist):
    """Refuse a radius that the whole pool leaves short of the share asked, naming the
    smallest radius that would work (rounded up, so that the value suggested does work)."""
    share = 1.0 if problem.cover is None else problem.cover
    need = math.ceil(round(share * len(dist), 9))
    best = float(np.sort(dist)[need - 1])
    if best <= problem.radius:
        return
    text = f"{best:.6g}" if float(f"{best:.6g}") >= best else f"{best * (1 + 1e-5):.6g}"
    asked = "" if problem.cover is None else f" --cover {problem.cover:g}"
    raise InputError(f"--radius {problem.radius}{asked}: cannot be reached even with the whole pool "
                     f"({len(problem.pool)} candidates); use --radius {text} or more")


def kmedian(problem):
    """Greedy facility location (k-median) over the targets: each pick lowers the targets'
    summed distance to the chosen set the most (see :mod:`bigprune.selection.kmedian`)."""
    targets, width = len(problem.targets), problem.pool_rows.shape[1]
    nearest = plan_neighbours(len(problem.pool), targets, problem.k, problem.rule_bytes)
    chunk = rows_per_chunk((problem.rule_bytes - PAIR_BYTES * targets * nearest) // 2,
                           12 * nearest + 4 * width, at_least=256)
    lists = neighbour_lists(problem.pool_rows, problem.read_targets, targets, nearest, chunk)
    start = problem.pool_positions(problem.initial)
    klass, deficit = problem.class_deficits()
    order, facts = facility_greedy(lists, start, np.setdiff1d(np.arange(len(problem.pool)), start),
                                   klass, deficit, problem.k - len(start))
    return Choice(problem.pool[order], _forced_reasons(order, len(start), klass, deficit), None,
                  {"kmedian": facts})


def _forced_reasons(order, included, klass, deficit):
    """Reasons of a greedy that meets the quotas as it picks (``kmedian``, ``kmeans``): a pick
    made in its quota-forced mode is a quota pick. order : pool positions, included first."""
    quota = included + np.flatnonzero(forced(klass[order[included:]], deficit))
    return reasons(len(order), included, quota=quota)


def kmeans(problem):
    """k-means over the targets (one cluster per free pick), then each cluster's nearest pool
    node, larger clusters first (see :mod:`bigprune.selection.kmeans`)."""
    targets, width = len(problem.targets), problem.pool_rows.shape[1]
    picks = problem.k - len(problem.initial)
    if picks == 0:
        return Choice(problem.initial.copy(), reasons(len(problem.initial), len(problem.initial)),
                      None, {"kmeans": {"clusters": 0}})
    count = min(picks, targets)
    chunk = rows_per_chunk(problem.rule_bytes // 4, 4 * width + 8, at_least=256)
    centroids, sizes = clusters(problem.read_targets, targets, count, width, problem.seed,
                                sample_rows=max(1, problem.rule_bytes // (4 * 4 * width)),
                                chunk_rows=chunk)
    klass, deficit = problem.class_deficits()
    order = serve(problem.pool_rows, centroids, sizes, problem.pool_positions(problem.initial),
                  klass, deficit, picks)
    reason = _forced_reasons(order, len(problem.initial), klass, deficit)
    return Choice(problem.pool[order], reason, None, {"kmeans": {
        "clusters": int(count), "largest": int(sizes.max()), "empty": int(np.sum(sizes == 0))}})


def kcenter_pool(problem):
    """Farthest-first over the pool itself, from a seeded random pool node (2-approximation)."""
    start = problem.pool_positions(problem.initial)
    if len(start) == 0:
        start = np.random.default_rng(problem.seed).integers(len(problem.pool), size=1)
    outcome = greedy(None, problem.pool_rows, problem.k, initial=start, pool_targets=True,
                     seed=problem.seed, desc="kcenter-pool")
    order, reason, _, info = _with_quotas(problem, outcome, pool_targets=True)
    return Choice(order, reason, None, info)


def random(problem):
    """A uniform random sample of the pool (seeded)."""
    rest = np.setdiff1d(problem.pool, problem.initial, assume_unique=True)
    ranking = np.concatenate([problem.initial, np.random.default_rng(problem.seed).permutation(rest)])
    return _pick(problem, ranking, {"ranking": ranking.astype(np.int64)})


def stratified(problem):
    """A seeded random sample with the pool's class proportions (largest-remainder counts)."""
    rng = np.random.default_rng(problem.seed)
    classes, sizes = np.unique(problem.pool_label, return_counts=True)
    included = Counter(problem.label[problem.initial].tolist())
    floors = [max(included[c], problem.quota.get(c, 0)) for c in classes.tolist()]
    counts = largest_remainder(problem.k, sizes, floors)
    rest = np.setdiff1d(problem.pool, problem.initial, assume_unique=True)
    rest_label = problem.label[rest]
    drawn = [rng.permutation(rest[rest_label == c])[:n - included[c]]
             for c, n in zip(classes.tolist(), counts.tolist())]
    # a class's picks beyond its share without the quotas are quota picks (its last drawn)
    share = largest_remainder(problem.k, sizes, [included[c] for c in classes.tolist()])
    raised = np.concatenate([np.arange(len(d)) >= len(d) - max(0, n - s)
                             for d, n, s in zip(drawn, counts.tolist(), share.tolist())])
    mixed = rng.permutation(len(raised))  # the same shuffle as permuting the nodes themselves
    order = np.concatenate([problem.initial, np.concatenate(drawn)[mixed]])
    quota = len(problem.initial) + np.flatnonzero(raised[mixed])
    return Choice(order.astype(np.int64), reasons(len(order), len(problem.initial), quota=quota),
                  None, {"class_targets": {
        str(c): int(n) for c, n in zip(classes.tolist(), counts.tolist())}})


def degree(problem):
    """Highest degree (number of neighbours) first."""
    indptr = problem.store.load("graph", "indptr", mmap=False)
    return _ranked(problem, np.diff(indptr)[problem.pool])


def pagerank(problem):
    """Highest PageRank first."""
    rank = problem.store.load("propagate", "pagerank", mmap=False)
    return _ranked(problem, rank[problem.pool])


def entropy(problem):
    """Highest predictive entropy of the proxy model trained on the pool first."""
    score, info = entropy_scores(problem.pool_rows, problem.pool_label, l2=problem.proxy_l2["l2"],
                                 chunk_rows=problem.proxy_rows)
    return _ranked(problem, score, {"hardness": {**info, "l2": problem.proxy_l2}})


def el2n(problem):
    """Highest EL2N score (Paul et al., 2021) first: mean early error norm over random starts."""
    score, info = el2n_scores(problem.pool_rows, problem.pool_label, seed=problem.seed,
                              l2=problem.proxy_l2["l2"], chunk_rows=problem.proxy_rows)
    return _ranked(problem, score, {"hardness": {**info, "l2": problem.proxy_l2}})


def age(problem):
    """Highest AGE score (Cai et al., 2017) first: entropy, density and PageRank percentiles."""
    rank = problem.store.load("propagate", "pagerank", mmap=False)
    score, info = age_scores(problem.pool_rows, problem.pool_label, rank[problem.pool], problem.k,
                             seed=problem.seed, l2=problem.proxy_l2["l2"], chunk_rows=problem.proxy_rows)
    return _ranked(problem, score, {"hardness": {**info, "l2": problem.proxy_l2}})


def ddd(problem):
    """Highest ensemble disagreement (Meding et al., 2022) first: the share of held-out proxies
    (pairs trained on complementary seeded halves of the pool) that misclassify the node."""
    score, info = ddd_scores(problem.pool_rows, problem.pool_label, members=problem.ensemble,
                             seed=problem.seed, l2=problem.proxy_l2["l2"], chunk_rows=problem.proxy_rows)
    return _ranked(problem, score, {"hardness": {**info, "l2": problem.proxy_l2}})


def influence(problem):
    """Highest self-influence under the proxy (Koh & Liang, 2017) first: ``g^T H^-1 g``, the
    rise of the node's own loss if it were left out (see :mod:`bigprune.selection.influence`)."""
    score, info = influence_scores(problem.pool_rows, problem.pool_label, l2=problem.proxy_l2["l2"],
                                   chunk_rows=problem.proxy_rows, memory_bytes=problem.rule_bytes)
    return _ranked(problem, score, {"hardness": {**info, "l2": problem.proxy_l2}})


STRATEGIES = {
    "kmedian": kmedian,
    "kmeans": kmeans,
    "kcenter": kcenter,
    "kcenter-pool": kcenter_pool,
    "random": random,
    "stratified": stratified,
    "degree": degree,
    "pagerank": pagerank,
    "entropy": entropy,
    "el2n": el2n,
    "age": age,
    "ddd": ddd,
    "influence": influence,
}
# Rules that hold the pool's feature rows (with an index, a sorted copy or the proxy's buffers).
NEEDS_POOL_ROWS = {"kmedian", "kmeans", "kcenter", "kcenter-pool", "entropy", "el2n", "age", "ddd",
                   "influence"}
# Rules that train the proxy model on the pool.
NEEDS_PROXY = {"entropy", "el2n", "age", "ddd", "influence"}

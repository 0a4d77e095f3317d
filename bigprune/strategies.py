"""Selection strategies: each takes a :class:`Problem` and returns a :class:`Choice`.

Every strategy returns exactly ``problem.k`` distinct pool nodes (dense indices), in the order
they were chosen; ``problem.initial`` (an earlier selection, possibly empty) always comes first.
"""
from collections import namedtuple
from dataclasses import dataclass
from functools import cached_property

import numpy as np

from .kcenter import greedy
from .memory import chunk_ranges

Choice = namedtuple("Choice", "order outcome")
Choice.__doc__ = """order : int64 (k,), dense indices. outcome : the kcenter ``Outcome`` whose
``dist``/``assign`` are the report's targets' coverage, or None (the report computes it)."""


@dataclass
class Problem:
    """Everything a strategy may use.

    store : Store with committed graph and propagate stages.
    pool : int64 (n,), sorted dense indices of the training pool. targets : int64 (m,), sorted.
    k : int, picks. initial : int64 (s,), pool nodes chosen first (s <= k).
    seed : int. embedding : path of the (N, d) float32 ``.npy`` holding the distance space.
    window_rows : int, rows read per window from the embedding file (planned from the budget).
    """

    store: object
    pool: np.ndarray
    targets: np.ndarray
    k: int
    initial: np.ndarray
    seed: int
    embedding: object
    window_rows: int

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

    def pool_positions(self, nodes):
        """Positions in ``pool`` of pool nodes ``nodes``."""
        return np.searchsorted(self.pool, nodes)


def _ranked(problem, score):
    """``initial``, then the rest of the pool by decreasing ``score``, ties to the lower index."""
    rest = np.setdiff1d(problem.pool, problem.initial, assume_unique=True)
    ranked = rest[np.argsort(-score[rest], kind="stable")]
    return np.concatenate([problem.initial, ranked])[:problem.k].astype(np.int64)


def kcenter(problem):
    """k-supplier greedy: targets are the target nodes, candidates the pool (3-approximation)."""
    outcome = greedy(problem.target_rows, problem.pool_rows, problem.k,
                     initial=problem.pool_positions(problem.initial), seed=problem.seed)
    return Choice(problem.pool[outcome.order], outcome)


def kcenter_pool(problem):
    """Farthest-first over the pool itself, from a seeded random pool node (2-approximation)."""
    start = problem.pool_positions(problem.initial)
    if len(start) == 0:
        start = np.random.default_rng(problem.seed).integers(len(problem.pool), size=1)
    outcome = greedy(None, problem.pool_rows, problem.k, initial=start, pool_targets=True,
                     seed=problem.seed, desc="kcenter-pool")
    return Choice(problem.pool[outcome.order], None)


def random(problem):
    """A uniform random sample of the pool (seeded)."""
    rest = np.setdiff1d(problem.pool, problem.initial, assume_unique=True)
    drawn = np.random.default_rng(problem.seed).permutation(rest)
    return Choice(np.concatenate([problem.initial, drawn])[:problem.k].astype(np.int64), None)


def degree(problem):
    """Highest degree (number of neighbours) first."""
    indptr = problem.store.load("graph", "indptr", mmap=False)
    return Choice(_ranked(problem, np.diff(indptr)), None)


def pagerank(problem):
    """Highest PageRank first."""
    return Choice(_ranked(problem, problem.store.load("propagate", "pagerank", mmap=False)), None)


STRATEGIES = {
    "kcenter": kcenter,
    "kcenter-pool": kcenter_pool,
    "random": random,
    "degree": degree,
    "pagerank": pagerank,
}

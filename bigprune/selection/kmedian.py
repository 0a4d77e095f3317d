"""``kmedian``: greedy facility location over the targets, on a sparse target -> candidate graph.

Each target ``t`` is linked to its ``r`` nearest candidates (FAISS), and ``reach_t`` is the
distance to the last of them. The greedy maximises ``f(S) = sum_t (reach_t - d(t, S))+``: every
candidate beyond a target's list is at least ``reach_t`` away, so the lists hold every non-zero
term and ``f`` is computed exactly. ``f`` is monotone submodular, so the greedy is within
``1 - 1/e`` of the best ``f`` over sets of the same size (Nemhauser, Wolsey & Fisher, 1978);
the lazy evaluation (Minoux, 1978) picks what the plain greedy picks. When the lists hold the
whole pool (``r = n``), maximising ``f`` is minimising the sum of target distances: exact
greedy k-median. Above ``FLAT_MAX`` candidates the lists come from an IVF index, whose
neighbours are approximate (the greedy is then exact on the lists it was given).
"""
import math

import faiss
import numpy as np

from ..common.errors import BudgetError
from ..common.memory import chunk_ranges, format_size
from ..common.runtime import progress
from ..kernels.facility import invert, lazy_greedy, take

# Every candidate is listed when the lists for all targets hold at most this many pairs.
DENSE_PAIRS = 20_000_000
# Otherwise each target lists about this many times its share of the pool (n / k candidates
# per pick), and never fewer than NEAREST_LEAST: a target should find a chosen node among its
# neighbours.
SHARES = 4
NEAREST_LEAST = 32
# Above this many candidates the lists come from IVF with ~sqrt(n) lists and NPROBE probes. On
# 300k blob candidates, 60k targets, 200 neighbours (bench/select.py's data): 16 probes built
# the lists in 25.7 s, 8 in 16.6 s, 4 in 14.2 s, with mean target distances 2.2301, 2.2301,
# 2.2304 after the greedy (2 shared cores, load 7.5); recall@200 at 8 probes was 0.999 at 1M.
FLAT_MAX = 50_000
NPROBE = 8
# Rows sampled per IVF list to train its centres (FAISS asks for at least 39).
TRAIN_PER_LIST = 40
# The IVF index is trained with a fixed seed, so that the rule's picks do not depend on --seed.
INDEX_SEED = 0
# Bytes held per listed pair: the lists by target while they are built (int32 candidate, float32
# distance) and the same by candidate. FAISS's answers (int64, float32 per pair) are held for one
# chunk of targets at a time and counted with the chunk (strategies.kmedian).
PAIR_BYTES = 16


def plan_neighbours(candidates, targets, picks, spare):
    """How many candidates each target lists: every one when that is cheap, else ``SHARES``
    times the pool's share per pick, capped by what ``spare`` bytes hold (refused below 8)."""
    if candidates * targets <= DENSE_PAIRS:
        wanted = candidates
    else:
        wanted = min(candidates, max(NEAREST_LEAST, math.ceil(SHARES * candidates / max(picks, 1))))
    fits = spare // (PAIR_BYTES * max(targets, 1))
    least = min(candidates, 8)
    if fits < least:
        short = PAIR_BYTES * targets * least - spare
        raise BudgetError(f"--memory-budget is too small for select --strategy kmedian with "
                          f"{targets} targets: their neighbour lists need "
                          f"{format_size(short, up=True)} more; raise it by at least that")
    return int(min(wanted, fits))


def neighbour_lists(candidates, read_targets, targets, nearest, chunk_rows=65536):
    """Each target's ``nearest`` candidates, held by candidate.

    candidates : float32 (n, d), in memory. read_targets(positions) : float32 rows of those
    targets. Returns (ptr int64 (n+1,), target int32 (P,), dist float32 (P,), reach float64 (m,),
    facts for the report).
    """
    n, width = candidates.shape
    index, facts = _index(candidates, nearest)
    linked = np.empty((targets, nearest), dtype=np.int32)
    dist = np.empty((targets, nearest), dtype=np.float32)
    reach = np.empty(targets, dtype=np.float64)
    counts = np.zeros(n, dtype=np.int64)
    with progress(total=targets, desc="kmedian lists", unit="target") as bar:
        for start, stop in chunk_ranges(targets, chunk_rows):
            squared, found = index.search(np.ascontiguousarray(read_targets(np.arange(start, stop))), nearest)
            near = np.sqrt(np.maximum(squared, 0.0))
            listed = found >= 0  # IVF may find fewer than asked: -1, left out of the lists
            reach[start:stop] = np.where(listed, near, 0.0).max(axis=1)
            counts += np.bincount(found[listed], minlength=n)
            linked[start:stop], dist[start:stop] = found, near
            bar.update(stop - start)
    del index
    ptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(counts, out=ptr[1:])
    target, by_candidate = np.empty(ptr[-1], dtype=np.int32), np.empty(ptr[-1], dtype=np.float32)
    invert(linked, dist, ptr, target, by_candidate)
    facts["pairs"] = int(ptr[-1])
    return ptr, target, by_candidate, reach, facts


def _index(candidates, nearest):
    n, width = candidates.shape
    if n <= FLAT_MAX or nearest == n:
        index = faiss.IndexFlatL2(width)
        index.add(np.ascontiguousarray(candidates))
        return index, {"index": "flat", "neighbours": int(nearest)}
    nlist = max(16, round(math.sqrt(n)))
    quantizer = faiss.IndexFlatL2(width)
    index = faiss.IndexIVFFlat(quantizer, width, nlist)
    index.cp.seed = INDEX_SEED
    rng = np.random.default_rng(INDEX_SEED)
    index.train(candidates[np.sort(rng.choice(n, size=min(n, TRAIN_PER_LIST * nlist), replace=False))])
    index.add(np.ascontiguousarray(candidates))
    index.nprobe = min(nlist, NPROBE)
    # FAISS's Python constructor keeps the quantizer alive (index.referenced_objects); faiss
    # 1.15 refuses unknown attributes on its objects, so no keep-alive attribute is set here.
    return index, {"index": "ivf", "nlist": int(nlist), "nprobe": int(index.nprobe),
                   "neighbours": int(nearest)}


def greedy(lists, initial, offered, klass, deficit, picks):
    """Lazy greedy over ``lists`` (from :func:`neighbour_lists`) after the ``initial`` picks.

    initial : int64, candidates chosen first. offered : int64, the others that may be chosen.
    klass : int64 (n,), class index per candidate; deficit : int64 (classes,), picks each class
    still needs once ``initial`` is counted. Returns (order int64, facts).
    """
    ptr, target, dist, reach, facts = lists
    cur = reach.copy()
    for c in initial:
        take(ptr, target, dist, cur, int(c))
    chosen = np.empty(picks, dtype=np.int64)
    count, evaluations = lazy_greedy(ptr, target, dist, cur, np.asarray(offered, dtype=np.int64),
                                     klass, deficit.copy(), picks, chosen)
    objective = float(np.sum(reach - cur))
    return (np.concatenate([np.asarray(initial, dtype=np.int64), chosen[:count]]),
            {**facts, "gain_evaluations": int(evaluations), "objective": objective,
             "exact_lists": facts["neighbours"] == len(ptr) - 1})

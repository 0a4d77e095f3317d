"""Greedy facility location (k-median) over a sparse target -> candidate graph, lazily evaluated.

The graph is held by candidate (an inverted list): ``ptr`` (n+1,) int64 offsets, and for each
candidate ``c`` the targets ``target[ptr[c]:ptr[c+1]]`` (int32) within reach of it and their
distances ``dist[...]`` (float32). The objective of a chosen set S is
``sum_t (reach_t - d(t, S))+``, with ``cur`` (m,) float64 holding ``min(reach_t, d(t, S))``.
"""
import numpy as np
from numba import njit


@njit(cache=True)
def gain(ptr, target, dist, cur, c):
    """What choosing candidate ``c`` adds to the objective, given ``cur`` (m,) (read)."""
    total = 0.0
    for e in range(ptr[c], ptr[c + 1]):
        lower = cur[target[e]] - dist[e]
        if lower > 0.0:
            total += lower
    return total


@njit(cache=True)
def take(ptr, target, dist, cur, c):
    """Lower ``cur`` (m,) (filled in place) to what candidate ``c`` offers its targets."""
    for e in range(ptr[c], ptr[c + 1]):
        t = target[e]
        if dist[e] < cur[t]:
            cur[t] = dist[e]


@njit(cache=True)
def _before(key, ids, a, b):
    """Heap order: larger key first, ties to the smaller id (the plain greedy's argmax)."""
    return key[a] > key[b] or (key[a] == key[b] and ids[a] < ids[b])


@njit(cache=True)
def _sift_down(key, ids, size, i):
    while True:
        best, left, right = i, 2 * i + 1, 2 * i + 2
        if left < size and _before(key, ids, left, best):
            best = left
        if right < size and _before(key, ids, right, best):
            best = right
        if best == i:
            return
        key[i], key[best] = key[best], key[i]
        ids[i], ids[best] = ids[best], ids[i]
        i = best


@njit(cache=True)
def lazy_greedy(ptr, target, dist, cur, offered, klass, deficit, picks, order):
    """Choose ``picks`` candidates greedily (Minoux's lazy evaluation: the same picks as the
    plain greedy, which takes the largest gain, ties to the lower index).

    ptr, target, dist : the inverted lists (read). cur : float64 (m,), filled in place.
    offered : int64 (s,), the candidates that may be chosen (read).
    klass : int64 (n,), each candidate's class index (read). deficit : int64 (classes,),
        picks each class still needs (filled in place): once the picks left equal the
        deficits left, only candidates of classes still short are chosen.
    order : int64 (picks,), filled with the chosen candidates in order.
    Returns (chosen count, gain evaluations).
    """
    size = offered.shape[0]
    key = np.empty(size, dtype=np.float64)
    ids = offered.copy()
    for i in range(size):
        key[i] = gain(ptr, target, dist, cur, ids[i])
    for i in range(size // 2 - 1, -1, -1):
        _sift_down(key, ids, size, i)
    short = 0
    for value in deficit:
        short += max(value, 0)
    chosen, evaluations = 0, size
    while chosen < picks and size > 0:
        c = ids[0]
        if picks - chosen <= short and deficit[klass[c]] <= 0:
            size -= 1  # a class already met cannot become short again: drop it for good
            key[0], ids[0] = key[size], ids[size]
            _sift_down(key, ids, size, 0)
            continue
        key[0] = gain(ptr, target, dist, cur, c)
        evaluations += 1
        _sift_down(key, ids, size, 0)
        if ids[0] != c:
            continue  # its gain fell below another's bound: look at that one first
        take(ptr, target, dist, cur, c)
        order[chosen] = c
        chosen += 1
        if deficit[klass[c]] > 0:
            short -= 1
        deficit[klass[c]] -= 1
        size -= 1
        key[0], ids[0] = key[size], ids[size]
        _sift_down(key, ids, size, 0)
    return chosen, evaluations


@njit(cache=True)
def invert(linked, dist, ptr, target_out, dist_out):
    """Regroup each target's list by candidate (a counting sort; targets stay in order).

    linked : int32 (m, r), candidates per target, -1 for none (read). dist : float32 (m, r) (read).
    ptr : int64 (n+1,), offsets from the candidates' counts (read).
    target_out : int32 (P,), dist_out : float32 (P,), filled.
    """
    cursor = ptr[:-1].copy()
    for t in range(linked.shape[0]):
        for j in range(linked.shape[1]):
            c = linked[t, j]
            if c >= 0:
                target_out[cursor[c]] = t
                dist_out[cursor[c]] = dist[t, j]
                cursor[c] += 1

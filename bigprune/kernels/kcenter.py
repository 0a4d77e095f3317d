"""Kernels for the pruned greedy: distance updates over clustered targets.

Targets are stored sorted by cluster, so cluster ``g`` owns rows ``offsets[g]:offsets[g + 1]``.
Distances are computed in float64 from float32 rows, so the pruned and the plain greedy agree.
A cluster's "maximum" is -1 when it holds no (active) target, since real distances are >= 0.
"""
import numpy as np
from numba import njit, prange

BLOCK = 16  # dimensions summed between early-exit checks


@njit(parallel=True, cache=True)
def update(points, offsets, order, to_centre, centres, radius, centre, slot,
           dist, assign, active, top_all, top_active, top_index, computed):
    """Lower each target's distance to the chosen set after ``centre`` joins it.

    A whole cluster is skipped when ``||centre - mu|| - radius >= top_all`` and one target when
    ``||centre - mu|| - ||t - mu|| >= dist[t]`` (triangle inequality: neither can get closer).

    points : float32 (m, d), read, targets sorted by cluster. offsets : int64 (G + 1,), read.
    order : int64 (m,), read, the caller's index of each sorted row (breaks ties: lowest wins).
    to_centre : float64 (m,), read, ``||t - mu_g||``. centres : float64 (G, d), read.
    radius : float64 (G,), read, max ``to_centre`` per cluster. centre : float64 (d,), read.
    slot : int, the new centre's position in the selection.
    dist : float64 (m,), updated. assign : int64 (m,), updated, slot of the nearest chosen centre.
    active : uint8 (m,), read, 0 for targets set aside (still updated, never farthest).
    top_all : float64 (G,), updated, max dist per cluster. top_active : float64 (G,), updated,
    max dist over active targets. top_index : int64 (G,), updated, ``order`` of that target.
    computed : int64 (G,), filled, distances computed per cluster in this call.
    """
    d = points.shape[1]
    for g in prange(offsets.shape[0] - 1):
        gap = 0.0
        for j in range(d):
            diff = centre[j] - centres[g, j]
            gap += diff * diff
        gap = np.sqrt(gap)
        computed[g] = 0
        if gap - radius[g] >= top_all[g]:
            continue
        best_all = -1.0
        best_active = -1.0
        best_index = -1
        count = 0
        for t in range(offsets[g], offsets[g + 1]):
            current = dist[t]
            if gap - to_centre[t] < current:
                # Partial sums only grow: stop a block after they pass the current distance.
                bound = current * current
                total = 0.0
                for start in range(0, d, BLOCK):
                    for j in range(start, min(d, start + BLOCK)):
                        diff = points[t, j] - centre[j]
                        total += diff * diff
                    if total >= bound:
                        break
                count += 1
                if total < bound:
                    closer = np.sqrt(total)
                    if closer < current:
                        current = closer
                        dist[t] = current
                        assign[t] = slot
            if current > best_all:
                best_all = current
            if active[t] and (current > best_active or (current == best_active and order[t] < best_index)):
                best_active = current
                best_index = order[t]
        top_all[g] = best_all
        top_active[g] = best_active
        top_index[g] = best_index
        computed[g] = count


@njit(cache=True)
def refresh_cluster(offsets, order, dist, active, g, top_active, top_index):
    """Recompute cluster ``g``'s farthest active target after one was set aside.

    offsets : int64 (G + 1,), read. order : int64 (m,), read. dist : float64 (m,), read.
    active : uint8 (m,), read. top_active : float64 (G,), updated. top_index : int64 (G,), updated.
    """
    best_active = -1.0
    best_index = -1
    for t in range(offsets[g], offsets[g + 1]):
        if active[t] and (dist[t] > best_active or (dist[t] == best_active and order[t] < best_index)):
            best_active = dist[t]
            best_index = order[t]
    top_active[g] = best_active
    top_index[g] = best_index


@njit(parallel=True, cache=True)
def distances_to(points, centres, labels, out):
    """``out[t] = ||points[t] - centres[labels[t]]||`` in float64.

    points : float32 (m, d), read. centres : float64 (G, d), read. labels : int64 (m,), read.
    out : float64 (m,), filled.
    """
    d = points.shape[1]
    for t in prange(points.shape[0]):
        g = labels[t]
        total = 0.0
        for j in range(d):
            diff = points[t, j] - centres[g, j]
            total += diff * diff
        out[t] = np.sqrt(total)

"""Kernels for the pruned greedy: bringing one group of targets up to date with new centres.

Targets are stored sorted by group, and each kernel sees one group's rows. Exact distances are
computed in float64 from float32 rows, so the pruned and the plain greedy agree. Whatever path
a group takes (one centre at a time, or a product screen), a target ends at the exact minimum
distance to the centres seen, assigned to the earliest centre at that distance.
A group's "maximum" is -1 when it holds no (active) target, since real distances are >= 0.
"""
import numpy as np
from numba import njit

BLOCK = 16  # dimensions summed between early-exit checks


@njit(cache=True)
def _exact(points, t, row, bound):
    """Squared distance of ``points[t]`` to ``row``; stops early (returning >= bound) past ``bound``."""
    d = points.shape[1]
    total = 0.0
    for start in range(0, d, BLOCK):
        for j in range(start, min(d, start + BLOCK)):
            diff = np.float64(points[t, j]) - np.float64(row[j])
            total += diff * diff
        if total >= bound:
            break
    return total


@njit(cache=True)
def _measure(points, t, row, slot, current, dist, assign):
    """Target ``t`` against one centre, exactly: if closer than ``current``, record it in
    ``dist``/``assign`` (slot ``slot``). Returns the target's distance after it."""
    bound = current * current
    total = _exact(points, t, row, bound)
    if total < bound:
        closer = np.sqrt(total)
        if closer < current:
            dist[t] = closer
            assign[t] = slot
            return closer
    return current


@njit(cache=True)
def apply_centres(points, to_centre, mu, radius, top, rows, slots, dist, assign):
    """Lower the group's distances with the centres ``rows``, one centre at a time.

    A centre is skipped for the whole group when ``||c - mu|| - radius >= top`` and for one
    target when ``||c - mu|| - ||t - mu|| >= dist[t]`` (triangle inequality: neither can get
    closer).

    points : float32 (b, d), read, the group's targets. to_centre : float64 (b,), read,
    ``||t - mu||``. mu : float64 (d,), read, the group's centre. radius : float, max of
    ``to_centre``. top : float, an upper bound of ``dist`` over the group.
    rows : float32 (p, d), read, new centres in pick order. slots : int64 (p,), read, their
    positions in the selection. dist : float64 (b,), updated. assign : int64 (b,), updated.
    Returns the number of exact distances computed.
    """
    d = points.shape[1]
    computed = 0
    for c in range(rows.shape[0]):
        gap = 0.0
        for j in range(d):
            diff = np.float64(rows[c, j]) - mu[j]
            gap += diff * diff
        gap = np.sqrt(gap)
        if gap - radius >= top:
            continue
        for t in range(points.shape[0]):
            if gap - to_centre[t] < dist[t]:
                _measure(points, t, rows[c], slots[c], dist[t], dist, assign)
                computed += 1
    return computed


@njit(cache=True)
def screen_centres(points, approx, tnorm, cnorm, rows, slots, tol, dist, assign):
    """Lower the group's distances with many centres at once, from float32 squared distances.

    ``approx[t, c]`` is within ``tol * (|t| + |c|)^2`` (plus float64 rounding) of the squared
    distance: the float32 error bound of a d-term sum of products (Higham's gamma_d), for the
    direct sum of squared differences and for ``|t|^2 + |c|^2 - 2 t.c`` alike. Only centres
    whose lower bound can beat both the target's current distance and the smallest upper bound
    are measured exactly, in pick order.

    points : float32 (b, d), read. approx : float32 (b, p), read.
    tnorm : float64 (b,), read. cnorm : float64 (p,), read, squared norms.
    rows : float32 (p, d), read. slots : int64 (p,), read, ascending. tol : float.
    dist : float64 (b,), updated. assign : int64 (b,), updated.
    Returns the number of exact distances computed.
    """
    computed = 0
    p = rows.shape[0]
    for t in range(points.shape[0]):
        current = dist[t]
        best_upper = np.inf
        for c in range(p):
            slack = tol * (tnorm[t] + cnorm[c] + 2.0 * np.sqrt(tnorm[t] * cnorm[c])) + 1e-13 * (tnorm[t] + cnorm[c])
            upper = np.float64(approx[t, c]) + slack
            if upper < best_upper:
                best_upper = upper
        limit = min(best_upper, current * current) * (1.0 + 1e-12)
        for c in range(p):
            slack = tol * (tnorm[t] + cnorm[c] + 2.0 * np.sqrt(tnorm[t] * cnorm[c])) + 1e-13 * (tnorm[t] + cnorm[c])
            if np.float64(approx[t, c]) - slack > limit:
                continue
            current = _measure(points, t, rows[c], slots[c], current, dist, assign)
            computed += 1
    return computed


@njit(cache=True)
def group_tops(dist, active, order):
    """Largest distance, largest active distance and its target (lowest ``order`` on ties).

    dist : float64 (b,), read. active : uint8 (b,), read. order : int64 (b,), read, the
    caller's index of each row. Returns (top_all, top_active, index), -1 where none.
    """
    best_all = -1.0
    best_active = -1.0
    best_index = -1
    for t in range(dist.shape[0]):
        current = dist[t]
        if current > best_all:
            best_all = current
        if active[t] and (current > best_active or (current == best_active and order[t] < best_index)):
            best_active = current
            best_index = order[t]
    return best_all, best_active, best_index


@njit(cache=True)
def distances_to(points, centres, labels, out):
    """``out[t] = ||points[t] - centres[labels[t]]||`` in float64.

    points : float32 (m, d), read. centres : float64 (G, d), read. labels : int64 (m,), read.
    out : float64 (m,), filled.
    """
    d = points.shape[1]
    for t in range(points.shape[0]):
        g = labels[t]
        total = 0.0
        for j in range(d):
            diff = points[t, j] - centres[g, j]
            total += diff * diff
        out[t] = np.sqrt(total)


@njit(cache=True)
def squared_norms(points, out):
    """``out[t] = ||points[t]||^2`` in float64. points : float32 (b, d), read. out : (b,), filled."""
    for t in range(points.shape[0]):
        total = 0.0
        for j in range(points.shape[1]):
            value = np.float64(points[t, j])
            total += value * value
        out[t] = total


@njit(cache=True)
def gaps_to(rows, mu, out):
    """``out[c] = ||rows[c] - mu||`` in float64. rows : float32 (p, d), read. mu : float64 (d,),
    read. out : float64 (p,), filled."""
    for c in range(rows.shape[0]):
        total = 0.0
        for j in range(rows.shape[1]):
            diff = np.float64(rows[c, j]) - mu[j]
            total += diff * diff
        out[c] = np.sqrt(total)

"""The pruned greedy (bigprune/kcenter.py, bigprune/targetgroups.py, bigprune/kernels/kcenter.py)
against brute force, published approximation bounds and a plain numpy greedy."""
from itertools import combinations

import numpy as np
import pytest
from scipy.spatial.distance import cdist

from bigprune.selection import kcenter as kc
from bigprune.selection import targetgroups
from bigprune.selection.kcenter import cover, greedy
from bigprune.common.runtime import set_threads


@pytest.fixture(autouse=True)
def one_thread():
    """Thread start-up would dominate these tiny cases on a small shared machine."""
    set_threads(1)
    yield
    set_threads(None)


def plain_greedy(targets, candidates, k, initial=(), allowed=None):
    """Unpruned k-supplier greedy with the same set-aside rule, all in numpy (float64); the
    nearest candidate is searched among ``allowed`` rows only when given."""
    t64, c64 = targets.astype(np.float64), candidates.astype(np.float64)
    dist = np.full(len(t64), np.inf)
    active = np.ones(len(t64), dtype=bool)
    chosen = list(initial)
    for c in chosen:
        dist = np.minimum(dist, np.sqrt(((t64 - c64[c]) ** 2).sum(1)))
    while len(chosen) < k:
        key = np.where(active, dist, -1.0)
        t = int(np.argmax(key))
        if key[t] <= 0:
            break
        gaps = ((c64 - t64[t]) ** 2).sum(1)
        if allowed is not None:
            gaps[~np.isin(np.arange(len(c64)), allowed)] = np.inf
        c = int(np.argmin(gaps))
        active[t] = False
        if c in chosen:
            continue
        chosen.append(c)
        dist = np.minimum(dist, np.sqrt(((t64 - c64[c]) ** 2).sum(1)))
    return np.array(chosen), dist


def plain_farthest_first(points, k, initial):
    """Gonzalez's farthest-first traversal in numpy (float64), lowest index on ties."""
    p64 = points.astype(np.float64)
    chosen = list(initial)
    dist = np.full(len(p64), np.inf)
    for c in chosen:
        dist = np.minimum(dist, np.sqrt(((p64 - p64[c]) ** 2).sum(1)))
    while len(chosen) < k:
        c = int(np.argmax(np.where(np.isin(np.arange(len(p64)), chosen), -1.0, dist)))
        chosen.append(c)
        dist = np.minimum(dist, np.sqrt(((p64 - p64[c]) ** 2).sum(1)))
    return np.array(chosen), dist


def blobs(rng, count, d, centres, spread=0.5):
    """Points around a few centres, so that clustering and pruning have something to do."""
    return (centres[rng.integers(0, len(centres), count)]
            + rng.normal(scale=spread, size=(count, d))).astype(np.float32)


@pytest.mark.parametrize("k", [2, 3])
def test_kcenter_radius_within_three_times_optimum(k):
    # Hochbaum & Shmoys (1986): the k-supplier greedy's radius is at most 3x the optimum.
    # Optimum by brute force over all k-subsets of candidates (scipy cdist distances).
    rng = np.random.default_rng(k)
    worst = 0.0
    for _ in range(25):
        candidates = rng.normal(size=(12, 2)).astype(np.float32)
        targets = rng.normal(size=(15, 2)).astype(np.float32) * 1.5
        d = cdist(targets, candidates)
        optimum = min(d[:, list(s)].min(1).max() for s in combinations(range(12), k))
        radius = greedy(targets, candidates, k, exact=True).dist.max()
        assert radius <= 3 * optimum + 1e-9
        worst = max(worst, radius / optimum)
    assert worst > 1.0  # the instances are not trivially solved: the bound is what is tested


@pytest.mark.parametrize("k", [2, 3])
def test_kcenter_pool_radius_within_twice_optimum(k):
    # Gonzalez (1985): farthest-first traversal is a 2-approximation of k-center.
    rng = np.random.default_rng(10 + k)
    for trial in range(25):
        points = rng.normal(size=(12, 3)).astype(np.float32)
        d = cdist(points, points)
        optimum = min(d[:, list(s)].min(1).max() for s in combinations(range(12), k))
        start = [int(rng.integers(12))]
        radius = greedy(None, points, k, initial=start, pool_targets=True).dist.max()
        assert radius <= 2 * optimum + 1e-9


@pytest.mark.parametrize("m,n,d,k,spread", [(15, 12, 2, 5, 0.5), (400, 300, 8, 40, 0.5),
                                            (1500, 900, 16, 120, 0.5), (2000, 1000, 2, 150, 3.0)])
@pytest.mark.parametrize("seeded", [False, True])
@pytest.mark.parametrize("threads", [1, 2])
def test_pruned_greedy_equals_plain_greedy(m, n, d, k, spread, seeded, threads):
    # reference: plain_greedy above, an unpruned numpy implementation of the same rule
    set_threads(threads)
    rng = np.random.default_rng(m + n)
    centres = rng.normal(scale=4.0, size=(6, d))
    targets, candidates = blobs(rng, m, d, centres, spread), blobs(rng, n, d, centres, spread)
    initial = [3, 1] if seeded else []
    out = greedy(targets, candidates, k, initial=initial, exact=True)
    picks, dist = plain_greedy(targets, candidates, k, initial)
    np.testing.assert_array_equal(out.order, picks)
    np.testing.assert_allclose(out.dist, dist, rtol=1e-12, atol=1e-12)
    assert out.dist.max() == pytest.approx(dist.max(), rel=1e-12)
    if m > 100:
        assert out.stats["skipped"] > 0.2  # the pruning did skip work, yet changed nothing


def test_distances_and_assignment_match_cdist():
    # reference: scipy.spatial.distance.cdist, min and argmin over the chosen candidates
    rng = np.random.default_rng(3)
    centres = rng.normal(scale=4.0, size=(5, 6))
    targets, candidates = blobs(rng, 700, 6, centres), blobs(rng, 400, 6, centres)
    out = greedy(targets, candidates, 30, exact=True)
    d = cdist(targets.astype(np.float64), candidates[out.order].astype(np.float64))
    np.testing.assert_allclose(out.dist, d.min(1), rtol=1e-12)
    np.testing.assert_array_equal(out.assign, d.argmin(1))
    np.testing.assert_allclose(out.trace[-1], d.min(1).max(), rtol=1e-12)
    dist, assign = cover(targets, candidates[out.order])
    np.testing.assert_allclose(dist, d.min(1), rtol=1e-12)
    np.testing.assert_array_equal(assign, d.argmin(1))


def test_pool_mode_equals_plain_farthest_first():
    # reference: plain_farthest_first above (Gonzalez's traversal in numpy)
    rng = np.random.default_rng(4)
    points = blobs(rng, 800, 5, rng.normal(scale=4.0, size=(7, 5)))
    out = greedy(None, points, 60, initial=[17], pool_targets=True)
    picks, dist = plain_farthest_first(points, 60, [17])
    np.testing.assert_array_equal(out.order, picks)
    np.testing.assert_allclose(out.dist, dist, rtol=1e-12)


def test_fill_continues_farthest_first_once_targets_are_served():
    # Three targets are served by at most three picks; the rest must follow Gonzalez's
    # traversal over the candidates from the chosen set (reference: plain_farthest_first).
    rng = np.random.default_rng(5)
    candidates = rng.normal(size=(20, 3)).astype(np.float32)
    targets = rng.normal(size=(3, 3)).astype(np.float32)
    out = greedy(targets, candidates, 8, exact=True)
    served, _ = plain_greedy(targets, candidates, 8)
    assert len(served) <= 3 and out.stats["filled"] == 8 - len(served)
    picks, _ = plain_farthest_first(candidates, 8, list(served))
    np.testing.assert_array_equal(out.order, picks)
    np.testing.assert_allclose(out.dist, cdist(targets, candidates[picks]).min(1), rtol=1e-6)


def test_certified_ivf_search_gives_the_exact_greedy(monkeypatch):
    # reference: plain_greedy (exact nearest candidate by numpy argmin) and cdist distances
    monkeypatch.setattr(kc, "FLAT_MAX", 500)
    rng = np.random.default_rng(6)
    centres = rng.normal(scale=4.0, size=(8, 8))
    targets, candidates = blobs(rng, 600, 8, centres), blobs(rng, 3000, 8, centres)
    out = greedy(targets, candidates, 50, seed=1)
    assert out.stats["index"] == "ivf" and out.stats["recall"] == 1.0
    picks, dist = plain_greedy(targets, candidates, 50)
    np.testing.assert_array_equal(out.order, picks)
    d = cdist(targets.astype(np.float64), candidates[out.order].astype(np.float64))
    np.testing.assert_allclose(out.dist, d.min(1), rtol=1e-12)


@pytest.mark.parametrize("initial", [[], [7, 2]])
def test_radius_mode_stops_at_the_shortest_prefix(initial):
    # reference: plain_greedy (numpy) run to the end; cdist radius of each of its prefixes
    rng = np.random.default_rng(8)
    centres = rng.normal(scale=4.0, size=(6, 4))
    targets, candidates = blobs(rng, 500, 4, centres), blobs(rng, 300, 4, centres)
    picks, _ = plain_greedy(targets, candidates, 300, initial)
    d = cdist(targets.astype(np.float64), candidates[picks].astype(np.float64))
    radii = np.minimum.accumulate(d, axis=1).max(0)  # radius after each prefix
    goal = 0.5 * (radii[39] + radii[40])
    out = greedy(targets, candidates, len(candidates), initial=initial, exact=True, radius=goal)
    shortest = int(np.argmax(radii <= goal)) + 1
    np.testing.assert_array_equal(out.order, picks[:shortest])
    assert out.dist.max() <= goal < radii[shortest - 2]


def test_allowed_candidates_restrict_the_picks():
    # reference: plain_greedy with the nearest candidate searched among the allowed rows only,
    # and Gonzalez's traversal (plain_farthest_first) over the allowed points plus the start
    rng = np.random.default_rng(9)
    centres = rng.normal(scale=4.0, size=(5, 3))
    targets, candidates = blobs(rng, 300, 3, centres), blobs(rng, 200, 3, centres)
    allowed = np.flatnonzero(rng.random(200) < 0.3)
    start = [int(i) for i in np.setdiff1d(np.arange(200), allowed)[:6]]
    out = greedy(targets, candidates, 16, initial=start, exact=True, allowed=allowed)
    picks, dist = plain_greedy(targets, candidates, 16, start, allowed)
    np.testing.assert_array_equal(out.order, picks)
    np.testing.assert_allclose(out.dist, dist, rtol=1e-12)
    assert np.isin(out.order[6:], allowed).all()
    out = greedy(None, candidates, 16, initial=start, pool_targets=True, allowed=allowed)
    rows = np.concatenate([start, allowed])
    picks, _ = plain_farthest_first(candidates[rows], 16, list(range(6)))
    np.testing.assert_array_equal(out.order, rows[picks])


def test_known_coverage_of_the_initial_picks_gives_the_same_greedy():
    # reference: plain_greedy (numpy) from the same initial picks; cdist for dist and assign
    rng = np.random.default_rng(10)
    centres = rng.normal(scale=4.0, size=(5, 4))
    targets, candidates = blobs(rng, 400, 4, centres), blobs(rng, 250, 4, centres)
    start = [11, 40, 3]
    out = greedy(targets, candidates, 20, initial=start, exact=True,
                 covered=cover(targets, candidates[start]))
    picks, dist = plain_greedy(targets, candidates, 20, start)
    np.testing.assert_array_equal(out.order, picks)
    d = cdist(targets.astype(np.float64), candidates[picks].astype(np.float64))
    np.testing.assert_allclose(out.dist, d.min(1), rtol=1e-12)
    np.testing.assert_array_equal(out.assign, d.argmin(1))
    assert np.isnan(out.trace[:2]).all() and out.trace[-1] == pytest.approx(d.min(1).max())


@pytest.mark.parametrize("chunk_rows,group_rows", [(1, 1), (37, 5), (5000, 4096)])
def test_targets_kept_on_disk_give_the_same_greedy(tmp_path, chunk_rows, group_rows):
    # reference: plain_greedy (numpy) and cdist distances; the on-disk path reads targets in
    # chunks, writes them sorted by group to a scratch file and reads groups back with pread
    rng = np.random.default_rng(11)
    centres = rng.normal(scale=4.0, size=(6, 8))
    targets, candidates = blobs(rng, 900, 8, centres), blobs(rng, 500, 8, centres)
    source = kc.RowChunks(targets.shape, lambda at: targets[at], chunk_rows, tmp_path, group_rows)
    out = greedy(source, candidates, 60, initial=[4, 9], exact=True)
    picks, dist = plain_greedy(targets, candidates, 60, [4, 9])
    np.testing.assert_array_equal(out.order, picks)
    np.testing.assert_allclose(out.dist, dist, rtol=1e-12)
    memory = greedy(targets, candidates, 60, initial=[4, 9], exact=True)
    np.testing.assert_array_equal(out.assign, memory.assign)
    np.testing.assert_array_equal(out.dist, memory.dist)
    assert out.stats["target_bytes_read"] > 0
    d = cdist(targets.astype(np.float64), candidates[picks].astype(np.float64))
    dist, assign = cover(source, candidates[picks])
    np.testing.assert_allclose(dist, d.min(1), rtol=1e-12)
    np.testing.assert_array_equal(assign, d.argmin(1))
    assert list(tmp_path.iterdir()) == []  # the sorted copy is removed


def test_many_queued_centres_are_screened_exactly(monkeypatch):
    # reference: scipy.spatial.distance.cdist min and argmin (ties to the earlier centre);
    # duplicated centres make exact ties that the product screen must resolve like one-at-a-time
    rng = np.random.default_rng(12)
    targets = rng.normal(size=(700, 16)).astype(np.float32) * 3
    centres = rng.normal(size=(300, 16)).astype(np.float32) * 3
    centres[150:] = centres[:150]
    d = cdist(targets.astype(np.float64), centres.astype(np.float64))
    for limit in (0, 10**6):  # all screened, or all one at a time
        monkeypatch.setattr(targetgroups, "SCALAR_MAX", limit)
        dist, assign = cover(targets, centres)
        np.testing.assert_allclose(dist, d.min(1), rtol=1e-12)
        np.testing.assert_array_equal(assign, d.argmin(1))

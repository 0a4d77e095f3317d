"""select through a Dask cluster: ``kcenter`` and ``kmedian`` by the two-round composable scheme.

Round 1: the targets are split into ``P`` parts by k-means (:mod:`bigprune.selection.parts`);
one task per part runs the rule on a worker over that part's targets, with every pool node a
candidate and the whole budget ``k`` (the include list first, the class quotas met; without
either, at most one pick per target of the part: each target then has its nearest candidate,
and more picks would only spread over the pool), and returns its picks. Round 2, on the client: the same rule again, over every target, with the union of the
parts' picks as its candidates; so the selection has exactly ``k`` picks and keeps the include
list and quotas as on one server (each part's picks meet the quotas, so the union can).

Bounds (no include list, no quotas; OPT is the best of ``k`` pool nodes for all the targets):

- ``kcenter`` (k-supplier): radius <= 5 OPT, and <= R1 + 2 OPT where R1, the largest radius of a
  part's picks over its targets, is in the report. Malkomes, Kusner, Chen, Weinberger & Moseley
  (2015) keep k centres per part and get 4 OPT for k-center; here candidates are not targets, so
  round 1's greedy gives R1 <= 3 OPT (Hochbaum & Shmoys), and in round 2 the k + 1 targets the
  greedy visits are pairwise farther than radius - R1 apart, while two of them share an optimal
  centre (<= 2 OPT apart).
- ``kmedian`` (greedy facility location, f(S) = sum_t (L_t - d(t, S)), L_t the target's farthest
  candidate): f >= (1 - 1/e)^2 / P of the best k-set's f, GreeDi's bound (Mirzasoleiman, Karbasi,
  Sarkar & Krause, 2013) with the P parts in place of its machines. f sums over targets, so each
  part's greedy gets (1 - 1/e) of its share of the best set's f, the union gets (1 - 1/e) of it
  all, some k of the union's <= P k picks get 1/P of that (submodularity), and round 2's greedy
  (1 - 1/e) of those. Holds when the parts' and the merge's neighbour lists hold every candidate
  (:func:`bigprune.selection.kmedian.plan_neighbours`); with shorter lists each greedy is exact
  on the lists it was given, as on one server.

Every other rule runs on the client, unchanged (the same picks as without a cluster).
"""
import dataclasses
from pathlib import Path

import numpy as np

from ..common.runtime import set_quiet, set_threads
from .parts import count_parts, split_targets
from .strategies import STRATEGIES, Problem

BOUNDS = {
    "kcenter": "radius <= 5 x optimum, and <= coreset_radius + 2 x optimum (k-supplier greedy "
               "with k picks per part, then over their union: Malkomes et al. 2015's scheme); "
               "without include list or quotas",
    "kmedian": "facility-location objective >= (1 - 1/e)^2 / parts x the best k-set's (GreeDi, "
               "Mirzasoleiman et al. 2013, over parts of the targets); without include list or "
               "quotas, when every neighbour list holds every candidate",
}
RANKS = "ranks the pool by a score per pool node: no per-target work to split"
PROXY = "scores the pool with a proxy model trained on it: no per-target work to split"
ON_CLIENT = {
    "kmeans": "one k-means over a sample of the targets and one pass to assign them: not split yet",
    "kcenter-pool": "its targets are the pool itself (farthest-first): no targets to split",
    "random": RANKS, "stratified": RANKS, "degree": RANKS, "pagerank": RANKS,
    "entropy": PROXY, "el2n": PROXY, "age": PROXY, "ddd": PROXY, "influence": PROXY,
}
RADIUS = "radius mode: the fewest picks reaching a radius leaves no fixed budget to give each part"
FEW_TARGETS = "fewer than 2 targets: nothing to split"


def distributes(strategy, radius=None):
    """Whether select through a cluster splits this rule into parts (its picks may then differ
    from one server's); every other rule gives one server's picks."""
    return strategy in BOUNDS and radius is None


def cluster_rule(client, strategy, radius, memory, scratch, label_path):
    """The rule as select runs it through ``client``: a function Problem -> Choice whose info
    carries the report's ``"distributed"`` entry.

    memory : bytes each worker may hold. scratch : a directory in the store's staging area (the
    one place every worker is known to see), for the pool's and the parts' target lists.
    label_path : the graph's ``label.npy``.
    """
    from ..cluster.tasks import worker_count

    workers = worker_count(client)

    def rule(problem):
        reason = (ON_CLIENT.get(strategy, RADIUS) if not distributes(strategy, radius)
                  else FEW_TARGETS if len(problem.targets) < 2 else None)
        if reason is not None:
            choice = STRATEGIES[strategy](problem)
            return choice._replace(info={**(choice.info or {}), "distributed": False, "on_client": {
                "workers": workers, "parts": 1, "reason": reason}})
        return _two_rounds(client, strategy, workers, memory, Path(scratch), label_path, problem)

    return rule


def _two_rounds(client, strategy, workers, memory, scratch, label_path, problem):
    """Round 1 as one task per part, round 2 here; the Choice of round 2."""
    from ..cluster.tasks import run_tasks

    targets, width = len(problem.targets), np.load(problem.embedding, mmap_mode="r").shape[1]
    part = split_targets(problem.read_targets, targets, width,
                         count_parts(workers, targets, problem.k), problem.window_rows)
    np.save(scratch / "pool.npy", problem.pool)
    sizes = []
    for p in np.unique(part):  # parts in centroid order; an empty one is dropped
        np.save(scratch / f"part-{len(sizes)}.npy", problem.targets[part == p])
        sizes.append(int(np.sum(part == p)))
    del part
    constrained = len(problem.initial) > 0 or bool(problem.quota)
    picks = [problem.k if constrained else min(problem.k, size) for size in sizes]
    spec = {"scratch": str(scratch), "embedding": str(problem.embedding), "label": str(label_path),
            "strategy": strategy, "initial": problem.initial, "quota": dict(problem.quota),
            "seed": problem.seed, "memory": int(memory)}
    found = run_tasks(client, part_picks, [(spec, p, k) for p, k in enumerate(picks)],
                      desc=f"select {strategy} parts", unit="part")
    union = np.unique(np.concatenate([problem.initial, *(chosen for chosen, _ in found)]))
    merge = dataclasses.replace(problem, pool=union)
    choice = STRATEGIES[strategy](merge)
    facts = {"parts": len(sizes), "workers": workers, "part_targets": sizes, "part_picks": picks,
             "merge_candidates": int(len(union)), "bound": BOUNDS[strategy]}
    if strategy == "kcenter":
        facts["coreset_radius"] = max(radius for _, radius in found)
    return choice._replace(info={**(choice.info or {}), "distributed": facts})


def part_picks(spec, part, k):
    """On a worker: ``k`` picks by the rule over part ``part``'s targets, every pool node a
    candidate.

    Returns (picks int64, dense indices; the largest distance of a part target to them, or None
    when the rule does not measure it)."""
    from ..cluster.tasks import worker_threads
    from .select import plan_rule

    set_threads(worker_threads())
    set_quiet(True)  # the client's bar counts the parts
    scratch = Path(spec["scratch"])
    pool, targets = np.load(scratch / "pool.npy"), np.load(scratch / f"part-{part}.npy")
    label = np.load(spec["label"])
    strategy = spec["strategy"]
    width = np.load(spec["embedding"], mmap_mode="r").shape[1]
    chunk, window_rows, proxy_rows, rule_bytes = plan_rule(
        spec["memory"], strategy, len(pool), len(targets), k, width, len(np.unique(label[pool])))
    if chunk is not None:
        rows = scratch / f"rows-{part}"  # this part's sorted copy of its target rows
        rows.mkdir(exist_ok=True)
        chunk = (*chunk, rows)
    problem = Problem(None, pool, targets, k, spec["initial"], spec["seed"], spec["embedding"],
                      window_rows, label, spec["quota"], None, proxy_rows, chunk, rule_bytes)
    choice = STRATEGIES[strategy](problem)
    radius = None if choice.outcome is None else float(choice.outcome.dist.max())
    return choice.order, radius

"""The select stage: pick training nodes, write the selection and its report.

``select()`` validates everything and plans memory; ``_select()`` trusts its inputs and works.
"""
import math
import os
import shutil
import time
import uuid
from pathlib import Path

import numpy as np

from ..common.errors import BudgetError, InputError
from ..common.ids import lookup, lookup_in, read_id_file, store_ids
from ..common.jsonout import dumps
from ..common.options import FLAGS, read_budget
from ..common.memory import FIXED_OVERHEAD, format_size, parse_size, peak_rss, rows_per_chunk, working_memory
from ..common.classes import class_names
from .report import CAUTION, changes, class_counts, coverage, describer, diagnostics, ranking_profile
from ..common.runtime import set_threads
from .kcenter import GROUP_ROWS, PRODUCT_ITEMS, cover
from ..common.schema import NO_LABEL, NO_SPLIT, SPLIT_CODES
from ..common.store import STAGING, Store
from .hardness import DDD_MEMBERS
from ..common.store import reads_store
from ..common.faults import fault
from ..common.tempfiles import sweep_temps
from .strategies import NEEDS_POOL_ROWS, NEEDS_PROXY, STRATEGIES, Problem

# Which nodes each ``--targets`` choice means: split codes.
TARGETS = {"test": SPLIT_CODES["test"], "valid": SPLIT_CODES["valid"], "unlabeled": NO_SPLIT}
# Float64 copies of a feature chunk the proxy holds at once (standardized rows, logits, grads).
PROXY_ROW_COPIES = 4


@reads_store
def select(store, strategy, budget=None, targets="test", seed=0, out=None, memory_budget="4GiB",
           threads=None, embedding_hop=None, initial=None, include=None, exclude=None,
           min_per_class=None, radius=None, cover=None, ensemble=None, client=None):
    """Choose ``budget`` training-pool nodes with ``strategy`` and report what they cover.

    Parameters
    ----------
    store : Store or path, with committed graph and propagate stages.
    strategy : str, one of ``STRATEGIES``.
    budget : float in (0, 1] (a share of the training pool, before any exclusion) or int >= 1
        (a count); text follows the same rule (``"0.05"``, ``"5%"``, ``"1.0"`` are fractions,
        ``"1"``, ``"5000"`` counts: :mod:`bigprune.common.options`). Required unless ``radius``.
    targets : ``"test"``, ``"valid"`` or ``"unlabeled"`` (nodes with no split).
    seed : int. out : path ending in ``.parquet`` outside the store, or None (nothing written).
    memory_budget : size such as ``"4GiB"``. threads : int or None (all available cores).
    embedding_hop : int or None; distances use ``hop_<h>`` (0 = input features), default the last.
    initial : sequence of node ids (the user's ids) of pool nodes chosen first, or None.
    include : path of a Parquet file with a ``node_id`` column (e.g. an earlier selection): these
        pool nodes are kept and chosen first (the greedy's starting centres). Not with ``initial``.
    exclude : path, same format: these nodes are never chosen (ids of graph nodes outside the
        training pool are allowed and counted).
    min_per_class : int >= 1, or a fraction (0, 1] of the budget (rounded up), by the budget's
        rule: each class of the pool gets at least that many picks, capped at its pool size.
    radius : float >= 0 or None; ``kcenter`` only, instead of ``budget``: the fewest greedy picks
        that bring every target within ``radius`` (plus any quota picks).
    cover : share of the targets in (0, 1] (a float, or text such as ``"0.95"`` or ``"95%"``),
        with ``radius`` only: the fewest greedy picks that bring that share within ``radius``.
    ensemble : even int >= 2 or None; ``ddd`` only: the proxies in its ensemble (default
        :data:`bigprune.selection.hardness.DDD_MEMBERS`).
    client : ``distributed.Client`` or None. With one, ``kcenter`` and ``kmedian`` run as the
        two-round composable scheme over the cluster (:mod:`bigprune.selection.composable`;
        the picks may differ from one server's, within the bound it states); every other rule
        runs here unchanged. The report's ``"distributed"`` says which, over how many parts.

    Returns
    -------
    dict : the report (also written beside ``out`` as ``.json``) plus ``"indices"``, an int64
    array of the selected dense indices in the order chosen.
    """
    started = time.perf_counter()
    store = store if isinstance(store, Store) else Store(store)
    if client is not None:
        from ..cluster.connect import check_store

        check_store(client, store.path)
    if strategy not in STRATEGIES:
        raise InputError(f"--strategy {strategy}: unknown; use one of {', '.join(STRATEGIES)}")
    if targets not in TARGETS:
        raise InputError(f"--targets {targets}: unknown; use one of {', '.join(TARGETS)}")
    radius = check_radius(radius, strategy, budget)
    cover = check_cover(cover, radius)
    ensemble = check_ensemble(ensemble, strategy)
    if include is not None and initial is not None:
        raise InputError(f"--include {include}: give either an include file or initial ids, not both")
    out = _check_out(out, store)
    memory = parse_size(memory_budget)
    threads = set_threads(threads)
    split = store.load("graph", "split", mmap=False)
    label = store.load("graph", "label", mmap=False)
    hops = int(store.entry("propagate")["params"]["hops"])
    hop = hops if embedding_hop is None else _check_hop(embedding_hop, hops)
    whole_pool = np.flatnonzero((split == SPLIT_CODES["train"]) & (label != NO_LABEL)).astype(np.int64)
    if len(whole_pool) == 0:
        raise InputError(f"--store {store.path}: no labelled node has split train, so the training "
                         f"pool is empty; mark training nodes in the node table's split column")
    chosen_targets = np.flatnonzero(split == TARGETS[targets]).astype(np.int64)
    if len(chosen_targets) == 0:
        others = ", ".join(t for t in TARGETS if t != targets)
        raise InputError(f"--targets {targets}: no node is in this set; choose another ({others})")
    _check_computed(store, hop, np.concatenate([whole_pool, chosen_targets]), targets)
    pool, k, start, quota, constraints = _constrain(
        store, label, whole_pool, budget, radius, initial, include, exclude, min_per_class)
    if cover is not None:
        constraints["cover"] = cover
    embedding = (store.stage_dir("graph") / "features.npy" if hop == 0
                 else store.stage_dir("propagate") / f"hop_{hop}.npy")
    width = np.load(embedding, mmap_mode="r").shape[1]
    classes = len(np.unique(label[pool]))
    chunk, window_rows, proxy_rows, rule_bytes = plan_rule(
        memory, strategy, len(pool), len(chosen_targets), k, width, classes)
    scratch = None
    if chunk is not None or client is not None:  # the cluster's tasks read their parts there
        scratch = store.path / STAGING / f"select-{os.getpid()}-{uuid.uuid4().hex[:8]}"
        scratch.mkdir(parents=True)
    if chunk is not None:
        chunk = (*chunk, scratch)
    given = None if radius is not None else {**read_budget(budget).describe(), "picks": int(k)}
    extra = {"budget": given, "target_split": targets, "embedding": f"hop_{hop}", "metric": "L2",
             "threads": threads, "constraints": constraints,
             "targets_in_memory": chunk is None}
    try:
        problem = Problem(store, pool, chosen_targets, k, start, int(seed), embedding, window_rows,
                          label, quota, radius, proxy_rows, chunk, rule_bytes, cover=cover,
                          ensemble=ensemble)
        rule = STRATEGIES[strategy]
        if client is not None:
            from .composable import cluster_rule

            rule = cluster_rule(client, strategy, radius, memory, scratch,
                                store.stage_dir("graph") / "label.npy")
        return _select(problem, strategy, label, out, started, extra, rule)
    finally:
        if scratch is not None:
            shutil.rmtree(scratch, ignore_errors=True)


def _constrain(store, label, whole_pool, budget, radius, initial, include, exclude, min_per_class):
    """Apply the exclude list, the budget, the include list and the quotas, checked together.

    Returns (pool, k, start, quota, constraints): the candidates left, the pick count (the
    pool size in radius mode), the must-include nodes, ``{class: minimum}`` and the report's
    record of what was applied.
    """
    known = store_ids(store)
    checked = check_constraints(known, label, whole_pool, budget, radius, include, exclude,
                                min_per_class)
    pool, k, start, quota, constraints = checked
    if include is None:
        start = _initial_nodes(store, initial, pool, k)
    return pool, k, start, quota, constraints


def check_constraints(known, label, whole_pool, budget, radius, include, exclude, min_per_class,
                      names=FLAGS):
    """Every check of a selection's options that needs only ids, labels and the pool.

    known : the graph's node ids (Arrow array), row ``i`` for dense index ``i``. label : int64
    per row. whole_pool : sorted dense indices of the training pool. ``names`` words the errors
    (command-line flags, or a job file's entry). Returns (pool, k, start, quota, constraints).
    """
    constraints = {}
    pool = whole_pool
    if exclude is not None:
        pool, constraints["exclude"] = _excluded(known, exclude, whole_pool, names)
    budget_mode = radius is None
    k = parse_budget(budget, len(whole_pool), names) if budget_mode else len(pool)
    if k > len(pool):
        raise InputError(f"{names.label('budget', budget)}: {k} picks, but only {len(pool)} pool "
                         f"nodes remain after {names.label('exclude', exclude)}; use at most "
                         f"{len(pool)}")
    start = np.zeros(0, dtype=np.int64)
    if include is not None:
        start = _included(known, include, whole_pool, pool, exclude, k if budget_mode else None, names)
        constraints["include"] = {"file": str(include), "nodes": int(len(start))}
    quota = {}
    if min_per_class is not None:
        quota, given = _quotas(min_per_class, k if budget_mode else None, label[pool], label[start], names)
        constraints["min_per_class"] = {"given": given, "counts": {
            str(c): q for c, q in quota.items()}}
    if not budget_mode:
        constraints["radius"] = radius
    return pool, k, start, quota, constraints


def parse_budget(budget, pool, names=FLAGS):
    """The number of nodes to pick out of ``pool`` by the budget rule (:mod:`..common.options`)."""
    k = read_budget(budget, "budget", names).picks(pool)
    if k > pool:
        raise InputError(f"{names.label('budget', budget)}: larger than the training pool ({pool} "
                         f"nodes); use at most {pool} or a fraction such as 1.0")
    return k


def parse_quota(value, k, names=FLAGS):
    """Per-class minimum from a count or a fraction of the budget ``k`` (rounded up), by the
    budget rule; ``k`` is None in radius mode, where only a count makes sense."""
    quota = read_budget(value, "min_per_class", names)
    if quota.count is not None:
        return quota.count, quota.describe()
    if k is None:
        raise InputError(f"{names.label('min_per_class', value)}: a fraction of the budget needs "
                         f"{names.hint('budget')}; with {names.hint('radius')} give a whole count")
    return max(1, math.ceil(quota.fraction * k - 1e-9)), quota.describe()


def _quotas(value, k, pool_labels, include_labels, names=FLAGS):
    """``{class: minimum}`` for every class of the pool, checked against the budget ``k``, and
    the quota as given (``Budget.describe``)."""
    per_class, given = parse_quota(value, k, names)
    classes, sizes = np.unique(pool_labels, return_counts=True)
    included = dict(zip(*np.unique(include_labels, return_counts=True)))

    def picks(q):  # the budget the quotas and the include list take together
        return sum(max(min(q, int(n)), int(included.get(c, 0))) for c, n in zip(classes, sizes))

    if k is not None and picks(per_class) > k:
        # quotas above the largest class all cost the same: no need to try them
        best = max((q for q in range(min(per_class, int(sizes.max()) + 1)) if picks(q) <= k),
                   default=0)
        raise_it = f"raise {names.hint('budget')}"
        fix = f"use at most {best} or {raise_it}" if best >= 1 else raise_it
        raise InputError(f"{names.label('min_per_class', value)}: {len(classes)} classes need "
                         f"{picks(per_class)} picks{' with the include list' if included else ''}, "
                         f"more than the budget {k}; {fix}")
    return {int(c): min(per_class, int(n)) for c, n in zip(classes, sizes)}, given


def check_radius(radius, strategy, budget, names=FLAGS):
    """The radius as a float (None in budget mode), checked against the other options."""
    if radius is None:
        if budget is None:
            raise InputError(f"{names.hint('budget')}: required (a fraction of the training pool "
                             f"or a count) unless {names.hint('radius')} is given with "
                             f"{names.hint('strategy')} kcenter")
        return None
    try:
        value = float(radius) if not isinstance(radius, bool) else math.nan
    except (TypeError, ValueError):
        value = math.nan
    label = names.label("radius", radius)
    if not math.isfinite(value) or value < 0:
        raise InputError(f"{label}: use a distance >= 0 in the embedding's units "
                         f"(a report's coverage radius shows the scale)")
    if strategy != "kcenter":
        raise InputError(f"{label}: only {names.hint('strategy')} kcenter has a radius mode; use "
                         f"kcenter or give {names.hint('budget')} instead")
    if budget is not None:
        raise InputError(f"{label}: give {names.hint('budget')} or {names.hint('radius')}, not "
                         f"both; the radius mode picks as many nodes as it needs")
    return value


def check_cover(cover, radius, names=FLAGS):
    """The share of targets ``cover`` asks for, as a float in (0, 1], or None (every one)."""
    if cover is None:
        return None
    text = str(cover).strip()
    try:
        value = float(text[:-1]) / 100 if text.endswith("%") else float(text)
    except ValueError:
        value = math.nan
    label = names.label("cover", cover)
    if isinstance(cover, bool) or not 0 < value <= 1:
        raise InputError(f"{label}: use a share of the targets in (0, 1], e.g. 0.95 or 95%")
    if radius is None:
        raise InputError(f"{label}: goes with {names.hint('radius')} (the share of targets to "
                         f"bring within it); give {names.hint('radius')} R too")
    return value


def check_ensemble(ensemble, strategy, names=FLAGS):
    """``ddd``'s ensemble size: an even count >= 2, or the default when None."""
    if ensemble is None:
        return DDD_MEMBERS
    label = names.label("ensemble", ensemble)
    if strategy != "ddd":
        raise InputError(f"{label}: only {names.hint('strategy')} ddd has an ensemble; drop the "
                         f"option or use ddd")
    try:
        value = int(str(ensemble).strip()) if not isinstance(ensemble, (bool, float)) else 0
    except ValueError:
        value = 0
    if value < 2 or value % 2:
        raise InputError(f"{label}: use an even count >= 2 (members come in pairs "
                         f"trained on complementary halves of the pool)")
    return int(value)


def _check_out(out, store):
    if out is None:
        return None
    path = Path(out)
    if path.suffix != ".parquet":
        raise InputError(f"--out {out}: must end in .parquet")
    resolved, root = path.resolve(), store.path.resolve()
    if resolved == root or root in resolved.parents:
        raise InputError(f"--out {out}: inside the store directory {store.path}; write it elsewhere")
    if not resolved.parent.is_dir():
        raise InputError(f"--out {out}: directory {path.parent} does not exist")
    return resolved


def _check_computed(store, hop, rows, targets):
    """Refuse rows a restricted propagation (``--restrict``) did not compute at ``hop``."""
    path = store.stage_dir("propagate") / "computed_through.npy"
    if hop == 0 or not path.exists():
        return
    if np.any(np.load(path)[rows] < hop):
        raise InputError(f"--targets {targets}: propagate computed hop {hop} only for the training pool "
                         "and the valid and test splits (--restrict); rerun bigprune propagate --no-restrict")


def _check_hop(hop, hops):
    if isinstance(hop, bool) or not isinstance(hop, (int, np.integer)) or not 0 <= hop <= hops:
        raise InputError(f"--embedding-hop {hop}: the propagate stage holds hops 0 to {hops}; "
                         f"use one of those or rerun bigprune propagate with more hops")
    return int(hop)


def _initial_nodes(store, initial, pool, k):
    """Dense indices of the user's ``initial`` ids, which must be distinct pool nodes."""
    if initial is None:
        return np.zeros(0, dtype=np.int64)
    import pyarrow as pa

    wanted, dense = lookup(store, pa.array(list(initial)), "initial=", "(ids given in Python)")
    outside = (dense < 0) | ~np.isin(dense, pool)
    if outside.any():
        raise InputError(f"--initial: node {wanted[int(np.argmax(outside))].as_py()} is not in the "
                         f"training pool; give ids of nodes with split train and a label")
    if len(np.unique(dense)) != len(dense) or len(dense) > k:
        raise InputError(f"--initial: {len(dense)} ids given; use at most {k} (the budget) "
                         f"distinct pool nodes")
    return dense


def _node_file(known, path, key, names):
    """The ``node_id`` column of the Parquet file ``path`` cast to the graph's id type, and the
    dense index of each id in ``known`` (-1 where the graph has no such node)."""
    option = names.hint(key) if names.where is None else f"{names.where} {key} ="
    return lookup_in(known, read_id_file(path, option).column("node_id"), option, path)


def _included(known, path, whole_pool, pool, exclude, k, names):
    """Dense indices, in file order, of the must-include nodes (checked against ``k``)."""
    wanted, dense = _node_file(known, path, "include", names)
    label = names.label("include", path)
    bad = (dense < 0) | ~np.isin(dense, whole_pool)
    if bad.any():
        raise InputError(f"{label}: node {wanted[int(np.argmax(bad))].as_py()} is not in "
                         f"the training pool; give ids of nodes with split train and a label")
    banned = ~np.isin(dense, pool)
    if banned.any():
        raise InputError(f"{label}: node {wanted[int(np.argmax(banned))].as_py()} is also "
                         f"in {names.label('exclude', exclude)}; a node cannot be both")
    _, first = np.unique(dense, return_index=True)
    if len(first) != len(dense):
        twice = int(np.setdiff1d(np.arange(len(dense)), first)[0])
        raise InputError(f"{label}: node {wanted[twice].as_py()} appears twice; list each "
                         f"node once")
    if k is not None and len(dense) > k:
        raise InputError(f"{label}: {len(dense)} nodes, more than the budget {k}; raise "
                         f"{names.hint('budget')} to at least {len(dense)} or shorten the file")
    return dense


def _excluded(known, path, whole_pool, names):
    """The pool left after removing the nodes of ``path``, and what the exclusion did."""
    wanted, dense = _node_file(known, path, "exclude", names)
    label = names.label("exclude", path)
    if (dense < 0).any():
        raise InputError(f"{label}: node {wanted[int(np.argmax(dense < 0))].as_py()} is "
                         f"not in the graph; give ids from the node table")
    inside = np.isin(dense, whole_pool)
    pool = np.setdiff1d(whole_pool, dense[inside])
    if len(pool) == 0:
        raise InputError(f"{label}: removes every training pool node; nothing is left "
                         f"to choose")
    removed = len(whole_pool) - len(pool)
    return pool, {"file": str(path), "nodes": int(removed),
                  "outside_pool": int(len(np.unique(dense[~inside])))}


def plan_rule(memory, strategy, pool, targets, k, width, classes):
    """How a rule over ``pool`` candidates and ``targets`` targets fits ``memory`` bytes:
    (None, or (chunk rows, group rows) to keep target rows on disk; rows per embedding window;
    rows per proxy chunk; bytes the rule may hold). Refuses (exit 3) what cannot fit."""
    need, chunk = _plan(memory, strategy, pool, targets, k, width, classes)
    spare = memory - FIXED_OVERHEAD - need
    window_rows = rows_per_chunk(spare // 4, 4 * width, at_least=1024)
    proxy_rows = rows_per_chunk(spare // 4, PROXY_ROW_COPIES * 8 * (width + classes), at_least=1024)
    rule_bytes = memory - FIXED_OVERHEAD - _common_bytes(strategy, pool, k, width, classes)
    return chunk, window_rows, proxy_rows, rule_bytes


def _plan(memory, strategy, pool, targets, k, width, classes):
    """Bytes the stage holds at its peak, and how targets are read: ``(need, None)`` when
    their rows fit in memory, else ``(need, (chunk rows, group rows))`` to keep them on disk.
    Refuses (exit 3) when even the on-disk way does not fit."""
    spare = working_memory(memory, f"select --strategy {strategy}")
    rows = 4 * width
    common = _common_bytes(strategy, pool, k, width, classes)
    need = common + _in_memory_bytes(targets, width)
    if need <= spare:
        return need, None
    group_rows = GROUP_ROWS
    fixed = common + _on_disk_bytes(targets, k, width, group_rows)
    least = fixed + 3 * min(targets, 1024) * rows
    if least > spare:
        raise BudgetError(f"--memory-budget {format_size(memory)} is too small for select --strategy "
                          f"{strategy} with {targets} targets, even with their rows kept on disk: "
                          f"use at least {format_size(least + FIXED_OVERHEAD, up=True)}")
    chunk_rows = min(targets, rows_per_chunk((spare - fixed) // 2, 3 * rows, at_least=1024))
    return fixed + 3 * chunk_rows * rows, (chunk_rows, group_rows)


def _common_bytes(strategy, pool, k, width, classes):
    """Bytes held whatever the targets' way: pool rows (and index), masks, proxy buffers."""
    rows = 4 * width
    need = 16 * pool
    if strategy in NEEDS_POOL_ROWS:
        need += 2 * pool * rows  # the rows, plus the index (or the sorted copy) over them
    else:
        need += k * rows
    if strategy in NEEDS_PROXY:
        need += 4 * 8 * pool * classes + 32 * pool  # probabilities, scores, ranking
    return need


def _in_memory_bytes(targets, width):
    """Target rows plus their sorted copy, and per-target state."""
    return 2 * targets * 4 * width + 48 * targets


def _on_disk_bytes(targets, k, width, group_rows):
    """Per-target state (order, position, distances, bounds, results and the build's labels:
    ~80 bytes), k-means' sample (128 rows per cluster), the queued centres (twice while they
    grow), one group and one product block; chunks of rows come on top."""
    rows = 4 * width
    sample = 128 * int(round(math.sqrt(targets))) * rows
    return 80 * targets + sample + 2 * k * (rows + 16) + group_rows * rows + 4 * PRODUCT_ITEMS


def _select(problem, strategy, label, out, started, extra, rule):
    """Run ``rule`` (``strategy``'s function, or it through the cluster), build the report,
    write the outputs; returns the report."""
    choice = rule(problem)
    order = choice.order
    info = dict(choice.info or {})
    ranking = info.pop("ranking", None)
    if choice.outcome is not None:
        dist, assign = choice.outcome.dist, choice.outcome.assign
    else:
        # rows() wants sorted indices: read them sorted, then put them back in pick order.
        by_node = np.argsort(order)
        rows = np.empty((len(order), problem.target_source.shape[1]), dtype=np.float32)
        rows[by_node] = problem.rows(order[by_node])
        dist, assign = cover(problem.target_source, rows, seed=problem.seed)
    report = {"strategy": strategy, "selected": int(len(order)), "pool": int(len(problem.pool)),
              "targets": int(len(problem.targets)), "seed": problem.seed, **extra}
    report.update(coverage(dist, assign, len(order), asked=problem.radius))
    report["classes"] = class_counts(label[order])
    names = class_names(problem.store)
    if names is not None:  # string labels at ingest: the name of each class id above
        report["class_names"] = {c: names[c] for c in report["classes"]}
    if "include" in extra["constraints"]:
        report["changed"] = changes(order, problem.initial)
    describe = describer(problem.store, problem.pool, problem.window_rows)
    report["diagnostics"] = diagnostics(describe, order, problem.pool)
    if ranking is not None:
        report["preference"] = ranking_profile(describe, ranking, problem.pool)
    report.update(info)
    report["caution"] = CAUTION
    report["seconds"] = round(time.perf_counter() - started, 3)
    report["peak_rss"] = peak_rss()
    if out is not None:
        serves = np.bincount(assign, minlength=len(order))
        _write(out, problem.store, order, label[order], report, choice.reason, serves)
    return {**report, "indices": order}


def _write(out, store, order, labels, report, reason, serves):
    """``out`` (node_id, rank, label, reason, serves) and ``out.json`` (the report), renamed
    into place. reason : why each pick is there; serves : int64, the targets whose nearest
    selected node each pick is."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    ids = store.table("graph", "node_id").column("node_id").take(pa.array(order))
    table = pa.table({"node_id": ids, "rank": np.arange(len(order), dtype=np.int64),
                      "label": labels.astype(np.int64), "reason": pa.array(reason.tolist(), pa.string()),
                      "serves": serves.astype(np.int64)})
    report_path = out.with_suffix(".json")
    sweep_temps(out.parent)  # left by a select killed while writing
    temps = [p.with_name(f".{p.name}.{os.getpid()}.tmp") for p in (out, report_path)]
    placed = []
    try:
        pq.write_table(table, temps[0])
        fault("select", "after-temp-write")
        with open(temps[1], "w") as fh:
            fh.write(dumps(report, indent=2))
        fault("select", "before-rename")
        os.replace(temps[1], report_path)
        placed.append(report_path)
        fault("select", "after-rename")  # the report placed, its selection not yet
        os.replace(temps[0], out)
    except BaseException:
        for path in placed:  # a report without its selection would mislead
            path.unlink(missing_ok=True)
        raise
    finally:
        for temp in temps:
            temp.unlink(missing_ok=True)

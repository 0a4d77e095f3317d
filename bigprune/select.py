"""The select stage: pick training nodes, write the selection and its report.

``select()`` validates everything and plans memory; ``_select()`` trusts its inputs and works.
"""
import json
import math
import os
import time
from pathlib import Path

import numpy as np

from .errors import InputError
from .memory import FIXED_OVERHEAD, parse_size, peak_rss, require, rows_per_chunk
from .report import CAUTION, class_counts, coverage, diagnostics
from .runtime import set_threads
from .kcenter import cover
from .schema import NO_LABEL, NO_SPLIT, SPLIT_CODES
from .store import Store
from .strategies import STRATEGIES, Problem

# Which nodes each ``--targets`` choice means: split codes.
TARGETS = {"test": SPLIT_CODES["test"], "valid": SPLIT_CODES["valid"], "unlabeled": NO_SPLIT}
# Strategies that hold the pool's feature rows (and an index or a sorted copy of them).
NEEDS_POOL_ROWS = {"kcenter", "kcenter-pool"}


def select(store, strategy, budget, targets="test", seed=0, out=None, memory_budget="4GiB",
           threads=None, embedding_hop=None, initial=None):
    """Choose ``budget`` training-pool nodes with ``strategy`` and report what they cover.

    Parameters
    ----------
    store : Store or path, with committed graph and propagate stages.
    strategy : str, one of ``STRATEGIES``.
    budget : float in (0, 1) (a share of the pool) or int >= 1 (a count); strings are parsed.
    targets : ``"test"``, ``"valid"`` or ``"unlabeled"`` (nodes with no split).
    seed : int. out : path ending in ``.parquet`` outside the store, or None (nothing written).
    memory_budget : size such as ``"4GiB"``. threads : int or None (all available cores).
    embedding_hop : int or None; distances use ``hop_<h>`` (0 = input features), default the last.
    initial : sequence of node ids (the user's ids) of pool nodes chosen first, or None.

    Returns
    -------
    dict : the report (also written beside ``out`` as ``.json``) plus ``"indices"``, an int64
    array of the selected dense indices in the order chosen.
    """
    started = time.perf_counter()
    store = store if isinstance(store, Store) else Store(store)
    if strategy not in STRATEGIES:
        raise InputError(f"--strategy {strategy}: unknown; use one of {', '.join(STRATEGIES)}")
    if targets not in TARGETS:
        raise InputError(f"--targets {targets}: unknown; use one of {', '.join(TARGETS)}")
    out = _check_out(out, store)
    memory = parse_size(memory_budget)
    threads = set_threads(threads)
    split = store.load("graph", "split", mmap=False)
    label = store.load("graph", "label", mmap=False)
    hops = int(store.entry("propagate")["params"]["hops"])
    hop = hops if embedding_hop is None else _check_hop(embedding_hop, hops)
    pool = np.flatnonzero((split == SPLIT_CODES["train"]) & (label != NO_LABEL)).astype(np.int64)
    if len(pool) == 0:
        raise InputError(f"--store {store.path}: no labelled node has split train, so the training "
                         f"pool is empty; mark training nodes in the node table's split column")
    chosen_targets = np.flatnonzero(split == TARGETS[targets]).astype(np.int64)
    if len(chosen_targets) == 0:
        others = ", ".join(t for t in TARGETS if t != targets)
        raise InputError(f"--targets {targets}: no node is in this set; choose another ({others})")
    k = parse_budget(budget, len(pool))
    start = _initial_nodes(store, initial, pool, k)
    embedding = (store.stage_dir("graph") / "features.npy" if hop == 0
                 else store.stage_dir("propagate") / f"hop_{hop}.npy")
    width = np.load(embedding, mmap_mode="r").shape[1]
    need = _needed_bytes(strategy, len(pool), len(chosen_targets), k, width)
    require(memory, need, f"select --strategy {strategy}")
    window_rows = rows_per_chunk((memory - FIXED_OVERHEAD - need) // 4, 4 * width, at_least=1024)
    problem = Problem(store, pool, chosen_targets, k, start, int(seed), embedding, window_rows)
    given = budget if isinstance(budget, (int, float, str)) else str(budget)
    extra = {"budget": given, "target_split": targets, "embedding": f"hop_{hop}", "metric": "L2",
             "threads": threads}
    return _select(problem, strategy, label, out, started, extra)


def parse_budget(budget, pool):
    """The number of nodes to pick from a fraction (0 < B < 1) or a count (1 <= B <= pool)."""
    try:
        value = float(budget) if not isinstance(budget, bool) else math.nan
    except (TypeError, ValueError):
        value = math.nan
    if not math.isfinite(value) or value <= 0 or (value >= 1 and value != int(value)):
        raise InputError(f"--budget {budget}: use a fraction between 0 and 1 of the training pool "
                         f"or a whole count from 1 to {pool} (the pool size)")
    k = max(1, int(round(value * pool))) if value < 1 else int(value)
    if k > pool:
        raise InputError(f"--budget {budget}: larger than the training pool ({pool} nodes); "
                         f"use at most {pool} or a fraction below 1")
    return k


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
    import pyarrow.compute as pc

    ids = store.table("graph", "node_id").column("node_id").combine_chunks()
    wanted = pa.array(list(initial), type=ids.type)
    found = pc.index_in(wanted, value_set=ids)
    dense = found.fill_null(-1).to_numpy(zero_copy_only=False).astype(np.int64)
    outside = (dense < 0) | ~np.isin(dense, pool)
    if outside.any():
        raise InputError(f"--initial: node {wanted[int(np.argmax(outside))].as_py()} is not in the "
                         f"training pool; give ids of nodes with split train and a label")
    if len(np.unique(dense)) != len(dense) or len(dense) > k:
        raise InputError(f"--initial: {len(dense)} ids given; use at most {k} (the budget) "
                         f"distinct pool nodes")
    return dense


def _needed_bytes(strategy, pool, targets, k, width):
    """Bytes the stage holds at its peak, for the up-front budget check."""
    rows = 4 * width
    need = 2 * targets * rows + 48 * targets + 16 * pool  # targets + sorted copy, state, masks
    if strategy in NEEDS_POOL_ROWS:
        need += 2 * pool * rows  # the rows, plus the index (or the sorted copy) over them
    else:
        need += k * rows
    return need


def _select(problem, strategy, label, out, started, extra):
    """Run ``strategy``, build the report, write the outputs; returns the report."""
    choice = STRATEGIES[strategy](problem)
    order = choice.order
    if choice.outcome is not None:
        dist, assign = choice.outcome.dist, choice.outcome.assign
    else:
        # rows() wants sorted indices: read them sorted, then put them back in pick order.
        by_node = np.argsort(order)
        rows = np.empty((len(order), problem.target_rows.shape[1]), dtype=np.float32)
        rows[by_node] = problem.rows(order[by_node])
        dist, assign = cover(problem.target_rows, rows, seed=problem.seed)
    report = {"strategy": strategy, "selected": int(len(order)), "pool": int(len(problem.pool)),
              "targets": int(len(problem.targets)), "seed": problem.seed, **extra}
    report.update(coverage(dist, assign, len(order)))
    report["classes"] = class_counts(label[order])
    report["diagnostics"] = diagnostics(problem.store, order, problem.pool, problem.window_rows)
    if choice.outcome is not None:
        report["greedy"] = choice.outcome.stats
    report["caution"] = CAUTION
    report["seconds"] = round(time.perf_counter() - started, 3)
    report["peak_rss"] = peak_rss()
    if out is not None:
        _write(out, problem.store, order, label[order], report)
    return {**report, "indices": order}


def _write(out, store, order, labels, report):
    """``out`` (node_id, rank, label) and ``out.json`` (the report), renamed into place."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    ids = store.table("graph", "node_id").column("node_id").take(pa.array(order))
    table = pa.table({"node_id": ids, "rank": np.arange(len(order), dtype=np.int64),
                      "label": labels.astype(np.int64)})
    report_path = out.with_suffix(".json")
    temps = [p.with_name(f".{p.name}.{os.getpid()}.tmp") for p in (out, report_path)]
    placed = []
    try:
        pq.write_table(table, temps[0])
        with open(temps[1], "w") as fh:
            json.dump(report, fh, indent=2)
        os.replace(temps[1], report_path)
        placed.append(report_path)
        os.replace(temps[0], out)
    except BaseException:
        for path in placed:  # a report without its selection would mislead
            path.unlink(missing_ok=True)
        raise
    finally:
        for temp in temps:
            temp.unlink(missing_ok=True)

"""The study: how the proxy's accuracy grows with the training-set size under each rule.

For every rule, budget and repeat (a *cell*) the rule picks a subset of the training pool, the
proxy (:mod:`bigprune.learning.proxy`) is trained on it in the selection embedding (the last propagated
hop), and it is scored on held-out labelled nodes: the targets' answers when a file of them is
given, else the ``valid`` split. Budget 1.0 is the full pool, the reference accuracy. The proxy's
L2 penalty is chosen per cell on the ``valid`` split (:func:`bigprune.learning.proxy.fit_tuned`)
unless one is given.

Each finished cell is written atomically to ``OUT/cells/<cell>.json`` with a key over everything
that decides its result, so a rerun skips cells whose key matches and a killed study resumes.
Cells run in a process pool sized from the memory budget, one numba/FAISS/BLAS thread each, or
with a Dask client as tasks on the cluster's workers (:mod:`bigprune.learning.studytasks`).
The outputs (table, fits, recommendation, plots, report) are rebuilt from the cells every run.
"""
import json
import math
import os
import time
from concurrent.futures import ProcessPoolExecutor, as_completed
from contextlib import contextmanager
from multiprocessing import get_context
from pathlib import Path

import numpy as np

from ..common.errors import BudgetError, InputError
from ..common.options import FLAGS, read_budget
from ..common.ids import lookup, read_id_file
from ..common.fingerprint import key
from ..common.jsonout import dumps
from ..common.memory import DEFAULT_BUDGET, FIXED_OVERHEAD, chunk_ranges, format_size, parse_size, \
    rows_per_chunk
from .recommend import fit_rules, recommend
from .proxy import DEFAULT_L2, L2_GRID
from ..common.runtime import progress, set_quiet, set_threads
from ..common.schema import NO_LABEL, SPLIT_CODES
from ..common.store import Store
from ..common.store import reads_store
from ..common.faults import fault
from ..common.tempfiles import sweep_temps

DEFAULT_BUDGETS = (0.01, 0.02, 0.05, 0.1, 0.2, 0.5, 1.0)
DEFAULT_REPEATS = 3
DEFAULT_TOLERANCE = 0.01
FULL = "full-pool"  # the reference cell: every rule's subset at budget 1
# Rules whose picks do not depend on the seed (the k-supplier greedy breaks ties by index and its
# searches are exact; kmedian's index trains with a fixed seed and its greedy breaks ties by
# index; entropy's and influence's proxies start from zero): their first repeat stands for all.
SEED_FREE = frozenset({"kmedian", "kcenter", "degree", "pagerank", "entropy", "influence"})
# The rules a study compares unless told: the representative rules, the k-supplier greedy and
# random, the baseline every rule must beat.
DEFAULT_RULES = ("kmedian", "kmeans", "kcenter", "random")
# Rows per proxy chunk that a worker's budget must hold at least (its chunks grow with the budget).
PROXY_CHUNK_LEAST = 1024
# Environment a worker process must start with so that BLAS and OpenMP pools hold one thread.
ONE_THREAD = {name: "1" for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                                     "NUMBA_NUM_THREADS")}


@reads_store
def study(store, out, budgets=DEFAULT_BUDGETS, strategies=None, repeats=DEFAULT_REPEATS,
          answers=None, tolerance=DEFAULT_TOLERANCE, targets="test", l2=None, standardize=False,
          memory_budget=DEFAULT_BUDGET, threads=None, client=None):
    """Run (or resume) the study and write its outputs under ``out``.

    Parameters
    ----------
    store : Store or path, with committed graph and propagate stages.
    out : path of a directory outside the store (created).
    budgets : sequence or comma-separated text, by the budget rule of ``select``: fractions in
        (0, 1] of the pool (floats, or text with a decimal point or %) or counts (ints, or
        integer text); 1.0 is the full pool and is always run (it is the reference).
    strategies : sequence or comma-separated text of rule names (default: ``DEFAULT_RULES``).
    repeats : int >= 1; repeat ``r`` selects with seed ``r``.
    answers : Parquet file (node_id, label) of held-out nodes, or None for the ``valid`` split.
    tolerance : accuracy (0.01 = one point) below the full pool that still counts as enough.
    targets : the nodes the rules cover, as in ``select``.
    l2 : the proxy's L2 penalty (see :func:`bigprune.learning.proxy.fit_proxy`) in every cell, or
        None to choose it per cell by accuracy on the ``valid`` split over
        :data:`~bigprune.learning.proxy.L2_GRID` (the default; ``DEFAULT_L2`` without valid nodes).
    standardize : standardise the features on each cell's training nodes first (default off).
    client : a ``distributed.Client``, or None. With a client each cell not yet done runs as a
        task on the cluster, ``memory_budget`` is per worker process, and the store and ``out``
        must be on a file system every worker sees at the same path (checked first).

    Returns
    -------
    dict : ``recommendation``, ``fits``, ``cells`` (run and skipped counts), ``outputs``.
    """
    from ..selection.strategies import STRATEGIES

    started = time.perf_counter()
    store = store if isinstance(store, Store) else Store(store)
    rules = parse_strategies(strategies, STRATEGIES)
    given = parse_budgets(budgets)
    repeats = _check_repeats(repeats)
    tolerance = _check_number(tolerance, "--tolerance", 0.0, 1.0, "a number from 0 to below 1, e.g. 0.01")
    if l2 is not None:
        l2 = _check_number(l2, "--l2", 0.0, math.inf, "a number >= 0")
    out = _check_out(out, store)
    from ..selection.select import TARGETS

    if targets not in TARGETS:
        raise InputError(f"--targets {targets}: unknown; use one of {', '.join(TARGETS)}")
    memory = parse_size(memory_budget)
    threads = set_threads(threads)
    if client is not None:
        from ..cluster.connect import check_store

        check_store(client, store.path)
        check_store(client, out, option="--out", what="the study folder")
    setup = _setup(store, answers, given, rules, repeats, targets, l2, bool(standardize))
    summary = _study(setup, out, tolerance, memory, threads, client)
    summary["seconds"] = round(time.perf_counter() - started, 3)
    return summary


def parse_strategies(value, known):
    """Rule names from a sequence or comma-separated text; :data:`DEFAULT_RULES` when None."""
    if value is None:
        return list(DEFAULT_RULES)
    names = [s.strip() for s in value.split(",")] if isinstance(value, str) else list(value)
    if not names or any(not n for n in names):
        raise InputError(f"--strategies {value!r}: give rule names separated by commas, from "
                         f"{', '.join(known)}")
    for name in names:
        if name not in known:
            raise InputError(f"--strategies {name}: unknown rule; use any of {', '.join(known)}")
    return list(dict.fromkeys(names))


def parse_budgets(value, names=FLAGS):
    """Budgets from a sequence or comma-separated text, by the one budget rule
    (:mod:`bigprune.common.options`): floats are fractions in (0, 1] (1.0 = the whole pool),
    ints counts >= 1."""
    items = value.split(",") if isinstance(value, str) else list(value)
    if not items:
        raise InputError(f"{names.hint('budgets')}: give at least one budget, e.g. 0.01,0.1,1.0")
    return [read_budget(item.strip() if isinstance(item, str) else item, "budgets", names).number
            for item in items]


# ---- validation and setup ----------------------------------------------------------------------
def _check_repeats(repeats):
    if isinstance(repeats, bool) or not isinstance(repeats, (int, np.integer)) or repeats < 1:
        raise InputError(f"--repeats {repeats}: use a whole number >= 1")
    return int(repeats)


def _check_number(value, option, low, high, wanted):
    ok = isinstance(value, (int, float)) and not isinstance(value, bool) and math.isfinite(value)
    if not ok or not low <= value < high:
        raise InputError(f"{option} {value}: use {wanted}")
    return float(value)


def _check_out(out, store):
    path = Path(out)
    resolved, root = path.resolve(), store.path.resolve()
    if resolved == root or root in resolved.parents:
        raise InputError(f"--out {out}: inside the store directory {store.path}; write the study "
                         f"elsewhere")
    if path.exists() and not path.is_dir():
        raise InputError(f"--out {out}: exists and is not a directory")
    return resolved


def _setup(store, answers, budgets, rules, repeats, targets, l2, standardize):
    """Everything the cells share: pool, evaluation set, tuning set, cell plans and their keys."""
    split = store.load("graph", "split", mmap=False)
    label = store.load("graph", "label", mmap=False)
    pool = np.flatnonzero((split == SPLIT_CODES["train"]) & (label != NO_LABEL)).astype(np.int64)
    if len(pool) == 0:
        raise InputError(f"--store {store.path}: no labelled node has split train, so the training "
                         f"pool is empty; mark training nodes in the node table's split column")
    valid = np.flatnonzero((split == SPLIT_CODES["valid"]) & (label != NO_LABEL)).astype(np.int64)
    if answers is None:
        rows, truth = valid, label[valid]
        if len(rows) == 0:
            raise InputError(f"--store {store.path}: no labelled valid node to evaluate on; give "
                             f"--answers FILE.parquet (node_id, label) of held-out nodes")
        evaluation = {"source": "valid split", "nodes": int(len(rows))}
    else:
        rows, truth = _answers(store, answers, pool)
        evaluation = {"source": str(answers), "nodes": int(len(rows))}
    # the rows the penalty is chosen on: the valid split, unless l2 is given
    tune_rows = valid if l2 is None else valid[:0]
    tune_truth = label[tune_rows]
    policy = _l2_policy(l2, tune_rows, answers, rows)
    hops = int(store.entry("propagate")["params"]["hops"])
    embedding = store.stage_dir("propagate") / f"hop_{hops}.npy"
    width = int(np.load(embedding, mmap_mode="r").shape[1])
    sizes = check_budget_sizes(budgets, len(pool))
    base = {"graph": store.entry("graph")["dir"], "propagate": store.entry("propagate")["dir"],
            "targets": targets, "hop": hops, "standardize": standardize,
            "l2": l2 if l2 is not None else {"grid": [float(g) for g in L2_GRID],
                                              "tuned_on": _digest(tune_rows, tune_truth)},
            "evaluation": _digest(rows, truth)}
    cells = [{"rule": FULL, "budget": 1.0, "k": len(pool), "repeat": 0, "seed": 0}]
    for rule in rules:
        for budget, k in sizes:
            for repeat in range(1 if rule in SEED_FREE else repeats):
                cells.append({"rule": rule, "budget": budget, "k": k, "repeat": repeat, "seed": repeat})
    for cell in cells:
        cell["key"] = key(base, {k: cell[k] for k in ("rule", "k", "seed")})
        cell["name"] = _cell_name(cell)
    return {"store": store, "pool": pool, "eval_rows": rows, "eval_truth": truth, "width": width,
            "embedding": str(embedding), "cells": cells, "rules": rules, "repeats": repeats,
            "targets": targets, "l2": l2, "l2_policy": policy, "standardize": standardize,
            "tune_rows": tune_rows, "tune_truth": tune_truth, "evaluation": evaluation, "hop": hops,
            "budgets": [b for b, _ in sizes] + [1.0]}


def _l2_policy(l2, tune_rows, answers, eval_rows):
    """One sentence: how the cells' L2 penalty is set, and what that means for the scores."""
    if l2 is not None:
        return f"l2 = {l2:g} in every cell (given)."
    if len(tune_rows) == 0:
        return (f"l2 = {DEFAULT_L2:g} in every cell (scikit-learn's default C = 1): the store has no "
                f"labelled valid node to choose it on.")
    grid = ", ".join(f"{g:g}" for g in L2_GRID)
    chosen = (f"l2 chosen per cell by accuracy on the valid split ({len(tune_rows):,} nodes) "
              f"from {grid}")
    if answers is None:
        return (f"{chosen}; the study scores on those same valid nodes, so its accuracies are "
                f"optimistic (give --answers, or --l2, for held-out scores).")
    shared = int(np.isin(eval_rows, tune_rows).sum())
    if shared:
        return (f"{chosen}; {shared:,} of the answers' nodes are valid nodes, so their scores are "
                f"optimistic.")
    return f"{chosen}; the answers are scored apart from that choice."


def check_budget_sizes(budgets, pool, names=FLAGS):
    """(budget, k) for each budget below the full pool, sorted by k; duplicates of k dropped.

    ``budgets`` as :func:`parse_budgets` returns them; ``pool`` the training pool's size."""
    seen = {}
    for budget in budgets:
        k = read_budget(budget).picks(pool)
        if k > pool:
            raise InputError(f"{names.label('budgets', budget)}: larger than the training pool "
                             f"({pool} nodes); use at most {pool} or a fraction such as 1.0")
        if k < pool:
            seen.setdefault(k, budget)
    return sorted(((b, k) for k, b in seen.items()), key=lambda item: item[1])


def _answers(store, path, pool):
    """Dense indices (sorted) and labels of the held-out nodes in the answers file."""
    table = read_id_file(path, "--answers", ("node_id", "label"))
    if table.num_rows == 0 or table.column("label").null_count:
        raise InputError(f"--answers {path}: every row needs a label, and there must be at least one")
    wanted, dense = lookup(store, table.column("node_id"), "--answers", path)
    bad = np.flatnonzero((dense < 0) | np.isin(dense, pool))
    if len(bad):
        where = "is not in the graph" if dense[bad[0]] < 0 else "is in the training pool"
        raise InputError(f"--answers {path}: node {wanted[int(bad[0])].as_py()} {where}; "
                         f"answers must be held-out nodes of the graph")
    if len(np.unique(dense)) != len(dense):
        raise InputError(f"--answers {path}: a node_id appears twice; give one label per node")
    order = np.argsort(dense)
    truth = table.column("label").to_numpy(zero_copy_only=False).astype(np.int64)
    return dense[order].astype(np.int64), truth[order]


def _digest(rows, truth):
    import hashlib

    return hashlib.sha256(rows.tobytes() + truth.tobytes()).hexdigest()[:24]


def _cell_name(cell):
    budget = f"{cell['budget']:g}" if isinstance(cell["budget"], float) else str(cell["budget"])
    return f"{cell['rule']}-b{budget}-r{cell['repeat']}"


# ---- running the cells ---------------------------------------------------------------------
def _study(setup, out, tolerance, memory, threads, client=None):
    from .studyreport import write_outputs

    folder = out / "cells"
    folder.mkdir(parents=True, exist_ok=True)
    sweep_temps(out)  # left by a study killed while writing
    sweep_temps(folder)
    done = {c["name"]: _read_cell(folder / f"{c['name']}.json", c["key"]) for c in setup["cells"]}
    todo = [c for c in setup["cells"] if done[c["name"]] is None]
    need = _worker_need(setup, memory)
    context = {"store": str(setup["store"].path), "embedding": setup["embedding"],
               "pool": setup["pool"], "eval_rows": setup["eval_rows"],
               "eval_truth": setup["eval_truth"], "width": setup["width"], "targets": setup["targets"], "l2": setup["l2"],
               "standardize": setup["standardize"], "tune_rows": setup["tune_rows"],
               "tune_truth": setup["tune_truth"]}
    context["manifest"] = setup["store"].manifest()  # this process's pin: every cell reads one commit
    if client is None:
        workers, per_worker = _split_budget(memory, need, threads, len(todo))
        context.update(memory=per_worker, threads=1 if workers > 1 else threads)
        with progress(total=len(todo), desc="study", unit="cell") as bar:
            for cell, result in _run_all(todo, context, workers):
                record = _record(cell, result)
                _write_json(folder / f"{cell['name']}.json", record)
                done[cell["name"]] = record
                bar.update(1)
        ran = {"workers": workers, "memory_per_worker": per_worker}
    else:
        from ..cluster.tasks import worker_count
        from .studytasks import run_cells

        context.update(memory=memory, need=need)
        records = run_cells(client, todo, context, folder)
        done.update((cell["name"], record) for cell, record in zip(todo, records))
        ran = {"workers": worker_count(client), "memory_per_worker": memory, "cluster": True}
    rows = _table_rows(setup, done)
    summary = {"recommendation": recommend(rows, tolerance), "fits": fit_rules(rows),
               "cells": {"run": len(todo), "skipped": len(setup["cells"]) - len(todo), **ran},
               "settings": {"rules": setup["rules"], "budgets": setup["budgets"],
                            "repeats": setup["repeats"], "targets": setup["targets"],
                            "l2": setup["l2"], "l2_policy": setup["l2_policy"],
                            "l2_grid": None if setup["l2"] is not None else list(L2_GRID),
                            "standardize": setup["standardize"], "embedding": f"hop_{setup['hop']}",
                            "evaluation": setup["evaluation"], "pool": int(len(setup["pool"]))},
               "diagnostics": _diagnostics(setup, done), "preferences": _preferences(setup, done)}
    summary["outputs"] = write_outputs(out, rows, summary)
    return summary


def _worker_need(setup, memory):
    """The bytes one worker (a process running one cell at a time) needs; BudgetError above
    ``memory``.

    One worker's need is counted for the hungriest rule (the select stage's own check, made in
    the worker, has the exact figure): target rows twice, pool rows twice (rows plus an index
    over them), a proxy's probabilities over the pool, per-node arrays, training and evaluation
    rows and the proxy's chunks at their smallest (a worker sizes them from its own budget; at
    65,536 rows the count asked 15 GiB for 3,703-wide features).
    """
    from ..selection.select import TARGETS

    pool, rows = len(setup["pool"]), 4 * setup["width"]
    split = setup["store"].load("graph", "split", mmap=False)
    targets = int(np.sum(split == TARGETS[setup["targets"]]))
    classes = len(np.unique(setup["eval_truth"])) + 1
    largest = max(c["k"] for c in setup["cells"])
    need = (2 * targets * rows + 48 * targets + 2 * pool * rows + 48 * pool + 32 * pool * classes
            + 40 * len(split) + rows * (largest + len(setup["eval_rows"]) + len(setup["tune_rows"]))
            + 16 * rows * min(pool, PROXY_CHUNK_LEAST))
    per_worker = FIXED_OVERHEAD + need
    if memory < per_worker:
        raise BudgetError(f"--memory-budget {format_size(memory)} is too small for study: one "
                          f"worker needs about {format_size(per_worker)}")
    return int(per_worker)


def _split_budget(memory, need, threads, cells):
    """Cells at once and each one's byte budget: as many as the threads and the budget allow."""
    workers = max(1, min(threads, cells, memory // need))
    return int(workers), int(memory // workers)


@contextmanager
def _one_thread_env():
    saved = {name: os.environ.get(name) for name in ONE_THREAD}
    os.environ.update(ONE_THREAD)
    try:
        yield
    finally:
        for name, value in saved.items():
            if value is None:
                os.environ.pop(name, None)
            else:
                os.environ[name] = value


def _run_all(todo, context, workers):
    """Yield (cell, result) as cells finish: in this process, or in ``workers`` spawned ones."""
    if workers <= 1:
        _init_worker(context)
        for cell in todo:
            yield cell, _run_cell(cell)
        return
    # spawn, not fork: a forked child inherits the parent's OpenMP and numba thread pools.
    with _one_thread_env(), ProcessPoolExecutor(workers, mp_context=get_context("spawn"),
                                                initializer=_init_spawned_worker,
                                                initargs=(context,)) as executor:
        futures = {executor.submit(_run_cell, cell): cell for cell in todo}
        try:
            for future in as_completed(futures):
                yield futures[future], future.result()
        except BaseException:
            executor.shutdown(wait=True, cancel_futures=True)
            raise


_WORKER = {}


def _init_spawned_worker(context):
    """A spawned worker draws no bars of its own: the parent's study bar counts its cells."""
    set_quiet(True)
    _init_worker(context)


def _init_worker(context):
    """Per process: thread counts, and the evaluation and tuning rows read once."""
    set_threads(context["threads"])
    _WORKER.clear()
    _WORKER.update(_load_context(context))


def _load_context(context):
    """``context`` with the evaluation and tuning rows' features read (once per process)."""
    window = rows_per_chunk(max(1, context["memory"] - FIXED_OVERHEAD) // 8, 4 * context["width"],
                            at_least=1024)
    loaded = dict(context, window=window, eval_x=_gather(context["embedding"], context["eval_rows"], window))
    same = np.array_equal(context["tune_rows"], context["eval_rows"])
    loaded["tune_x"] = (loaded["eval_x"] if same
                        else _gather(context["embedding"], context["tune_rows"], window))
    return loaded


def _run_cell(cell, ctx=None):
    """Select, train the proxy on the subset, score it on the evaluation rows (``ctx``: a loaded
    context, by default this process's)."""
    from .proxy import fit_tuned, scores
    from ..selection.select import select

    started = time.perf_counter()
    ctx = _WORKER if ctx is None else ctx
    store = Store(ctx["store"], manifest=ctx["manifest"])  # the study holds the store meanwhile
    result = {}
    if cell["rule"] == FULL:
        rows = ctx["pool"]
        result["fill_picks"] = 0
    else:
        report = select(store, cell["rule"], int(cell["k"]), targets=ctx["targets"],
                        seed=cell["seed"], memory_budget=ctx["memory"], threads=ctx["threads"])
        rows = np.sort(report.pop("indices"))
        result["coverage"] = report["coverage"]
        result["diagnostics"] = report["diagnostics"]
        result["classes"] = report["classes"]
        result["fill_picks"] = report.get("greedy", {}).get("filled", 0)
        if "preference" in report:
            result["preference"] = report["preference"]
    label = store.load("graph", "label", mmap=False)[rows]
    x = _gather(ctx["embedding"], rows, ctx["window"])
    # the proxy holds a float64 copy of each chunk and three (chunk, classes) temporaries
    classes = len(np.unique(ctx["eval_truth"])) + len(np.unique(label))
    chunk = rows_per_chunk(max(1, ctx["memory"] - FIXED_OVERHEAD) // 8, 8 * (ctx["width"] + 3 * classes),
                           at_least=PROXY_CHUNK_LEAST)
    tuning = (ctx["tune_x"], ctx["tune_truth"], np.arange(len(ctx["tune_rows"])))
    model, choice = fit_tuned(x, label, np.arange(len(rows)), valid=tuning, l2=ctx["l2"],
                              standardize=ctx["standardize"], chunk_rows=chunk)
    del x
    guess = model.predict(ctx["eval_x"], np.arange(len(ctx["eval_rows"])), chunk_rows=chunk)
    result.update(scores(ctx["eval_truth"], guess))
    result["training_nodes"] = int(len(rows))
    result["iterations"] = model.iterations
    result["l2"] = choice
    result["seconds"] = round(time.perf_counter() - started, 3)
    return result


def _gather(path, rows, window_rows):
    """Rows ``rows`` (sorted int64) of the ``.npy`` at ``path`` as float32, one window mapped at a
    time so that the file's pages leave RSS as each window closes."""
    width = np.load(path, mmap_mode="r").shape[1]
    out = np.empty((len(rows), width), dtype=np.float32)
    if len(rows) == 0:
        return out
    starts = [a for a, _ in chunk_ranges(int(rows[-1]) + 1, window_rows)]
    cuts = list(np.searchsorted(rows, starts)) + [len(rows)]
    for lo, hi in zip(cuts[:-1], cuts[1:]):
        if hi > lo:
            mapped = np.load(path, mmap_mode="r")
            out[lo:hi] = mapped[rows[lo:hi]]
            del mapped
    return out


# ---- cells on disk ---------------------------------------------------------------------------
def _record(cell, result):
    """What ``cells/<cell>.json`` holds: the cell's key, its plan and its result."""
    return {"key": cell["key"], "cell": {k: cell[k] for k in ("rule", "budget", "k", "repeat", "seed")},
            "result": result}


def _read_cell(path, expected):
    """The stored record when its key matches, else None (missing, unreadable or stale)."""
    try:
        record = json.loads(path.read_text())
    except (OSError, ValueError):
        return None
    return record if isinstance(record, dict) and record.get("key") == expected else None


def _write_json(path, payload):
    tmp = path.with_name(f".{path.name}.{os.getpid()}.tmp")
    try:
        with open(tmp, "w") as fh:
            fh.write(dumps(payload, indent=1))
            fh.flush()
            os.fsync(fh.fileno())
        fault("study", "after-temp-write")
        fault("study", "before-rename")
        os.replace(tmp, path)
        fault("study", "after-rename")
    finally:
        tmp.unlink(missing_ok=True)


def _table_rows(setup, done):
    """One row per (rule, budget, repeat); the full pool's cell stands in every rule at budget 1."""
    full = done[_cell_name(setup["cells"][0])]["result"]  # the first cell is the full pool
    rows = []
    for cell in setup["cells"]:
        if cell["rule"] == FULL:
            continue
        rows.append(_row(cell["rule"], cell["budget"], cell["repeat"], done[cell["name"]]["result"]))
    for rule in setup["rules"]:
        rows.append(_row(rule, 1.0, 0, full))
    return rows


def _row(rule, budget, repeat, result):
    return {"rule": rule, "budget": float(budget), "training_nodes": result["training_nodes"],
            "repeat": repeat, "accuracy": result["accuracy"], "error": 1.0 - result["accuracy"],
            "macro_f1": result["macro_f1"], "per_class": result["per_class"],
            "seconds": result["seconds"], "l2": result.get("l2", {}).get("l2", math.nan),
            "coverage_radius": result.get("coverage", {}).get("radius", math.nan),
            "mean_degree": result.get("diagnostics", {}).get("selected", {}).get("degree", math.nan),
            # kcenter picks made by its farthest-first fill once every target was served
            "fill_picks": result.get("fill_picks", math.nan)}


def _diagnostics(setup, done):
    """Per rule and budget, the mean over repeats of the select reports' diagnostics."""
    out, pool = {}, None
    for cell in setup["cells"]:
        result = done[cell["name"]]["result"]
        if "diagnostics" not in result:
            continue
        pool = result["diagnostics"]["pool"]
        sel = result["diagnostics"]["selected"]
        values = {"degree": sel["degree"], "pagerank": sel["pagerank"],
                  "homophily": sel["homophily"], "radius": result["coverage"]["radius"],
                  "mean_distance": result["coverage"]["mean"]}
        slot = out.setdefault(cell["rule"], {}).setdefault(str(cell["k"]), {"budget": cell["budget"], "runs": []})
        slot["runs"].append(values)
    for rule in out.values():
        for slot in rule.values():
            runs = slot.pop("runs")
            for name in runs[0]:
                seen = [r[name] for r in runs if r[name] is not None]
                slot[name] = float(np.mean(seen)) if seen else None
    return {"rules": out, "pool": pool}


def _preferences(setup, done):
    """What each ranking rule prefers: per fifth of its ranking, the mean over the rule's cells
    (budgets and repeats) of the select reports' degree, PageRank and homophily; the pool's."""
    runs, pool = {}, None
    for cell in setup["cells"]:
        profile = done[cell["name"]]["result"].get("preference")
        if profile is not None:
            pool = profile["pool"]
            runs.setdefault(cell["rule"], []).append(profile["parts"])
    rules = {}
    for rule, profiles in runs.items():
        rules[rule] = []
        for i, part in enumerate(profiles[0]):
            means = {}
            for name in ("degree", "pagerank", "homophily"):
                seen = [p[i][name] for p in profiles if p[i][name] is not None]
                means[name] = float(np.mean(seen)) if seen else None
            rules[rule].append({"from": part["from"], "to": part["to"], **means})
    return {"rules": rules, "pool": pool}

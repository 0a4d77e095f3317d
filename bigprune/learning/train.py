"""``bigprune train``: fit the proxy model on a selection (or the whole pool) and score it."""
import time

import numpy as np

from ..common.errors import InputError
from ..common.ids import read_id_file, to_dense
from ..common.memory import DEFAULT_BUDGET, parse_size, peak_rss, rows_per_chunk, working_memory
from ..propagation.propagate import embedding
from .proxy import evaluate, fit_tuned
from ..common.runtime import set_threads
from ..common.schema import NO_LABEL, SPLIT_CODES
from ..common.store import Store
from ..common.store import reads_store


@reads_store
def train(store, nodes_from=None, answers=None, l2=None, hop=None, standardize=False,
          memory_budget=DEFAULT_BUDGET, threads=None):
    """Train the proxy on ``nodes_from`` (a selection's Parquet file) or the whole pool.

    Scores accuracy, macro-F1 and per-class accuracy on the ``valid`` split and, when ``answers``
    (Parquet ``node_id``, ``label``) is given, on those nodes.

    ``l2=None`` chooses the penalty on the ``valid`` split over
    :data:`bigprune.learning.proxy.L2_GRID` (:data:`~bigprune.learning.proxy.DEFAULT_L2` when the
    store has no labelled valid node); a number fixes it. The result's ``l2`` says which value
    was used and why. ``standardize`` scales each feature by the training rows' mean and spread
    first (off by default).
    """
    started = time.time()
    budget = parse_size(memory_budget)
    set_threads(threads)
    store = store if isinstance(store, Store) else Store(store)
    features = embedding(store, hop)
    split = store.load("graph", "split", mmap=False)
    label = store.load("graph", "label", mmap=False)
    pool = np.flatnonzero(split == SPLIT_CODES["train"])
    if nodes_from is None:
        rows, source = pool, "the whole training pool"
    else:
        rows = to_dense(store, read_id_file(nodes_from, "--nodes-from").column("node_id"), "--nodes-from", nodes_from)
        outside = rows[split[rows] != SPLIT_CODES["train"]]
        if outside.size:
            raise InputError(f"--nodes-from {nodes_from}: node at row {int(np.argmax(split[rows] != SPLIT_CODES['train']))} "
                             "is not in the training pool (split train)")
        source = str(nodes_from)
    if rows.size == 0:
        raise InputError("--nodes-from: no training nodes to fit on")
    if l2 is not None and not l2 > 0:
        raise InputError(f"--l2 {l2} must be > 0")
    chunk = rows_per_chunk(working_memory(budget, "train") // 8, 16 * features.shape[1], at_least=1024)
    valid = np.flatnonzero((split == SPLIT_CODES["valid"]) & (label != NO_LABEL))
    model, choice = fit_tuned(features, label, rows, valid=(features, label, valid), l2=l2,
                              standardize=bool(standardize), chunk_rows=chunk)
    if choice["chosen_by"] == "valid accuracy":
        choice["note"] = ("l2 was chosen on the valid split, so the valid score below is "
                          "optimistic; --answers gives a held-out score")
    result = {"trained_on": source, "training_nodes": int(rows.size), "iterations": model.iterations,
              "classes": [int(c) for c in model.classes], "hop": hop_used(store, hop),
              "l2": choice, "standardized": bool(standardize)}
    if valid.size:
        result["valid"] = evaluate(model, features, label, valid, chunk)
    if answers is not None:
        table = read_id_file(answers, "--answers", ("node_id", "label"))
        rows_a = to_dense(store, table.column("node_id"), "--answers", answers)
        truth = table.column("label").to_numpy(zero_copy_only=False)
        target_labels = np.full(len(label), NO_LABEL, dtype=np.int64)
        target_labels[rows_a] = truth
        result["answers"] = evaluate(model, features, target_labels, rows_a, chunk)
    if "valid" not in result and "answers" not in result:
        raise InputError("--store has no valid nodes to score on; give --answers FILE.parquet")
    result.update(seconds=round(time.time() - started, 3), peak_rss=peak_rss())
    return result


def hop_used(store, hop):
    """The hop whose features were used: ``hop``, or the last one propagated when None."""
    return int(store.entry("propagate")["params"]["hops"]) if hop is None else int(hop)

"""``bigprune train``: fit the proxy model on a selection (or the whole pool) and score it."""
import time

import numpy as np

from ..common.errors import InputError
from ..common.ids import read_id_file, to_dense
from ..common.memory import DEFAULT_BUDGET, parse_size, peak_rss, rows_per_chunk, working_memory
from ..propagation.propagate import embedding
from .proxy import evaluate, fit_proxy
from ..common.runtime import set_threads
from ..common.schema import NO_LABEL, SPLIT_CODES
from ..common.store import Store


def train(store, nodes_from=None, answers=None, l2=1.0, hop=None, memory_budget=DEFAULT_BUDGET,
          threads=None):
    """Train the proxy on ``nodes_from`` (a selection's Parquet file) or the whole pool.

    Scores accuracy, macro-F1 and per-class accuracy on the ``valid`` split and, when ``answers``
    (Parquet ``node_id``, ``label``) is given, on those nodes.
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
    if l2 <= 0:
        raise InputError(f"--l2 {l2} must be > 0")
    chunk = rows_per_chunk(working_memory(budget, "train") // 8, 16 * features.shape[1], at_least=1024)
    model = fit_proxy(features, label, rows, l2=l2, chunk_rows=chunk)
    result = {"trained_on": source, "training_nodes": int(rows.size), "iterations": model.iterations,
              "classes": [int(c) for c in model.classes]}
    valid = np.flatnonzero((split == SPLIT_CODES["valid"]) & (label != NO_LABEL))
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

"""The propagate stage: SGC feature smoothing (Wu et al., 2019) and PageRank over the graph stage.

``X_{k+1} = Â X_k`` with ``Â = D^-1/2 (A+I) D^-1/2`` ("sym") or ``D^-1 (A+I)`` ("rw"), where D is
the weighted degree plus one for the self loop and edge weights are ``weight.npy`` when the graph
has one, else 1. Each hop reads ``X_k`` whole into memory and fills ``hop_{k+1}.npy`` through a
memory map of one block of rows at a time, flushed and closed before the next, because pages of a
mapped file count in RSS while they are mapped.
"""
import operator
import time

import numpy as np

from . import pagerank as _pagerank
from .errors import InputError
from .kernels.spmm import balanced_bounds, scale_rows, smooth_rows, weighted_degree
from .memory import (DEFAULT_BUDGET, MIB, chunk_ranges, parse_size, peak_rss, require,
                     rows_per_chunk, working_memory)
from .runtime import progress, set_threads
from .store import Store

NORMS = ("sym", "rw")
# The output is written through a map of one block of rows at a time; a block is at most this
# large (smaller when the budget is tight) and at least MIN_BLOCK_ROWS rows (or all of them).
BLOCK_BYTES = 64 * MIB
MIN_BLOCK_ROWS = 1024
# Parallel tasks per thread within a block, so that a slow run of rows does not idle the others.
TASKS_PER_THREAD = 8


def propagate(store, hops=2, norm="sym", memory_budget=DEFAULT_BUDGET, threads=None):
    """Smooth the graph stage's features over ``hops`` hops and compute PageRank; commit both.

    Parameters
    ----------
    store : str, Path or Store
        A store with a committed graph stage.
    hops : int >= 1
    norm : {"sym", "rw"}
    memory_budget : str or int
        Bytes (``4GiB``, ``512M``, ...) that bound the stage's peak RSS.
    threads : int, optional
        Defaults to every core this process may use.

    Returns
    -------
    dict
        ``hops``, ``norm``, ``seconds`` and ``peak_rss`` (bytes); ``skipped`` is True when the
        store already held this stage for the same graph and options.
    """
    store = store if isinstance(store, Store) else Store(store)
    hops = _whole(hops, "--hops", 1)
    if norm not in NORMS:
        raise InputError(f"--norm {norm!r} must be one of: {', '.join(NORMS)}")
    budget = parse_size(memory_budget)
    threads = set_threads(threads)
    return _propagate(store, hops, norm, budget, threads)


def embedding(store, hop=None):
    """The features after ``hop`` hops, float32 (n, d), memory-mapped read-only.

    ``hop=None`` gives the last hop committed; ``hop=0`` the graph stage's features as stored.
    """
    store = store if isinstance(store, Store) else Store(store)
    if hop is not None and _whole(hop, "--hop", 0) == 0:
        return store.load("graph", "features")
    done = store.entry("propagate")["params"]["hops"]
    hop = done if hop is None else hop
    if hop > done:
        raise InputError(f"--hop {hop} is beyond the {done} hops propagated: use 0 to {done}, "
                         f"or run bigprune propagate --hops {hop}")
    return store.load("propagate", f"hop_{hop}")


def _whole(value, option, least):
    try:
        number = operator.index(value)
    except TypeError:
        number = None
    if number is None or isinstance(value, bool) or number < least:
        raise InputError(f"{option} {value!r} must be a whole number of at least {least}")
    return number


def _propagate(store, hops, norm, budget, threads):
    started = time.perf_counter()
    graph_entry = store.entry("graph")
    graph = store.path / graph_entry["dir"]
    params = {"hops": hops, "norm": norm, "pagerank_damping": _pagerank.DAMPING,
              "pagerank_tol": _pagerank.TOL}
    inputs = {"graph": graph_entry["dir"]}
    done = store.manifest()["stages"].get("propagate")
    if done and done["params"] == params and done["inputs"] == inputs:
        return {"hops": hops, "norm": norm, "seconds": 0.0, "peak_rss": peak_rss(), "skipped": True}

    features = np.load(graph / "features.npy", mmap_mode="r")
    n, d = features.shape
    del features
    weighted = (graph / "weight.npy").exists()
    block_rows = _plan(graph, n, d, weighted, budget)

    indptr = np.load(graph / "indptr.npy")
    indices = np.load(graph / "indices.npy")
    weights = np.load(graph / "weight.npy") if weighted else np.zeros(0, dtype=np.float32)
    left, right = _scales(indptr, weights, norm)
    bounds = np.empty(threads * TASKS_PER_THREAD + 1, dtype=np.int64)
    with store.begin("propagate", params=params, inputs=inputs) as writer:
        x = np.ascontiguousarray(np.load(graph / "features.npy"), dtype=np.float32)
        hop_seconds = []
        for hop in range(1, hops + 1):
            tic = time.perf_counter()
            if right is not None:  # scale X_k's rows once rather than each gathered row
                scale_rows(x, right)
            path = writer.path / f"hop_{hop}.npy"
            offset = writer.array(f"hop_{hop}", (n, d), np.float32).offset
            with progress(total=n, desc=f"propagate hop {hop}/{hops}", unit="row") as bar:
                for start, stop in chunk_ranges(n, block_rows):
                    # A window map per block: its pages leave RSS when it is closed.
                    window = np.memmap(path, dtype=np.float32, mode="r+", shape=(stop - start, d),
                                       offset=offset + start * d * 4)
                    balanced_bounds(indptr, start, stop, bounds.shape[0] - 1, bounds)
                    smooth_rows(indptr, indices, weights, left, x, bounds, np.asarray(window))
                    window.flush()
                    del window
                    bar.update(stop - start)
            del x
            hop_seconds.append(round(time.perf_counter() - tic, 3))
            x = np.load(path) if hop < hops else None
        del left, right
        tic = time.perf_counter()
        scores, steps, change = _pagerank.power_iteration(indptr, indices, weights)
        writer.save("pagerank", scores)
        writer.info.update({
            "nodes": int(n), "dims": int(d), "nnz": int(indices.shape[0]), "weighted": weighted,
            "threads": threads, "block_rows": block_rows, "hop_seconds": hop_seconds,
            "pagerank_seconds": round(time.perf_counter() - tic, 3),
            "pagerank_steps": steps, "pagerank_change": change,
        })
    return {"hops": hops, "norm": norm, "seconds": round(time.perf_counter() - started, 3),
            "peak_rss": peak_rss()}


def _plan(graph, n, d, weighted, budget):
    """Rows per output block; refuse up front unless the CSR and X_k fit whole beside one block.

    A hop holds the CSR, X_k (float32 n x d), two float32 row scales and one mapped output block;
    PageRank holds the CSR and five float64 n-vectors. Holding X_k whole needs no second matrix:
    the output goes to disk block by block and is read back only after X_k is released.
    """
    indices = np.load(graph / "indices.npy", mmap_mode="r")
    nnz = indices.shape[0]
    csr = 8 * (n + 1) + indices.itemsize * nnz + (4 * nnz if weighted else 0)
    row = 4 * d
    hop = csr + row * n + 2 * 4 * n
    smallest = hop + row * min(n, MIN_BLOCK_ROWS)
    what = (f"propagating {n:,} x {d} features in memory (out-of-core propagation is not "
            f"available yet)")
    require(budget, max(smallest, csr + 5 * 8 * n), what)
    return rows_per_chunk(min(BLOCK_BYTES, working_memory(budget, what) - hop), row)


def _scales(indptr, weights, norm):
    """Row scales (left, right), float32 (n,), so that Â = diag(left) (A+I) diag(right).

    ``right`` is None for "rw", where it would be all ones.
    """
    degree = np.empty(indptr.shape[0] - 1, dtype=np.float64)
    weighted_degree(indptr, weights, degree)
    if norm == "sym":
        scale = (1.0 / np.sqrt(degree)).astype(np.float32)
        return scale, scale
    return (1.0 / degree).astype(np.float32), None

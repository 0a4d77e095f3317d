"""The propagate stage: SGC feature smoothing (Wu et al., 2019) and PageRank over the graph stage.

``X_{k+1} = Â X_k`` with ``Â = D^-1/2 (A+I) D^-1/2`` ("sym") or ``D^-1 (A+I)`` ("rw"), where D is
the weighted degree plus one for the self loop and edge weights are ``weight.npy`` when the graph
has one, else 1. Sums are float32; hops are stored as float32 or float16 (``dtype``), and each
hop reads the previous one as stored. :mod:`bigprune.propagation.hopplan` picks the way from the budget:
in memory (the CSR and ``X_k`` whole, the output written one block of rows at a time), or by 2-D
grid partitioning (:mod:`bigprune.propagation.grid`) when they do not fit. With ``restrict`` only the rows
that later stages read are computed (:mod:`bigprune.propagation.restrict`); the others hold NaN.
Files are read and written with plain file I/O (:mod:`bigprune.common.arrayfile`), never mapped, so
the peak RSS is what the plan counted. With a Dask client the same plan runs as tasks on its
workers, with the same bytes (:mod:`bigprune.propagation.clusterhops`).
"""
import operator
import time
from concurrent.futures import ThreadPoolExecutor
from contextlib import nullcontext

import numpy as np

from . import pagerank as _pagerank
from . import grid as _grid
from ..common.arrayfile import NpyFile, edge_chunks
from ..common.errors import InputError
from .hopplan import plan
from ..kernels.pagerank import accumulate_rows
from ..kernels.spmm import balanced_bounds, scale_rows, smooth_rows
from ..common.memory import DEFAULT_BUDGET, chunk_ranges, parse_size, peak_rss
from .restrict import needed_through, skipped_per_hop
from ..common.runtime import progress, set_threads
from ..common.store import Store

NORMS = ("sym", "rw")
DTYPES = {"float32": np.float32, "float16": np.float16}
MAX_RESTRICTED_HOPS = 127  # the needed-hop count per row is an int8
# Parallel tasks per thread within a block, so that a slow run of rows does not idle the others.
TASKS_PER_THREAD = 8


def propagate(store, hops=2, norm="sym", memory_budget=DEFAULT_BUDGET, threads=None,
              dtype="float32", restrict=False, client=None):
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
    dtype : {"float32", "float16"}
        How hops are stored; sums are float32 either way.
    restrict : bool
        Compute at each hop only the rows that the training pool, the validation and test
        splits need at the last hop (and, through them, at earlier hops); the other rows hold
        NaN and ``computed_through.npy`` (int8, n) gives the last hop each row was computed
        at. Off by default: ``select --targets unlabeled`` reads rows it leaves out.
    client : distributed.Client, optional
        Run the hops and PageRank as tasks on its workers (see
        :mod:`bigprune.propagation.clusterhops`), with the bytes of the run without it; the
        budget is then per worker process, and ``threads`` serves the client's PageRank sums.

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
    if dtype not in DTYPES:
        raise InputError(f"--dtype {dtype!r} must be one of: {', '.join(DTYPES)}")
    if restrict and hops > MAX_RESTRICTED_HOPS:
        raise InputError(f"--hops {hops} is too many for --restrict: use at most "
                         f"{MAX_RESTRICTED_HOPS}, or --no-restrict")
    budget = parse_size(memory_budget)
    threads = set_threads(threads)
    store.entry("graph")  # no store or no graph: say so before the lock would create the folder
    if client is not None:
        from ..cluster.connect import check_store

        check_store(client, store.path)
    with store.locked():  # a writer, as ingest: a second run (or a job) on the store exits 4;
        # and a job's sweep must not take this run's directory
        return _propagate(store, hops, norm, budget, threads, dtype, bool(restrict), client)


def embedding(store, hop=None):
    """The features after ``hop`` hops, (n, d) float32 or float16 as stored, memory-mapped read-only.

    ``hop=None`` gives the last hop committed; ``hop=0`` the graph stage's features as stored.
    After a restricted run, rows not computed at ``hop`` are NaN (see ``computed_through``).
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


def _propagate(store, hops, norm, budget, threads, dtype, restrict, client):
    started = time.perf_counter()
    graph_entry = store.entry("graph")
    graph = store.path / graph_entry["dir"]
    params = {"hops": hops, "norm": norm, "dtype": dtype, "restrict": restrict,
              "pagerank_damping": _pagerank.DAMPING, "pagerank_tol": _pagerank.TOL}
    inputs = {"graph": graph_entry["dir"]}
    done = store.manifest()["stages"].get("propagate")
    if done and done["params"] == params and done["inputs"] == inputs:
        return {"hops": hops, "norm": norm, "seconds": 0.0, "peak_rss": peak_rss(), "skipped": True}

    with NpyFile(graph / "features.npy") as features, NpyFile(graph / "indices.npy") as indices:
        (n, d), nnz, index_bytes = features.shape, indices.shape[0], indices.dtype.itemsize
    weighted = (graph / "weight.npy").exists()
    storage = np.dtype(DTYPES[dtype])
    chosen = plan(n, d, nnz, index_bytes, weighted, storage.itemsize, restrict, budget)
    with store.begin("propagate", params=params, inputs=inputs) as writer:
        if client is None:
            run = _grid_hops if chosen.grid else _memory_hops
            info = run(graph, writer, n, d, hops, norm, storage, restrict, chosen, threads)
        else:
            from .clusterhops import run_on_cluster

            info = run_on_cluster(client, graph, writer, n, d, nnz, hops, norm, storage, restrict,
                                  chosen)
        writer.info.update({"nodes": int(n), "dims": int(d), "nnz": int(nnz), "weighted": weighted,
                            "threads": threads, "way": "grid" if chosen.grid else "memory",
                            "plan": chosen._asdict(), **info})
    return {"hops": hops, "norm": norm, "seconds": round(time.perf_counter() - started, 3),
            "peak_rss": peak_rss()}


def _memory_hops(graph, writer, n, d, hops, norm, storage, restrict, chosen, threads):
    """Hops and PageRank with the CSR and X_k whole in memory."""
    indptr = np.load(graph / "indptr.npy")
    indices = np.load(graph / "indices.npy")
    weights = np.load(graph / "weight.npy") if (graph / "weight.npy").exists() else None
    chunks = edge_chunks(indices, weights, 0)
    left, right = _scales(indptr, chunks, norm)
    through = needed_through(graph, hops, indptr, chunks) if restrict else None
    weights_or_none = np.zeros(0, dtype=np.float32) if weights is None else weights
    bounds = np.empty(threads * TASKS_PER_THREAD + 1, dtype=np.int64)
    # Two output blocks: the kernel fills one while a writer thread writes the other.
    blocks = np.empty((2, min(n, chosen.block_rows), d), dtype=np.float32)
    x = np.empty((n, d), dtype=np.float32)
    hop_seconds = []
    for hop in range(1, hops + 1):
        tic = time.perf_counter()
        with NpyFile(source_path(graph, writer, hop)) as source:
            source.read_parallel(0, x, threads)  # X_k as stored, cast to float32 piece by piece
        if right is not None:  # scale X_k's rows once rather than each gathered row
            scale_rows(x, right)
        target = hop_file(writer, hop, n, d, storage)
        with target, ThreadPoolExecutor(1) as writes, \
                progress(total=n, desc=f"propagate hop {hop}/{hops}", unit="row") as bar:
            pending = [None, None]
            for i, (start, stop) in enumerate(chunk_ranges(n, chosen.block_rows)):
                block = blocks[i % 2, :stop - start]
                if pending[i % 2] is not None:
                    pending[i % 2].result()  # its last write is done (and raised if it failed)
                balanced_bounds(indptr, start, stop, bounds.shape[0] - 1, bounds)
                smooth_rows(indptr, indices, weights_or_none, left, x,
                            _or_empty(through), hop, bounds, block)
                pending[i % 2] = writes.submit(target.write, start, block)
                bar.update(stop - start)
            for job in pending:
                if job is not None:
                    job.result()
        hop_seconds.append(round(time.perf_counter() - tic, 3))
    del x, blocks, left, right
    info = finish_hops(writer, hops, through, hop_seconds)
    del through  # committed: PageRank's phase does not hold it
    info.update(_pagerank_info(writer, indptr, chunks))
    info["block_rows"] = chosen.block_rows
    return info


def _grid_hops(graph, writer, n, d, hops, norm, storage, restrict, chosen, threads):
    """Hops by 2-D grid partitioning and PageRank over the streamed CSR."""
    indptr = np.load(graph / "indptr.npy")
    with NpyFile(graph / "indices.npy") as indices, _optional(graph / "weight.npy") as weights:
        chunks = edge_chunks(indices, weights, chosen.edge_rows)
        scratch = writer.scratch()
        left, right = _scales(indptr, chunks, norm)
        np.save(scratch / "left.npy", left)  # for "sym" left and right are one array
        sym = right is not None
        del left, right
        through = needed_through(graph, hops, indptr, chunks) if restrict else None
        tic = time.perf_counter()
        grid = _grid.build(graph, indptr, chosen.out_rows, chosen.src_rows, chosen.edge_rows, scratch)
        build_seconds = round(time.perf_counter() - tic, 3)
        del indptr
        hop_seconds = []
        left = NpyFile(scratch / "left.npy")
        right = NpyFile(scratch / "left.npy") if sym else None
        for hop in range(1, hops + 1):
            tic = time.perf_counter()
            with NpyFile(source_path(graph, writer, hop)) as source, \
                    hop_file(writer, hop, n, d, storage) as target:
                _grid.hop(grid, source, target, left, right, through, hop, chosen.edge_rows, threads)
            hop_seconds.append(round(time.perf_counter() - tic, 3))
        left.close()
        if right is not None:
            right.close()
        info = finish_hops(writer, hops, through, hop_seconds)
        del through  # committed: PageRank's phase does not hold it
        if chosen.pagerank_whole:  # PageRank alone fits with the CSR in memory
            chunks = edge_chunks(np.load(graph / "indices.npy"),
                                 None if weights is None else np.load(graph / "weight.npy"), 0)
        info.update(_pagerank_info(writer, np.load(graph / "indptr.npy"), chunks))
    info.update({"grid_blocks": [len(grid.out_bounds), -(-n // grid.src_rows)],
                 "grid_seconds": build_seconds})
    return info


def source_path(graph, writer, hop):
    """Where X_{hop-1} is: the graph's features for the first hop, else the previous hop's file."""
    return graph / "features.npy" if hop == 1 else writer.path / f"hop_{hop - 1}.npy"


def hop_file(writer, hop, n, d, storage):
    """The hop's output file, created at full size, open for writes by rows."""
    mapped = writer.array(f"hop_{hop}", (n, d), storage)
    path = mapped.filename
    del mapped  # never touched through the map: no page of it enters RSS
    return NpyFile(path, writable=True)


def finish_hops(writer, hops, through, hop_seconds):
    info = {"hop_seconds": hop_seconds, "restricted": through is not None}
    if through is not None:
        writer.save("computed_through", through)
        info["skipped_rows"] = skipped_per_hop(through, hops)
    return info


def _pagerank_info(writer, indptr, chunks):
    tic = time.perf_counter()
    scores, steps, change = _pagerank.power_iteration(indptr, chunks)
    writer.save("pagerank", scores)
    return {"pagerank_seconds": round(time.perf_counter() - tic, 3), "pagerank_steps": steps,
            "pagerank_change": change}


def _scales(indptr, chunks, norm):
    """Row scales (left, right), float32 (n,), so that Â = diag(left) (A+I) diag(right).

    ``right`` is None for "rw", where it would be all ones.
    """
    degree = np.zeros(indptr.shape[0] - 1, dtype=np.float64)
    for first, indices, weights in chunks():
        accumulate_rows(indptr, first, indices, weights, np.zeros(0), degree)
    return scales_of(degree, norm)


def scales_of(degree, norm):
    """:func:`_scales` from each row's summed weights, float64 (n,), overwritten."""
    degree += 1.0  # the self loop
    if norm == "sym":
        np.sqrt(degree, out=degree)
    np.divide(1.0, degree, out=degree)
    scale = degree.astype(np.float32)
    return (scale, scale) if norm == "sym" else (scale, None)


def _or_empty(through):
    return np.zeros(0, dtype=np.int8) if through is None else through


def _optional(path):
    """An :class:`NpyFile` for ``path`` if the file exists, else None, for ``with``."""
    return NpyFile(path) if path.exists() else nullcontext(None)

"""Propagation hops: bigprune's propagate stage against scipy.sparse ``A @ X``.

Builds a power-law graph (Chung-Lu: edge ends drawn with probability proportional to
``rank**(-1 / (gamma - 1))``, node ids shuffled) straight into CSR with numpy, writes a graph
store in a temporary directory, then runs ``--hops`` hops with each side in its own subprocess
so that each reports its own peak RSS. bigprune's times are the stage's own figures per hop
(reading X_k, the kernel, writing the output into the store), with numba compiled beforehand on a
tiny graph (cached); its peak RSS covers the whole stage, PageRank and imports included. scipy's
times are the products alone, with the normalised matrix (self loops included, float32) built
beforehand by this script and loaded whole. Ratios are given for the mean hop and the first.

The bigprune side runs once per ``--budget`` (a comma-separated list; default 64GiB: in memory);
a budget that cannot hold the CSR and X whole makes it take the 2-D grid way, and the report
says whether its peak RSS stayed within the budget, its speed and peak-RSS ratios against scipy,
and whether one run met the target of 3x the speed with at most a third of scipy's peak RSS.

    python3 bench/propagate.py                          # 2M nodes, 20M edges, d = 64
    python3 bench/propagate.py --nodes 200000 --edges 2000000
    python3 bench/propagate.py --budget 1G --hops 2     # X (512 MB) + CSR do not fit: grid
    python3 bench/propagate.py --budget 64GiB,600MiB    # in memory, then small grid windows
"""
import os
import sys

# Sibling benches are named after stages, and bench/select.py would shadow the standard library's
# select module (which subprocess imports): keep this script's folder off the import path.
_HERE = os.path.dirname(os.path.abspath(__file__))
sys.path[:] = [p for p in sys.path if os.path.abspath(p or ".") != _HERE]

import argparse  # noqa: E402
import json  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
sys.path.insert(0, str(ROOT))

from bigprune.common.memory import parse_size  # noqa: E402


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, default=2_000_000)
    parser.add_argument("--edges", type=int, default=20_000_000, help="undirected edges")
    parser.add_argument("--dims", type=int, default=64)
    parser.add_argument("--gamma", type=float, default=2.5, help="power-law degree exponent")
    parser.add_argument("--order", choices=("random", "degree"), default="random",
                        help="node order: shuffled ids, or by falling degree (better locality)")
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--budget", default="64GiB",
                        help="bigprune's --memory-budget; several, comma-separated, run one after another")
    parser.add_argument("--hops", type=int, default=1, help="hops on each side")
    parser.add_argument("--dtype", default="float32", choices=("float32", "float16"))
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--workdir", default=None, help="where to put the temporary store")
    parser.add_argument("--side", choices=sorted(SIDES), help=argparse.SUPPRESS)
    parser.add_argument("--store", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.side:
        print(json.dumps(SIDES[args.side](Path(args.store), args)))
        return
    with tempfile.TemporaryDirectory(dir=args.workdir, prefix="bench-propagate-") as tmp:
        _compare(args, Path(tmp) / "store")


def _compare(args, store):
    # Every step runs in a child and this process stays small: Linux hands a child the parent's
    # peak RSS at fork/exec, which would blur both sides' figures.
    built = _side(args, "build", store)
    print(f"graph: {args.nodes:,} nodes, {built['nnz'] // 2:,} undirected edges ({built['nnz']:,} "
          f"CSR entries), d = {args.dims}, order {args.order}; built and written in "
          f"{built['seconds']:.1f} s", flush=True)
    load_before = os.getloadavg()[0]
    theirs = _side(args, "scipy-only", store)
    runs = []
    for budget in args.budget.split(","):
        ours = _side(args, "bigprune", store, budget=budget)
        check = _side(args, "check", store, budget=budget)
        runs.append((budget, ours, check))
    # Other jobs on the machine slow either side unpredictably: show how busy it was.
    print(f"load average (1 min) before / after the runs: {load_before:.1f} / "
          f"{os.getloadavg()[0]:.1f} on {os.cpu_count()} cores")
    print(f"scipy: first hop {theirs['hop_seconds']:.3f} s, mean hop {theirs['mean_seconds']:.3f} s "
          f"over {args.hops}, peak RSS {theirs['peak_rss'] / 2**30:.2f} GiB")
    met = []
    for budget, ours, check in runs:
        limit = parse_size(budget)
        # A stage of several hops allocates its windows once: later hops skip the first touch of
        # their pages, so the mean hop is the stage's cost per hop, the first hop its worst case.
        mean = sum(ours["all_hop_seconds"]) / len(ours["all_hop_seconds"])
        speed = theirs["mean_seconds"] / mean
        memory = ours["peak_rss"] / theirs["peak_rss"]
        built = f" (grid built in {ours['grid_seconds']} s)" if ours["grid_seconds"] is not None else ""
        print(f"bigprune --memory-budget {budget}: first hop {ours['hop_seconds']:.3f} s, mean hop "
              f"{mean:.3f} s, peak RSS "
              f"{ours['peak_rss'] / 2**30:.2f} GiB ({ours['peak_rss'] / limit:.0%} of the budget, "
              f"{'within' if ours['peak_rss'] <= limit else 'OVER'}); way {ours['way']} {ours['plan']}, "
              f"hops {ours['all_hop_seconds']} s{built}, PageRank {ours['pagerank_seconds']:.1f} s in "
              f"{ours['pagerank_steps']} steps, threads {ours['threads']}, dtype {args.dtype}")
        print(f"  speed ratio (mean hop, scipy / bigprune) {speed:.2f}x (first hop "
              f"{theirs['hop_seconds'] / ours['hop_seconds']:.2f}x), peak RSS ratio (bigprune / "
              f"scipy) {memory:.2f}; max abs difference {check['max_abs_diff']:.2e} (largest |value| "
              f"{check['max_abs']:.2f}): {'agree' if check['agree'] else 'DISAGREE'}")
        if speed >= 3 and memory <= 1 / 3:
            met.append(budget)
    print(f"target (>= 3x faster and <= 1/3 of scipy's peak RSS in one run): "
          f"{'met with --memory-budget ' + ', '.join(met) if met else 'not met'}")


def _side(args, side, store, budget=None):
    command = [sys.executable, __file__, "--side", side, "--store", str(store)]
    for option in ("nodes", "edges", "dims", "gamma", "order", "threads", "seed", "hops", "dtype"):
        if getattr(args, option) is not None:
            command += [f"--{option}", str(getattr(args, option))]
    command += ["--budget", budget or args.budget]
    done = subprocess.run(command, check=True, stdout=subprocess.PIPE, text=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def _build(store, args):
    rng = np.random.default_rng(args.seed)
    tic = time.perf_counter()
    indptr, indices = power_law_csr(args.nodes, args.edges, args.gamma, args.order, rng)
    write_store(store, indptr, indices,
                rng.standard_normal((args.nodes, args.dims), dtype=np.float32))
    write_normalised(store.parent, indptr, indices)
    return {"nnz": int(indices.shape[0]), "seconds": time.perf_counter() - tic}


def power_law_csr(n, edges, gamma, order, rng):
    """A symmetric CSR (indptr int64, indices int32) of about ``edges`` distinct undirected edges."""
    weight = np.arange(1, n + 1, dtype=np.float64) ** (-1.0 / (gamma - 1.0))
    cdf = np.cumsum(weight)
    cdf /= cdf[-1]
    keys = np.empty(0, dtype=np.int64)
    while keys.shape[0] < edges:  # repeats and loops are dropped, so draw until enough remain
        draw = int((edges - keys.shape[0]) * 1.2) + 1000
        u = np.searchsorted(cdf, rng.random(draw))
        v = np.searchsorted(cdf, rng.random(draw))
        keep = u != v
        lo, hi = np.minimum(u[keep], v[keep]), np.maximum(u[keep], v[keep])
        keys = np.unique(np.concatenate([keys, lo * n + hi]))
    keys = rng.choice(keys, edges, replace=False) if keys.shape[0] > edges else keys
    lo, hi = keys // n, keys % n
    del keys
    # Rank 0 has the highest expected degree: shuffle ids unless asked to keep degree order.
    relabel = np.arange(n) if order == "degree" else rng.permutation(n)
    lo, hi = relabel[lo], relabel[hi]
    both = np.concatenate([lo * n + hi, hi * n + lo])
    del lo, hi
    both.sort()
    rows = both // n
    indices = (both % n).astype(np.int32)
    del both
    indptr = np.zeros(n + 1, dtype=np.int64)
    np.cumsum(np.bincount(rows, minlength=n), out=indptr[1:])
    return indptr, indices


def write_store(path, indptr, indices, features):
    import pyarrow as pa

    from bigprune.common.store import Store

    n = indptr.shape[0] - 1
    with Store(path).begin("graph", params={"source": "bench/propagate.py"}) as writer:
        writer.write_table("node_id", pa.table({"node_id": np.arange(n, dtype=np.int64)}))
        writer.save("split", np.zeros(n, dtype=np.int8))
        writer.save("label", np.full(n, -1, dtype=np.int64))
        writer.save("indptr", indptr)
        writer.save("indices", indices)
        writer.save("features", features)


def write_normalised(tmp, indptr, indices):
    """Save D^-1/2 (A+I) D^-1/2 as CSR float32 for the scipy side."""
    import scipy.sparse as sp

    n = indptr.shape[0] - 1
    adj = sp.csr_matrix((np.ones(indices.shape[0], dtype=np.float32), indices, indptr), shape=(n, n))
    hat = (adj + sp.identity(n, dtype=np.float32, format="csr")).tocsr()
    del adj
    scale = (1.0 / np.sqrt(np.diff(hat.indptr).astype(np.float64))).astype(np.float32)
    hat.data *= scale[hat.indices]
    hat.data *= np.repeat(scale, np.diff(hat.indptr))
    for name in ("indptr", "indices", "data"):
        np.save(tmp / f"hat_{name}.npy", getattr(hat, name))


def _run_bigprune(store, args):
    threads = args.threads
    import bigprune.common.memory as memory
    from bigprune.propagation.propagate import propagate
    from bigprune.common.store import Store

    # Warm up: load (or compile once) the kernels for the same dtypes on a tiny graph, both ways
    # (a budget of a few kB with no fixed overhead counted forces the grid).
    tiny_indptr = np.array([0, 1, 2], dtype=np.int64)
    tiny_indices = np.array([1, 0], dtype=np.int32)
    fixed = memory.FIXED_OVERHEAD
    with tempfile.TemporaryDirectory() as tmp:
        write_store(Path(tmp) / "tiny", tiny_indptr, tiny_indices, np.ones((2, 4), dtype=np.float32))
        for budget in ("4GiB", 1):
            memory.FIXED_OVERHEAD = 0 if budget == 1 else fixed
            propagate(Path(tmp) / "tiny", hops=1, threads=threads, dtype=args.dtype,
                      memory_budget=budget if budget != 1 else 200_000, norm="rw")
    memory.FIXED_OVERHEAD = fixed
    _forget_propagate(store)  # an earlier run with another budget would make this one a no-op
    summary = propagate(store, hops=args.hops, memory_budget=args.budget, threads=threads,
                        dtype=args.dtype)
    info = Store(store).entry("propagate")["info"]
    return {"hop_seconds": info["hop_seconds"][0], "stage_seconds": summary["seconds"],
            "pagerank_seconds": info["pagerank_seconds"], "pagerank_steps": info["pagerank_steps"],
            "threads": info["threads"], "peak_rss": summary["peak_rss"], "way": info["way"],
            "plan": {k: v for k, v in info["plan"].items() if v}, "all_hop_seconds": info["hop_seconds"],
            "grid_seconds": info.get("grid_seconds")}


def _forget_propagate(store):
    """Drop the propagate stage from the bench's own store manifest (its folder is swept later)."""
    path = store / "manifest.json"
    if path.exists():
        manifest = json.loads(path.read_text())
        manifest["stages"].pop("propagate", None)
        temp = path.with_name(path.name + ".tmp")
        temp.write_text(json.dumps(manifest))
        os.replace(temp, path)


def _run_scipy(store, args):
    """scipy's product alone, timed; the result is kept for the checks of each bigprune run."""
    import scipy.sparse as sp

    from bigprune.common.memory import peak_rss
    from bigprune.common.store import Store

    tmp = store.parent
    parts = [np.load(tmp / f"hat_{name}.npy") for name in ("data", "indices", "indptr")]
    n = parts[2].shape[0] - 1
    hat = sp.csr_matrix(tuple(parts), shape=(n, n))
    x = np.load(Store(store).stage_dir("graph") / "features.npy")
    seconds = []
    for hop in range(args.hops):  # as many products as bigprune's hops, for a like-for-like mean
        tic = time.perf_counter()
        x = hat @ x
        seconds.append(time.perf_counter() - tic)
        if hop == 0:
            np.save(tmp / "scipy_hop_1.npy", x)
    return {"hop_seconds": seconds[0], "mean_seconds": sum(seconds) / len(seconds), "peak_rss": peak_rss()}


def _check(store, args):
    """The largest difference between bigprune's first hop and scipy's."""
    from bigprune.common.store import Store

    ours = Store(store).load("propagate", "hop_1")
    theirs = np.load(store.parent / "scipy_hop_1.npy", mmap_mode="r")
    diff = biggest = 0.0
    for start in range(0, ours.shape[0], 1 << 16):  # bounded windows of the mapped results
        part = np.asarray(ours[start:start + (1 << 16)], dtype=np.float32)
        diff = max(diff, float(np.abs(part - theirs[start:start + (1 << 16)]).max()))
        biggest = max(biggest, float(np.abs(part).max()))
    # Both sides sum in float32 in different orders: allow a few ulps of the largest value
    # (float16 storage: a rounding step of 2**-11 relative).
    ulps = 1e-5 if ours.dtype == np.float32 else 2.0 ** -10
    return {"max_abs_diff": diff, "max_abs": biggest, "agree": diff <= ulps * max(1.0, biggest)}


SIDES = {"build": _build, "bigprune": _run_bigprune, "scipy-only": _run_scipy, "check": _check}

if __name__ == "__main__":
    main()

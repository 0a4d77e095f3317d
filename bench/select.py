"""Benchmark: kcenter, kmedian and kmeans against a plain greedy on the same clustered data.

The plain greedy answers each step with an exact flat FAISS query and updates every target's
distance in numpy. It and the pruned kcenter greedy run the same rule (farthest active target,
its nearest candidate, set aside targets whose nearest candidate is already chosen). The two
representative rules run on the same data: ``kmedian`` (neighbour lists planned from
``--memory-budget``, then the lazy facility-location greedy) and ``kmeans`` (FAISS k-means over
every target, then each cluster's nearest free candidate). Each rule runs in its own
subprocess, so that each reports its own peak RSS (taken before the picks are measured); each
side's picks are then measured the same way, with an exact flat FAISS index over the k picks
(mean target distance and radius). The goal for kmedian and kmeans is each within 2x kcenter's
time.

    python3 bench/select.py                                    # n=1M, m=200k, d=64, k=20k, all rules
    python3 bench/select.py --n 100000 --m 20000 --k 2000      # small scale
    python3 bench/select.py --rules kcenter,kmedian,kmeans --threads 2
                                                               # the three rules, no plain greedy
    python3 bench/select.py --baseline-steps 2000              # time the plain greedy on its
                                                               # first 2000 steps, extrapolate
    python3 bench/select.py --rules kcenter,kmedian --memory-budget 2GiB
                                                               # kmedian's lists from less memory
"""
import os
import sys

# This file is named like the standard library's ``select``: put the repository, not bench/,
# first on the path before anything imports it.
sys.path[0] = os.path.dirname(os.path.dirname(os.path.abspath(__file__)))

import argparse  # noqa: E402
import json  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402


def make_data(n, m, d, blobs, seed, latent=6):
    """Candidates and targets from the same blobs: each a random ``latent``-dimensional patch
    of varying spread inside the d-dimensional space, plus a little isotropic noise (propagated
    node features are smooth: far fewer degrees of freedom than dimensions)."""
    rng = np.random.default_rng(seed)
    centres = rng.normal(scale=3.0, size=(blobs, d)).astype(np.float32)
    bases = rng.normal(scale=1.0 / np.sqrt(d), size=(blobs, latent, d)).astype(np.float32)
    spread = rng.uniform(0.5, 3.0, size=blobs).astype(np.float32)
    weight = rng.dirichlet(np.ones(blobs) * 2.0)

    def draw(count):
        out = np.empty((count, d), dtype=np.float32)
        for start in range(0, count, 1 << 16):
            stop = min(count, start + (1 << 16))
            blob = rng.choice(blobs, size=stop - start, p=weight)
            z = rng.standard_normal(size=(stop - start, 1, latent), dtype=np.float32)
            patch = (z @ bases[blob])[:, 0, :] * spread[blob, None]
            noise = rng.standard_normal(size=(stop - start, d), dtype=np.float32) * 0.05
            out[start:stop] = centres[blob] + patch + noise
        return out

    return draw(n), draw(m)


def _measure(data, picks):
    """Mean and largest distance of every target to ``picks`` (exact: flat FAISS index)."""
    import faiss

    candidates, targets = np.load(data / "candidates.npy", mmap_mode="r"), np.load(data / "targets.npy")
    index = faiss.IndexFlatL2(targets.shape[1])
    index.add(np.ascontiguousarray(candidates[np.sort(np.asarray(picks, dtype=np.int64))]))
    dist = np.empty(len(targets), dtype=np.float64)
    for start in range(0, len(targets), 65536):
        stop = min(len(targets), start + 65536)
        dist[start:stop] = np.sqrt(np.maximum(index.search(targets[start:stop], 1)[0][:, 0], 0.0))
    return {"measured_mean": float(dist.mean()), "measured_radius": float(dist.max()),
            "picks": int(len(picks)), "distinct": int(len(np.unique(picks)))}


def run_ours(data, k, seed, threads):
    from bigprune.selection.kcenter import greedy
    from bigprune.common.memory import peak_rss
    from bigprune.common.runtime import set_threads

    set_threads(threads)
    candidates, targets = np.load(data / "candidates.npy"), np.load(data / "targets.npy")
    start = time.perf_counter()
    outcome = greedy(targets, candidates, k, seed=seed)
    seconds = time.perf_counter() - start
    peak = peak_rss()
    del candidates, targets
    return {"seconds": seconds, "radius": float(outcome.dist.max()), "mean": float(outcome.dist.mean()),
            "trace": outcome.trace.tolist(),
            "stats": outcome.stats, "peak_rss": peak, **_measure(data, outcome.order)}


def kmedian_spare(budget, n, d):
    """Bytes left for kmedian's lists: ``budget`` less what ``bigprune select`` sets aside for
    a rule that holds the pool's rows (fixed overhead, the rows and their index, 16 B/node)."""
    from bigprune.common.memory import FIXED_OVERHEAD, parse_size

    return parse_size(budget) - FIXED_OVERHEAD - 2 * n * 4 * d - 16 * n


def run_kmedian(data, k, threads, budget):
    from bigprune.common.memory import peak_rss, rows_per_chunk
    from bigprune.common.runtime import set_threads
    from bigprune.selection.kmedian import PAIR_BYTES, greedy, neighbour_lists, plan_neighbours

    set_threads(threads)
    candidates, targets = np.load(data / "candidates.npy"), np.load(data / "targets.npy")
    (n, d), m = candidates.shape, len(targets)
    spare = kmedian_spare(budget, n, d)
    start = time.perf_counter()
    nearest = plan_neighbours(n, m, k, spare)
    chunk = rows_per_chunk((spare - PAIR_BYTES * m * nearest) // 2, 12 * nearest + 4 * d, at_least=256)
    lists = neighbour_lists(candidates, lambda at: targets[at], m, nearest, chunk)
    listed = time.perf_counter()
    order, facts = greedy(lists, np.empty(0, dtype=np.int64), np.arange(n, dtype=np.int64),
                          np.zeros(n, dtype=np.int64), np.zeros(1, dtype=np.int64), k)
    seconds = time.perf_counter() - start
    peak = peak_rss()
    del lists, candidates  # targets stays: the lists lambda closes over it
    return {"seconds": seconds, "parts": {"lists": listed - start, "greedy": seconds - (listed - start)},
            "facts": {**facts, "chunk_rows": int(chunk), "spare_bytes": int(spare)},
            "peak_rss": peak, **_measure(data, order)}


def run_kmeans(data, k, seed, threads):
    from bigprune.common.memory import peak_rss
    from bigprune.common.runtime import set_threads
    from bigprune.selection.kmeans import clusters, serve

    set_threads(threads)
    candidates, targets = np.load(data / "candidates.npy"), np.load(data / "targets.npy")
    (n, d), m = candidates.shape, len(targets)
    start = time.perf_counter()
    centroids, sizes = clusters(lambda at: targets[at], m, min(k, m), d, seed, sample_rows=m,
                                chunk_rows=65536)
    clustered = time.perf_counter()
    order = serve(candidates, centroids, sizes, np.empty(0, dtype=np.int64),
                  np.zeros(n, dtype=np.int64), np.zeros(1, dtype=np.int64), k)
    seconds = time.perf_counter() - start
    peak = peak_rss()
    del candidates  # targets stays: the clusters lambda closes over it
    return {"seconds": seconds, "parts": {"clusters": clustered - start, "serve": seconds - (clustered - start)},
            "facts": {"clusters": int(len(sizes)), "largest": int(sizes.max()),
                      "empty": int(np.sum(sizes == 0))},
            "peak_rss": peak, **_measure(data, order)}


def run_plain(data, k, steps):
    import faiss

    from bigprune.common.memory import peak_rss

    faiss.omp_set_num_threads(1)
    candidates, targets = np.load(data / "candidates.npy"), np.load(data / "targets.npy")
    start = time.perf_counter()
    index = faiss.IndexFlatL2(candidates.shape[1])
    index.add(candidates)
    dist = np.full(len(targets), np.inf, dtype=np.float32)
    active = np.ones(len(targets), dtype=bool)
    chosen = np.zeros(len(candidates), dtype=bool)
    picks = 0
    while picks < min(k, steps):
        key = np.where(active, dist, -1.0)
        target = int(np.argmax(key))
        if key[target] <= 0:
            break
        c = int(index.search(targets[target:target + 1], 1)[1][0, 0])
        if chosen[c]:
            active[target] = False
            continue
        chosen[c] = True
        picks += 1
        diff = targets - candidates[c]
        np.minimum(dist, np.sqrt(np.einsum("ij,ij->i", diff, diff)), out=dist)
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "steps": picks, "radius": float(dist.max()), "mean": float(dist.mean()),
            "peak_rss": peak_rss()}


def side(args, name, data):
    cmd = [sys.executable, __file__, "--side", name, "--data", str(data), "--k", str(args.k),
           "--seed", str(args.seed), "--baseline-steps", str(args.baseline_steps or args.k),
           "--memory-budget", args.memory_budget]
    if args.threads:
        cmd += ["--threads", str(args.threads)]
    load = os.getloadavg()[0]
    done = subprocess.run(cmd, capture_output=True, text=True)
    if done.returncode != 0:
        sys.exit(f"side {name} failed (exit {done.returncode}):\n{done.stderr}")
    out = json.loads(done.stdout.strip().splitlines()[-1])
    out["load"] = (load, os.getloadavg()[0])
    return out


RULES = ("kcenter", "kmedian", "kmeans", "plain")


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--n", type=int, default=1_000_000, help="candidates (training pool)")
    parser.add_argument("--m", type=int, default=200_000, help="targets")
    parser.add_argument("--d", type=int, default=64, help="dimensions")
    parser.add_argument("--k", type=int, default=20_000, help="picks")
    parser.add_argument("--blobs", type=int, default=200, help="Gaussian blobs in the data")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--threads", type=int, default=None, help="threads for kcenter, kmedian and kmeans")
    parser.add_argument("--rules", default=",".join(RULES),
                        help=f"comma-separated subset of {','.join(RULES)} (default %(default)s)")
    parser.add_argument("--memory-budget", default="4GiB",
                        help="kmedian's lists get this less what select keeps for the pool's rows "
                             "(default %(default)s)")
    parser.add_argument("--baseline-steps", type=int, default=None,
                        help="run the plain greedy for this many picks only and extrapolate its time")
    parser.add_argument("--side", choices=["ours", *RULES[1:]], help=argparse.SUPPRESS)
    parser.add_argument("--data", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.side == "ours":
        print(json.dumps(run_ours(args.data, args.k, args.seed, args.threads)))
        return
    if args.side == "kmedian":
        print(json.dumps(run_kmedian(args.data, args.k, args.threads, args.memory_budget)))
        return
    if args.side == "kmeans":
        print(json.dumps(run_kmeans(args.data, args.k, args.seed, args.threads)))
        return
    if args.side == "plain":
        print(json.dumps(run_plain(args.data, args.k, args.baseline_steps)))
        return
    rules = [r.strip() for r in args.rules.split(",") if r.strip()]
    unknown = sorted(set(rules) - set(RULES))
    if unknown or not rules:
        parser.error(f"--rules {args.rules}: use a subset of {','.join(RULES)}")

    with tempfile.TemporaryDirectory(prefix="bench-select-") as tmp:
        data = Path(tmp)
        candidates, targets = make_data(args.n, args.m, args.d, args.blobs, args.seed)
        np.save(data / "candidates.npy", candidates)
        np.save(data / "targets.npy", targets)
        del candidates, targets
        got = {rule: side(args, "ours" if rule == "kcenter" else rule, data) for rule in RULES if rule in rules}

    print(f"data: n={args.n:,} candidates, m={args.m:,} targets, d={args.d}, k={args.k:,}, "
          f"{args.blobs} blobs, seed {args.seed}; threads {args.threads or 'all'}; "
          f"{os.cpu_count()} cores")
    ours = got.get("kcenter")
    if ours:
        stats = ours["stats"]
        print(f"kcenter: {ours['seconds']:.1f} s, radius {ours['radius']:.4f}, mean distance "
              f"{ours['mean']:.4f} (measured over the picks: mean {ours['measured_mean']:.4f}, radius "
              f"{ours['measured_radius']:.4f}), peak RSS "
              f"{ours['peak_rss'] / 2**20:.0f} MiB; index {stats['index']} "
              f"(nlist {stats.get('nlist', '-')}, nprobe {stats.get('nprobe', '-')}, "
              f"recall@1 {stats['recall']:.3f}, first-pass recall "
              f"{stats.get('first_pass_recall', 1.0):.3f}, lists/query "
              f"{stats.get('lists_per_query', 0):.1f}); target updates skipped {stats['skipped']:.1%}; "
              f"{stats['clusters']} target clusters; {stats['set_aside']:,} targets set aside; "
              f"{stats['filled']} filled; load {ours['load'][0]:.1f} -> {ours['load'][1]:.1f}")
    for rule in ("kmedian", "kmeans"):
        if rule not in got:
            continue
        r = got[rule]
        ratio = (f"{r['seconds'] / ours['seconds']:.2f}x kcenter's time (goal <= 2x)" if ours
                 else "kcenter not run")
        parts = ", ".join(f"{name} {sec:.1f} s" for name, sec in r["parts"].items())
        print(f"{rule}: {r['seconds']:.1f} s ({parts}), {ratio}, peak RSS "
              f"{r['peak_rss'] / 2**20:.0f} MiB, mean distance {r['measured_mean']:.4f}, radius "
              f"{r['measured_radius']:.4f}, {r['distinct']:,} distinct picks; load "
              f"{r['load'][0]:.1f} -> {r['load'][1]:.1f}")
        print(f"  facts: {json.dumps(r['facts'])}")
    if ours and len(got) > 1:
        print("mean distance / radius against kcenter's: " + "; ".join(
            f"{rule} {got[rule]['measured_mean'] / ours['measured_mean']:.3f} / "
            f"{got[rule]['measured_radius'] / ours['measured_radius']:.3f}"
            for rule in ("kmedian", "kmeans") if rule in got))

    plain = got.get("plain")
    if not plain:
        return
    steps = plain["steps"]
    partial = steps < args.k
    plain_seconds = plain["seconds"]
    if partial:
        plain_seconds = plain["seconds"] / steps * args.k
        print(f"plain: first {steps:,} of {args.k:,} steps took {plain['seconds']:.1f} s; "
              f"EXTRAPOLATED linearly to {plain_seconds:.1f} s for all {args.k:,} steps; "
              f"peak RSS {plain['peak_rss'] / 2**20:.0f} MiB")
        if ours:
            ours_at = ours["trace"][steps - 1]
            print(f"radius after {steps:,} picks: ours {ours_at:.4f}, plain {plain['radius']:.4f} "
                  f"(ratio {ours_at / plain['radius']:.4f}); full-k plain radius not measured")
    else:
        print(f"plain: {plain_seconds:.1f} s, radius {plain['radius']:.4f}, mean distance "
              f"{plain['mean']:.4f}, peak RSS "
              f"{plain['peak_rss'] / 2**20:.0f} MiB")
        if ours:
            print(f"radius ratio ours/plain {ours['radius'] / plain['radius']:.4f} "
                  f"(goal <= 1.02)")
    if ours:
        print(f"speed-up plain/ours {plain_seconds / ours['seconds']:.1f}x "
              f"{'(extrapolated baseline)' if partial else '(both measured in full)'} (goal >= 10x)")


if __name__ == "__main__":
    main()

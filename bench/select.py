"""Benchmark: the pruned kcenter greedy against a plain greedy on the same clustered data.

The plain greedy answers each step with an exact flat FAISS query and updates every target's
distance in numpy. Both sides run the same rule (farthest active target, its nearest candidate,
set aside targets whose nearest candidate is already chosen), each in its own subprocess so
that each reports its own peak RSS.

    python3 bench/select.py                                    # n=1M, m=200k, d=64, k=20k
    python3 bench/select.py --n 100000 --m 20000 --k 2000      # small scale
    python3 bench/select.py --baseline-steps 2000              # time the plain greedy on its
                                                               # first 2000 steps, extrapolate
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


def run_ours(data, k, seed, threads):
    from bigprune.selection.kcenter import greedy
    from bigprune.common.memory import peak_rss
    from bigprune.common.runtime import set_threads

    set_threads(threads)
    candidates, targets = np.load(data / "candidates.npy"), np.load(data / "targets.npy")
    start = time.perf_counter()
    outcome = greedy(targets, candidates, k, seed=seed)
    seconds = time.perf_counter() - start
    return {"seconds": seconds, "radius": float(outcome.dist.max()), "mean": float(outcome.dist.mean()),
            "trace": outcome.trace.tolist(),
            "stats": outcome.stats, "peak_rss": peak_rss()}


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
           "--seed", str(args.seed), "--baseline-steps", str(args.baseline_steps or args.k)]
    if args.threads:
        cmd += ["--threads", str(args.threads)]
    done = subprocess.run(cmd, check=True, capture_output=True, text=True)
    return json.loads(done.stdout.strip().splitlines()[-1])


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0])
    parser.add_argument("--n", type=int, default=1_000_000, help="candidates (training pool)")
    parser.add_argument("--m", type=int, default=200_000, help="targets")
    parser.add_argument("--d", type=int, default=64, help="dimensions")
    parser.add_argument("--k", type=int, default=20_000, help="picks")
    parser.add_argument("--blobs", type=int, default=200, help="Gaussian blobs in the data")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--threads", type=int, default=None, help="threads for our greedy")
    parser.add_argument("--baseline-steps", type=int, default=None,
                        help="run the plain greedy for this many picks only and extrapolate its time")
    parser.add_argument("--side", choices=["ours", "plain"], help=argparse.SUPPRESS)
    parser.add_argument("--data", type=Path, help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.side == "ours":
        print(json.dumps(run_ours(args.data, args.k, args.seed, args.threads)))
        return
    if args.side == "plain":
        print(json.dumps(run_plain(args.data, args.k, args.baseline_steps)))
        return

    with tempfile.TemporaryDirectory(prefix="bench-select-") as tmp:
        data = Path(tmp)
        candidates, targets = make_data(args.n, args.m, args.d, args.blobs, args.seed)
        np.save(data / "candidates.npy", candidates)
        np.save(data / "targets.npy", targets)
        del candidates, targets
        ours = side(args, "ours", data)
        plain = side(args, "plain", data)

    steps = plain["steps"]
    partial = steps < args.k
    print(f"data: n={args.n:,} candidates, m={args.m:,} targets, d={args.d}, k={args.k:,}, "
          f"{args.blobs} blobs, seed {args.seed}")
    stats = ours["stats"]
    print(f"ours : {ours['seconds']:.1f} s, radius {ours['radius']:.4f}, mean distance "
          f"{ours['mean']:.4f}, peak RSS "
          f"{ours['peak_rss'] / 2**20:.0f} MiB; index {stats['index']} "
          f"(nlist {stats.get('nlist', '-')}, nprobe {stats.get('nprobe', '-')}, "
          f"recall@1 {stats['recall']:.3f}, first-pass recall "
          f"{stats.get('first_pass_recall', 1.0):.3f}, lists/query "
          f"{stats.get('lists_per_query', 0):.1f}); target updates skipped {stats['skipped']:.1%}; "
          f"{stats['clusters']} target clusters; {stats['set_aside']:,} targets set aside; "
          f"{stats['filled']} filled")
    plain_seconds = plain["seconds"]
    if partial:
        plain_seconds = plain["seconds"] / steps * args.k
        print(f"plain: first {steps:,} of {args.k:,} steps took {plain['seconds']:.1f} s; "
              f"EXTRAPOLATED linearly to {plain_seconds:.1f} s for all {args.k:,} steps; "
              f"peak RSS {plain['peak_rss'] / 2**20:.0f} MiB")
        ours_at = ours["trace"][steps - 1]
        print(f"radius after {steps:,} picks: ours {ours_at:.4f}, plain {plain['radius']:.4f} "
              f"(ratio {ours_at / plain['radius']:.4f}); full-k plain radius not measured")
    else:
        print(f"plain: {plain_seconds:.1f} s, radius {plain['radius']:.4f}, mean distance "
              f"{plain['mean']:.4f}, peak RSS "
              f"{plain['peak_rss'] / 2**20:.0f} MiB")
        print(f"radius ratio ours/plain {ours['radius'] / plain['radius']:.4f} "
              f"(goal <= 1.02)")
    print(f"speed-up plain/ours {plain_seconds / ours['seconds']:.1f}x "
          f"{'(extrapolated baseline)' if partial else '(both measured in full)'} (goal >= 10x)")


if __name__ == "__main__":
    main()

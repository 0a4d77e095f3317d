"""The real-graph check on Citeseer (tests/data/citeseer/), with the project's own API.

1. Standard split (train 120 / valid 500 / test 1,000): the default proxy's test accuracy, to
   hold against SGC's published 71.9 % (Wu et al., 2019, Table 2).
2. Pool protocol: pool = every labelled paper outside valid and test (1,812), targets = the
   test papers; each rule picks 30/60/120/240 papers, the default proxy trains on them and is
   scored on the test papers. Seeded rules run over several seeds and report the mean.

    python3 scripts/citeseer_protocol.py
    python3 scripts/citeseer_protocol.py --rules kmedian,random --picks 30,60 --seeds 5
    python3 scripts/citeseer_protocol.py --rules kmedian,kcenter --cluster local:2   # select on Dask
"""
import argparse
import sys
import tempfile
import time
from pathlib import Path

import numpy as np

ROOT = Path(__file__).resolve().parent.parent
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

import bigprune  # noqa: E402
from conftest import build_citeseer  # noqa: E402

SEEDED = {"random", "stratified", "kmeans", "kcenter-pool", "el2n", "age", "ddd"}


def main():
    parser = argparse.ArgumentParser(description=__doc__.split("\n")[0],
                                     formatter_class=argparse.RawDescriptionHelpFormatter,
                                     epilog=__doc__.split("\n\n", 1)[1])
    parser.add_argument("--rules", default="random,kmedian,kmeans,kcenter",
                        help="comma-separated rules (default: random,kmedian,kmeans,kcenter)")
    parser.add_argument("--picks", default="30,60,120,240", help="pick counts (default 30,60,120,240)")
    parser.add_argument("--seeds", type=int, default=5, help="seeds for seeded rules (default 5)")
    parser.add_argument("--cluster", default=None, metavar="ADDRESS",
                        help="select through a Dask cluster (HOST:PORT or local:N)")
    args = parser.parse_args()
    if args.cluster is None:
        protocol(args, None)
        return
    from bigprune.cluster.connect import cluster

    with cluster(args.cluster) as client:
        protocol(args, client)


def protocol(args, client):
    """Both parts of the check; ``client``: select's Dask client, or None."""
    rules = args.rules.split(",")
    picks = [int(p) for p in args.picks.split(",")]
    with tempfile.TemporaryDirectory(prefix="citeseer-") as tmp:
        workdir = Path(tmp)
        store, answers = build_citeseer(workdir, "standard")
        result = bigprune.train(store, answers=answers)
        print(f"standard split, default proxy: test accuracy {result['answers']['accuracy']:.3f}, "
              f"l2 {result['l2']}")
        store, answers = build_citeseer(workdir, "pool")
        full = bigprune.train(store, answers=answers)["answers"]["accuracy"]
        print(f"\npool protocol (full pool of 1,812: {full:.3f}); seeded rules: mean of {args.seeds} seeds\n")
        print("| picks | " + " | ".join(rules) + " |")
        print("|---" * (len(rules) + 1) + "|")
        for k in picks:
            cells = []
            for rule in rules:
                started, scores = time.perf_counter(), []
                for seed in range(args.seeds if rule in SEEDED else 1):
                    out = workdir / f"{rule}-{k}-{seed}.parquet"
                    extra = {} if client is None else {"client": client}
                    report = bigprune.select(store, rule, k, seed=seed, out=out, **extra)
                    parts = report.get("distributed") or {}
                    scores.append(bigprune.train(store, nodes_from=out, answers=answers)["answers"]["accuracy"])
                cells.append(f"{np.mean(scores):.3f}")
                print(f"  {rule} at {k}: {np.round(scores, 3).tolist()} "
                      f"({time.perf_counter() - started:.1f} s; mean distance {report['coverage']['mean']:.4f}, "
                      f"radius {report['coverage']['radius']:.4f}; parts {parts.get('parts', 1)})",
                      file=sys.stderr)
            print(f"| {k} | " + " | ".join(cells) + " |", flush=True)


if __name__ == "__main__":
    main()

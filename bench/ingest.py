"""Ingest against a plain pyarrow scan of the same Parquet files.

Writes a power-law graph as Parquet partitions (int64 ids drawn at random, a node table with a
fixed-size feature list), then, each in its own subprocess so that each reports its own peak
RSS: reads every file whole with ``pyarrow.parquet.read_table`` (the floor any ingest pays), and
runs ``bigprune ingest`` on them. Prints both times, the ratio (target: ingest <= 4x the scan)
and both peak RSS figures.

    python3 bench/ingest.py                                  # 2M nodes, 20M edge rows
    python3 bench/ingest.py --nodes 200000 --edges 2000000 --budget 1G
"""
import os
import sys

# bench/select.py would shadow the standard library's select module: keep this folder off the path,
# and put the work tree first so that a copy installed in site-packages (CI's) is not measured.
_HERE = os.path.dirname(os.path.abspath(__file__))
sys.path[:] = [os.path.dirname(_HERE)] + [p for p in sys.path if os.path.abspath(p or ".") != _HERE]

import argparse  # noqa: E402
import json  # noqa: E402
import resource  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402
import pyarrow as pa  # noqa: E402
import pyarrow.parquet as pq  # noqa: E402


def write_inputs(root, nodes, edges, dims, files, seed):
    rng = np.random.default_rng(seed)
    ids = rng.choice(np.int64(1) << 40, size=nodes, replace=False)
    weight = (np.arange(1, nodes + 1) ** -0.6)[rng.permutation(nodes)]  # Chung-Lu, gamma ~ 2.7
    cumulative = np.cumsum(weight / weight.sum())
    (root / "edges").mkdir(parents=True)
    per_file = edges // files
    for f in range(files):
        ends = np.minimum(np.searchsorted(cumulative, rng.random((2, per_file))), nodes - 1)
        pq.write_table(pa.table({"src": ids[ends[0]], "dst": ids[ends[1]]}), root / "edges" / f"part-{f}.parquet")
    split = np.where(rng.random(nodes) < 0.1, "train", np.where(rng.random(nodes) < 0.05, "test", None))
    label = pa.array(np.where(split == "train", rng.integers(0, 10, nodes), None), pa.int64())
    writer = None
    for start in range(0, nodes, 250_000):
        stop = min(nodes, start + 250_000)
        feats = rng.normal(size=(stop - start, dims)).astype(np.float32)
        table = pa.table({"node_id": ids[start:stop], "split": pa.array(split[start:stop], pa.string()),
                          "label": label[start:stop],
                          "features": pa.FixedSizeListArray.from_arrays(pa.array(feats.ravel()), dims)})
        writer = writer or pq.ParquetWriter(root / "nodes.parquet", table.schema)
        writer.write_table(table)
    writer.close()


def side(args):
    started = time.perf_counter()
    if args.side == "scan":
        rows = sum(pq.read_table(p).num_rows for p in sorted((Path(args.root) / "edges").iterdir()))
        rows += pq.read_table(Path(args.root) / "nodes.parquet").num_rows
        result = {"rows": rows}
    else:
        from bigprune.ingestion.ingest import ingest
        from bigprune.common.runtime import set_quiet

        set_quiet(True)
        result = ingest(Path(args.root) / "edges", Path(args.root) / "nodes.parquet", Path(args.root) / "store",
                        memory_budget=args.budget, threads=args.threads)
    result["seconds"] = time.perf_counter() - started
    result["peak_rss"] = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss * 1024
    print(json.dumps(result))


def run_side(name, args, root):
    cmd = [sys.executable, __file__, "--side", name, "--root", str(root), "--budget", args.budget]
    if args.threads:
        cmd += ["--threads", str(args.threads)]
    out = subprocess.run(cmd, check=True, capture_output=True, text=True).stdout
    return json.loads(out.strip().splitlines()[-1])


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, default=2_000_000)
    parser.add_argument("--edges", type=int, default=20_000_000, help="edge rows written")
    parser.add_argument("--dims", type=int, default=64)
    parser.add_argument("--files", type=int, default=8)
    parser.add_argument("--budget", default="4GiB", help="bigprune's --memory-budget")
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--repeats", type=int, default=2, help="runs of each side; the best counts")
    parser.add_argument("--side", help=argparse.SUPPRESS)
    parser.add_argument("--root", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.side:
        return side(args)
    with tempfile.TemporaryDirectory(prefix="bigprune-bench-ingest-") as tmp:
        root = Path(tmp)
        print(f"writing {args.nodes:,} nodes (d = {args.dims}) and {args.edges:,} edge rows in {args.files} files")
        write_inputs(root, args.nodes, args.edges, args.dims, args.files, args.seed)
        scans, ingests = [], []
        for _ in range(args.repeats):
            scans.append(run_side("scan", args, root))
            ingests.append(run_side("ingest", args, root))
            subprocess.run(["rm", "-rf", str(root / "store")], check=True)
        scan = min(scans, key=lambda r: r["seconds"])
        ing = min(ingests, key=lambda r: r["seconds"])
        load = os.getloadavg()[0]
        print(f"pyarrow scan   {scan['seconds']:7.2f} s   peak RSS {scan['peak_rss'] / 2**30:5.2f} GiB")
        print(f"bigprune ingest {ing['seconds']:6.2f} s   peak RSS {ing['peak_rss'] / 2**30:5.2f} GiB "
              f"(budget {args.budget}, {ing['row_blocks']} row block(s))")
        print(f"ratio ingest / scan: {ing['seconds'] / scan['seconds']:.2f}x (target <= 4x); "
              f"best of {args.repeats}; load average {load:.1f} on {os.cpu_count()} cores")


if __name__ == "__main__":
    main()

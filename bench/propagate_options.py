"""What ``--dtype float16`` and ``--restrict`` change, measured on the marketplace scenario.

Generates the scenario (power-law degrees, department-clustered features, shifted targets; see
``bigprune.scenario.scenario``), ingests it once, then propagates three copies of the store: float32,
float16, and float32 restricted to the rows later stages read. Reports, per hop, the float16
error against float32 (relative Frobenius, worst row's relative L2, largest absolute), the
k-center selection on each (radius, and overlap with the float32 one), and for the restricted run
the rows skipped per hop, its time against the full run, and whether its computed rows and its
selection equal the full run's. Runs in one process (times and sizes, not peak RSS).

    python3 bench/propagate_options.py                                    # 200k listings
    python3 bench/propagate_options.py --train 0.02 --valid 0.005 --test 0.01   # few labels
"""
import os
import sys

_HERE = os.path.dirname(os.path.abspath(__file__))
sys.path[:] = [p for p in sys.path if os.path.abspath(p or ".") != _HERE]

import argparse  # noqa: E402
import shutil  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from bigprune.ingestion.ingest import ingest  # noqa: E402
from bigprune.propagation.propagate import embedding, propagate  # noqa: E402
from bigprune.common.runtime import set_quiet  # noqa: E402
from bigprune.scenario.scenario import generate  # noqa: E402
from bigprune.selection.select import select  # noqa: E402

WINDOW = 1 << 16  # rows compared at a time


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, default=200_000)
    parser.add_argument("--hops", type=int, default=2)
    parser.add_argument("--train", type=float, default=0.4)
    parser.add_argument("--valid", type=float, default=0.05)
    parser.add_argument("--test", type=float, default=0.05)
    parser.add_argument("--budget", default="4GiB")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--workdir", default=None)
    args = parser.parse_args()
    set_quiet(True)
    with tempfile.TemporaryDirectory(dir=args.workdir, prefix="bench-options-") as tmp:
        _run(Path(tmp), args)


def _run(tmp, args):
    data = generate(tmp / "data", nodes=args.nodes, seed=args.seed, train_fraction=args.train,
                    valid_fraction=args.valid, test_fraction=args.test)
    ingest(data["edges"], data["nodes"], tmp / "base", memory_budget=args.budget)
    runs = {"float32": {}, "float16": {"dtype": "float16"}, "restricted": {"restrict": True}}
    stores, seconds = {}, {}
    for name, options in runs.items():
        stores[name] = tmp / name
        shutil.copytree(tmp / "base", stores[name])
        tic = time.perf_counter()
        propagate(stores[name], hops=args.hops, memory_budget=args.budget, **options)
        seconds[name] = time.perf_counter() - tic
    print(f"scenario: {args.nodes:,} listings, splits train/valid/test {args.train}/{args.valid}/"
          f"{args.test}, {args.hops} hops, load average {os.getloadavg()[0]:.1f} on "
          f"{os.cpu_count()} cores")
    for hop in range(1, args.hops + 1):
        frob, worst, biggest = _error(embedding(stores["float16"], hop), embedding(stores["float32"], hop))
        print(f"hop {hop} float16 vs float32: relative Frobenius {frob:.2e}, worst row relative "
              f"L2 {worst:.2e}, largest absolute {biggest:.2e}")
    picks = {name: select(stores[name], "kcenter", 0.02, memory_budget=args.budget)
             for name in runs}
    chosen = {name: set(report["indices"].tolist()) for name, report in picks.items()}
    for name in ("float16", "restricted"):
        overlap = len(chosen[name] & chosen["float32"]) / len(chosen["float32"])
        print(f"kcenter 2% on {name}: radius {picks[name]['coverage']['radius']:.4f} vs "
              f"{picks['float32']['coverage']['radius']:.4f} (float32), {overlap:.1%} of the "
              f"float32 picks shared; propagate {seconds[name]:.1f} s vs {seconds['float32']:.1f} s")
    from bigprune.common.store import Store

    info = Store(stores["restricted"]).entry("propagate")["info"]
    through = Store(stores["restricted"]).load("propagate", "computed_through")
    same = all(_same_rows(embedding(stores["restricted"], h), embedding(stores["float32"], h),
                          through >= h) for h in range(1, args.hops + 1))
    print(f"restricted: rows skipped per hop {info['skipped_rows']} of {args.nodes:,}; computed "
          f"rows equal the full run's: {same}; hop seconds {info['hop_seconds']} vs "
          f"{Store(stores['float32']).entry('propagate')['info']['hop_seconds']}")
    size = {name: (Store(stores[name]).stage_dir("propagate") / "hop_1.npy").stat().st_size
            for name in ("float32", "float16")}
    print(f"hop file size: float32 {size['float32'] / 2**20:.1f} MiB, float16 "
          f"{size['float16'] / 2**20:.1f} MiB")


def _error(approx, exact):
    """Relative Frobenius error, worst row's relative L2 error, largest absolute error."""
    diff2 = total2 = worst = biggest = 0.0
    for start in range(0, exact.shape[0], WINDOW):
        a = np.asarray(approx[start:start + WINDOW], dtype=np.float64)
        e = np.asarray(exact[start:start + WINDOW], dtype=np.float64)
        row_diff = np.linalg.norm(a - e, axis=1)
        row_norm = np.linalg.norm(e, axis=1)
        diff2 += float((row_diff ** 2).sum())
        total2 += float((row_norm ** 2).sum())
        worst = max(worst, float((row_diff / np.maximum(row_norm, 1e-30)).max()))
        biggest = max(biggest, float(np.abs(a - e).max()))
    return (diff2 / total2) ** 0.5, worst, biggest


def _same_rows(got, full, rows):
    return all(np.array_equal(np.asarray(got[s:s + WINDOW])[rows[s:s + WINDOW]],
                              np.asarray(full[s:s + WINDOW])[rows[s:s + WINDOW]])
               for s in range(0, full.shape[0], WINDOW))


if __name__ == "__main__":
    main()

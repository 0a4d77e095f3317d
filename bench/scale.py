"""Scaling ladder: ingest, propagate and select on generated graphs of growing size, one budget.

For each size (edge rows written), generates the marketplace scenario with
``bigprune.scenario.scenario.generate`` (nodes = edges / 5, average degree 10, d = 64; 1% train, 1% test,
0.5% valid), then runs each stage as its own ``python3 -m bigprune`` subprocess with the same
``--memory-budget``:

    ingest     Parquet partitions + node table -> store
    propagate  2 hops (SGC, d = 64) and PageRank
    select S B strategy S (``--strategies``, default kcenter) with --budget B, targets the test
               split, one stage per strategy and ``--select-budget`` (default 0.1 of the training
               pool, so k grows with n; a fixed count such as 2000 keeps k constant, so its slope
               shows the cost per target rather than the k x targets growth)
    baseline   what a user would otherwise write: the whole graph as a scipy.sparse matrix Â and
               the features in memory, the same hops as ``A @ X`` products (skipped, with its
               estimated peak, when that estimate passes ``--baseline-cap``)

Each child's wall time, CPU time and peak RSS come from ``os.wait4`` (its own rusage, not the
maximum over all children); the stage's own ``seconds`` from its JSON summary is shown beside it
(the difference is interpreter start and imports). The load average is sampled every 2 s while a
stage runs. Afterwards it prints a table per size and stage, the log-log slope of time against
edges per stage (least squares over all sizes; target <= 1.1) and of peak RSS against edges
(target: flat, and at or under the budget), with the ratios between consecutive sizes, then per
size the baseline's hop time and peak RSS beside bigprune's (the hop times from the propagate
stage's record), and appends a dated section to bench/RESULTS.md (``--results ''`` to skip).

A stage that fails or passes ``--stage-timeout`` is recorded with its exit line, and the later
stages of that size are skipped.

    python3 bench/scale.py                                  # 1M and 10M edges, 4GiB
    python3 bench/scale.py --large                          # adds 100M and 200M
    python3 bench/scale.py --sizes 100M --stage-timeout 1200
    python3 bench/scale.py --select-budget 0.1,2000         # k grows with n, then k fixed
    python3 bench/scale.py --strategies kcenter,kmedian,kmeans   # three rules, k = 10% of the pool
"""
import os
import sys

# bench/select.py would shadow the standard library's select module (which subprocess imports):
# keep this script's folder off the import path.
_HERE = os.path.dirname(os.path.abspath(__file__))
sys.path[:] = [p for p in sys.path if os.path.abspath(p or ".") != _HERE]

import argparse  # noqa: E402
import datetime  # noqa: E402
import json  # noqa: E402
import math  # noqa: E402
import platform  # noqa: E402
import shlex  # noqa: E402
import shutil  # noqa: E402
import signal  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
STAGES = ("ingest", "propagate")  # and one select stage per --strategies x --select-budget
# The baseline's bytes: Â as CSR (float32 values, int32 columns, self loops added; scipy holds A
# beside it while it adds them), and X_k, X_{k+1} in float32.
BASELINE_ENTRY_BYTES = 2 * 8
BASELINE_VALUE_BYTES = 2 * 4
DEFAULT_SIZES = "1M,10M"
LARGE_SIZES = "100M,200M"
_HEAD = (f"{'edges':>13} {'stage':<20} {'wall s':>9} {'stage s':>9} {'cpu s':>9} "
         f"{'peak GiB':>9} {'load mean/max':<13} status")
_SUFFIX = {"": 1, "K": 10**3, "M": 10**6, "G": 10**9}
# This driver imports nothing heavy: Linux carries the parent's RSS into a child's peak at
# fork/exec, so a big parent would inflate every figure.


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--sizes", default=DEFAULT_SIZES, help="edge rows, e.g. 1M,10M (default %(default)s)")
    parser.add_argument("--large", action="store_true", help=f"also run {LARGE_SIZES}")
    parser.add_argument("--memory-budget", default="4GiB", help="every stage's budget (default %(default)s)")
    parser.add_argument("--threads", type=int, default=None)
    parser.add_argument("--hops", type=int, default=2)
    parser.add_argument("--dim", type=int, default=64)
    parser.add_argument("--select-budget", default="0.1",
                        help="kcenter's --budget: a share of the pool or a count; several, comma-separated, "
                             "each run as its own stage (default %(default)s)")
    parser.add_argument("--strategies", default="kcenter",
                        help="select strategies, comma-separated; one stage per strategy and budget "
                             "(default %(default)s)")
    parser.add_argument("--seed", type=int, default=0)
    parser.add_argument("--stage-timeout", type=float, default=None, metavar="SECONDS",
                        help="kill a stage that runs longer and record it")
    parser.add_argument("--workdir", default=None, help="parent folder of the temporary data and stores")
    parser.add_argument("--data-cache", default=None, metavar="DIR",
                        help="keep generated inputs here and reuse them on later runs (same seed, dim)")
    parser.add_argument("--results", default=str(ROOT / "bench" / "RESULTS.md"),
                        help="Markdown file to append to ('' to skip)")
    parser.add_argument("--baseline-cap", default="12GiB",
                        help="skip the scipy baseline when its estimated peak passes this (default %(default)s)")
    parser.add_argument("--generate", nargs=2, metavar=("DIR", "EDGES"), help=argparse.SUPPRESS)
    parser.add_argument("--baseline-child", metavar="STORE", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.generate:
        return _generate_child(Path(args.generate[0]), int(args.generate[1]), args)
    if args.baseline_child:
        return _baseline_child(Path(args.baseline_child), args.hops)
    sizes = [_parse_count(s) for s in args.sizes.split(",") if s.strip()]
    if args.large:
        sizes += [_parse_count(s) for s in LARGE_SIZES.split(",") if _parse_count(s) not in sizes]
    command = " ".join(shlex.quote(a) for a in [os.path.relpath(sys.argv[0], ROOT)] + sys.argv[1:])
    started = datetime.datetime.now(datetime.timezone.utc)
    rows = []
    print(_HEAD, flush=True)
    for edges in sizes:
        with tempfile.TemporaryDirectory(dir=args.workdir, prefix="bench-scale-") as tmp:
            rows += _ladder_step(Path(tmp), edges, args)
    text = _summary(rows, args, command, started)
    print(text)
    if args.results:
        with open(args.results, "a") as out:
            out.write("\n" + text)
        print(f"appended to {args.results}")


def _parse_count(text):
    text = text.strip().upper()
    return int(float(text.rstrip("KMG") or 0) * _SUFFIX[text[-1] if text[-1] in "KMG" else ""])


def _generate_child(directory, edges, args):
    sys.path.insert(0, str(ROOT))
    from bigprune.common.runtime import set_quiet
    from bigprune.scenario.scenario import generate

    set_quiet(True)
    out = generate(directory, nodes=edges // 5, avg_degree=10, seed=args.seed, dim=args.dim,
                   train_fraction=0.01, test_fraction=0.01, valid_fraction=0.005)
    print(json.dumps(out["counts"]))


def _baseline_child(store, hops):
    """The in-memory baseline: Â = D^-1/2 (A+I) D^-1/2 in scipy.sparse, ``hops`` products."""
    import numpy as np
    import scipy.sparse as sp

    graph = store / json.loads((store / "manifest.json").read_text())["stages"]["graph"]["dir"]
    indptr, indices = np.load(graph / "indptr.npy"), np.load(graph / "indices.npy")
    n = indptr.shape[0] - 1
    adj = sp.csr_matrix((np.ones(indices.shape[0], dtype=np.float32), indices, indptr), shape=(n, n))
    del indices
    hat = (adj + sp.identity(n, dtype=np.float32, format="csr")).tocsr()
    del adj
    scale = (1.0 / np.sqrt(np.diff(hat.indptr).astype(np.float64))).astype(np.float32)
    hat.data *= scale[hat.indices]
    hat.data *= np.repeat(scale, np.diff(hat.indptr))
    x = np.load(graph / "features.npy")
    seconds = []
    for _ in range(hops):
        tic = time.perf_counter()
        x = hat @ x
        seconds.append(round(time.perf_counter() - tic, 3))
    print(json.dumps({"seconds": sum(seconds), "hop_seconds": seconds}))


def _baseline_estimate(store):
    """The baseline's estimated peak bytes, from the graph stage's array headers."""
    graph = store / json.loads((store / "manifest.json").read_text())["stages"]["graph"]["dir"]
    n, d = _npy_shape(graph / "features.npy")
    nnz = _npy_shape(graph / "indices.npy")[0]
    return BASELINE_ENTRY_BYTES * (nnz + n) + BASELINE_VALUE_BYTES * n * d + 8 * n


def _npy_shape(path):
    with open(path, "rb") as fh:
        head = fh.read(256).decode("latin1")
    return tuple(int(v) for v in head.split("'shape': (", 1)[1].split(")", 1)[0].split(",") if v.strip())


def _select_budgets(args):
    return [b.strip() for b in args.select_budget.split(",") if b.strip()]


def _select_stages(args):
    """(stage name, strategy, budget) per strategy and budget."""
    return [(f"select {strategy} {budget}", strategy, budget)
            for strategy in (s.strip() for s in args.strategies.split(",") if s.strip())
            for budget in _select_budgets(args)]


def _ladder_step(tmp, edges, args):
    data, store = tmp / "data", tmp / "store"
    if args.data_cache:
        data = Path(args.data_cache).resolve() / f"edges{edges}-seed{args.seed}-dim{args.dim}"
    py = [sys.executable]
    common = ["--memory-budget", args.memory_budget, "--quiet"]
    if args.threads:
        common += ["--threads", str(args.threads)]
    commands = {
        "generate": py + [__file__, "--generate", str(data), str(edges), "--seed", str(args.seed),
                          "--dim", str(args.dim)],
        "ingest": py + ["-m", "bigprune", "ingest", "--edges", str(data / "edges"),
                        "--nodes", str(data / "nodes.parquet"), "--store", str(store)] + common,
        "propagate": py + ["-m", "bigprune", "propagate", "--store", str(store),
                           "--hops", str(args.hops)] + common,
        **{stage: py + ["-m", "bigprune", "select", "--store", str(store), "--strategy",
                        strategy, "--budget", budget, "--targets", "test",
                        "--out", str(tmp / "picks.parquet")] + common
           for stage, strategy, budget in _select_stages(args)},
        "baseline": py + [__file__, "--baseline-child", str(store), "--hops", str(args.hops)],
    }
    rows, failed = [], None
    for stage, cmd in commands.items():
        if stage == "generate" and (data / "counts.json").exists():
            row = {"edges": edges, "stage": stage, "status": "reused", "disk_bytes": _disk(data),
                   "counts": json.loads((data / "counts.json").read_text())}
            rows.append(row)
            print(_line(row), flush=True)
            continue
        if failed:
            rows.append({"edges": edges, "stage": stage, "status": f"skipped ({failed} failed)"})
            continue
        if stage == "baseline":
            estimate = _baseline_estimate(store)
            if estimate > _budget_bytes(args.baseline_cap):
                row = {"edges": edges, "stage": stage, "estimate": estimate,
                       "status": f"skipped: estimated peak {estimate / 2**30:.1f} GiB > --baseline-cap"}
                rows.append(row)
                print(_line(row), flush=True)
                continue
        row = {"edges": edges, "stage": stage, **_measure(cmd, args.stage_timeout)}
        if stage == "generate" and row["status"] == "ok":
            row["counts"] = json.loads(row.pop("stdout").strip().splitlines()[-1])
            row["disk_bytes"] = _disk(data)
            if args.data_cache:
                (data / "counts.json").write_text(json.dumps(row["counts"]))
        elif row["status"] == "ok":
            row["summary"] = _last_json(row.pop("stdout"))
            if stage == "propagate":
                entry = json.loads((store / "manifest.json").read_text())["stages"]["propagate"]
                row["hop_seconds"] = entry["info"]["hop_seconds"]
                row["way"] = entry["info"]["way"]
            if stage == "baseline":
                row["estimate"] = _baseline_estimate(store)
        if stage == "ingest" and row["status"] == "ok" and not args.data_cache:
            shutil.rmtree(data)  # the store holds all later stages need; free the disk
        if row["status"] != "ok":
            failed = stage
        row.pop("stdout", None)
        rows.append(row)
        print(_line(row), flush=True)
    return rows


def _disk(folder):
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())


def _measure(cmd, timeout):
    """Run ``cmd``; its own wall time, CPU time, peak RSS and the load average while it ran."""
    loads, stop = [], threading.Event()

    def sample():
        while True:
            loads.append(os.getloadavg()[0])
            if stop.wait(2.0):
                return

    sampler = threading.Thread(target=sample, daemon=True)
    out_file = tempfile.TemporaryFile(mode="w+")
    err_file = tempfile.TemporaryFile(mode="w+")
    tic = time.perf_counter()
    child = subprocess.Popen(cmd, cwd=ROOT, stdout=out_file, stderr=err_file)
    sampler.start()
    timer = None
    if timeout:
        timer = threading.Timer(timeout, os.kill, (child.pid, signal.SIGKILL))
        timer.start()
    # wait4 gives this child's own rusage; Popen.wait would reap it first and lose it.
    _, status, usage = os.wait4(child.pid, 0)
    wall = time.perf_counter() - tic
    child.returncode = os.waitstatus_to_exitcode(status)
    timed_out = bool(timer and not timer.is_alive() and child.returncode == -signal.SIGKILL)
    if timer:
        timer.cancel()
    stop.set()
    sampler.join()
    out_file.seek(0)
    err_file.seek(0)
    stderr = err_file.read().strip().splitlines()
    if child.returncode == 0:
        status_text = "ok"
    elif timed_out:
        status_text = f"killed after --stage-timeout {timeout:g} s"
    else:
        status_text = f"exit {child.returncode}: {stderr[-1] if stderr else '(no message)'}"
    return {"status": status_text, "wall": wall, "cpu": usage.ru_utime + usage.ru_stime,
            "peak_rss": usage.ru_maxrss * 1024, "load_mean": sum(loads) / len(loads),
            "load_max": max(loads), "stdout": out_file.read()}


def _last_json(text):
    """The stage's JSON summary (the CLI prints it indented, last on stdout)."""
    start = text.rfind("\n{")
    try:
        return json.loads(text[start + 1 if start >= 0 else 0:])
    except ValueError:
        return {}


def _line(row):
    if "wall" not in row:
        return f"{row['edges']:>13,} {row['stage']:<20} {row['status']}"
    work = row.get("summary", {}).get("seconds")
    work = f"{work:9.1f}" if isinstance(work, (int, float)) else f"{'-':>9}"
    return (f"{row['edges']:>13,} {row['stage']:<20} {row['wall']:9.1f} {work} {row['cpu']:9.1f} "
            f"{row['peak_rss'] / 2**30:9.2f} {row['load_mean']:5.1f}/{row['load_max']:<4.1f} "
            f"{row['status']}")


def _slope(points):
    """Least-squares slope of log(y) against log(x)."""
    xs = [math.log(x) for x, _ in points]
    ys = [math.log(y) for _, y in points]
    mx, my = sum(xs) / len(xs), sum(ys) / len(ys)
    sxx = sum((x - mx) ** 2 for x in xs)
    return sum((x - mx) * (y - my) for x, y in zip(xs, ys)) / sxx if sxx else float("nan")


def _summary(rows, args, command, started):
    budget = _budget_bytes(args.memory_budget)
    head = _HEAD
    lines = [f"## Scaling ladder, {started:%Y-%m-%d %H:%M} UTC", "", "```", f"command: python3 {command}",
             f"finished {datetime.datetime.now(datetime.timezone.utc):%Y-%m-%d %H:%M} UTC", *_machine(), ""]
    for row in rows:
        if row["stage"] == "generate" and "counts" in row:
            c = row["counts"]
            lines.append(f"size {row['edges']:,}: {c['nodes']:,} nodes, {c['edges']:,} edge rows, "
                         f"train {c['train']:,}, test {c['test']:,}, valid {c['valid']:,}; Parquet "
                         f"{row['disk_bytes'] / 2**30:.2f} GiB (generated by bigprune.scenario.scenario.generate)")
    lines += ["", head, "-" * len(head)] + [_line(r) for r in rows] + [""]
    lines.append(f"log-log slopes against edges (target: time <= 1.1; peak RSS flat and <= "
                 f"--memory-budget {args.memory_budget}):")
    for stage in STAGES + tuple(name for name, _, _ in _select_stages(args)):
        done = [r for r in rows if r["stage"] == stage and r["status"] == "ok"]
        if len(done) < 2:
            lines.append(f"  {stage:<20} fewer than two finished sizes")
            continue
        slopes = {
            "wall": _slope([(r["edges"], r["wall"]) for r in done]),
            "stage s": _slope([(r["edges"], r["summary"]["seconds"]) for r in done
                               if r["summary"].get("seconds")]) if len(done) > 1 else float("nan"),
            "cpu": _slope([(r["edges"], r["cpu"]) for r in done]),
            "peak RSS": _slope([(r["edges"], r["peak_rss"]) for r in done]),
        }
        within = all(r["peak_rss"] <= budget for r in done)
        lines.append(f"  {stage:<20} " + ", ".join(f"{k} {v:.2f}" for k, v in slopes.items())
                     + f"; peak RSS {'within' if within else 'OVER'} the budget at every size")
        for a, b in zip(done, done[1:]):
            lines.append(f"  {'':<20} {a['edges']:,} -> {b['edges']:,} edges (x{b['edges'] / a['edges']:g}): "
                         f"wall x{b['wall'] / a['wall']:.2f}, stage s x"
                         f"{b['summary']['seconds'] / a['summary']['seconds']:.2f}, cpu x{b['cpu'] / a['cpu']:.2f}, "
                         f"peak RSS x{b['peak_rss'] / a['peak_rss']:.2f}")
    lines += _baseline_lines(rows, budget, args.memory_budget)
    lines += ["```", ""]
    return "\n".join(lines)


def _baseline_lines(rows, budget, budget_text):
    """Per size: the scipy baseline's hops and peak RSS beside bigprune's propagate stage."""
    lines = ["", f"baseline (scipy.sparse Â @ X, graph and features whole in memory) against bigprune "
                 f"propagate, --memory-budget {budget_text}:"]
    for edges in sorted({r["edges"] for r in rows}):
        ours = next((r for r in rows if r["edges"] == edges and r["stage"] == "propagate"), None)
        theirs = next((r for r in rows if r["edges"] == edges and r["stage"] == "baseline"), None)
        if ours is None or theirs is None or "hop_seconds" not in ours:
            continue
        hops = sum(ours["hop_seconds"])
        line = (f"  {edges:>13,} edges: bigprune hops {hops:.1f} s ({ours['way']}), stage peak "
                f"{ours['peak_rss'] / 2**30:.2f} GiB; ")
        if theirs["status"] == "ok":
            peak = theirs["peak_rss"]
            line += (f"baseline hops {theirs['summary']['seconds']:.1f} s, peak {peak / 2**30:.2f} GiB "
                     f"({'within' if peak <= budget else 'OVER'} the budget); speed ratio "
                     f"{theirs['summary']['seconds'] / hops:.2f}x, peak RSS ratio "
                     f"{ours['peak_rss'] / peak:.2f}")
        else:
            line += (f"baseline {theirs['status']} (estimate "
                     f"{'within' if theirs.get('estimate', 0) <= budget else 'over'} the budget)")
        lines.append(line)
    return lines


def _budget_bytes(text):
    sys.path.insert(0, str(ROOT))
    from bigprune.common.memory import parse_size  # stdlib-only module: keeps this process small

    return parse_size(text)


def _machine():
    model = next((line.split(":", 1)[1].strip() for line in open("/proc/cpuinfo")
                  if line.startswith("model name")), platform.processor())
    mem = next(int(line.split()[1]) * 1024 for line in open("/proc/meminfo") if line.startswith("MemTotal"))
    probe = ("import sys, numpy, duckdb, numba, faiss, pyarrow; print(sys.version.split()[0], "
             "numpy.__version__, duckdb.__version__, numba.__version__, faiss.__version__, "
             "pyarrow.__version__)")
    versions = subprocess.run([sys.executable, "-c", probe], capture_output=True, text=True).stdout.split()
    names = ("python", "numpy", "duckdb", "numba", "faiss", "pyarrow")
    return [f"machine: {os.cpu_count()} cores ({model}), {mem / 2**30:.1f} GiB RAM, "
            f"{platform.system()} {platform.release()}; shared with other jobs (load column)",
            "versions: " + ", ".join(f"{n} {v}" for n, v in zip(names, versions))]


if __name__ == "__main__":
    main()

"""The cluster's cost and speed-up: the nightly job (ingest, propagate, select) on one server,
on ``local:1`` and on ``local:2``, over one generated graph (by default the 10M-edge point of
bench/scale.py's ladder: 2M nodes, d = 64, 1% train, 1% test).

Each mode runs ``python3 -m bigprune run job.toml`` as a subprocess over the same inputs into a
fresh store, with the same ``--memory-budget`` (per process on one server, per worker on a
cluster), as a nightly job would run: one cluster for the whole job.

    one server   threads = 1 (the cores one worker has) and, for reference, threads = 2
    local:1      one worker process, one thread
    local:2      two worker processes, one thread each (this machine has two cores)

Each mode runs ``--repeats`` times (modes interleaved) and each figure is its fastest run.
Stage times are the job log's (each step's own seconds); the job's wall time, from ``os.wait4``,
adds interpreter start, planning and, on a cluster, starting it. Peak RSS: the client's from
``os.wait4``; each worker's is the largest ``VmHWM`` read from /proc every 0.2 s while the job
runs (the worker processes are the client's descendants). It prints, per stage and for the
whole job, local:1 against one server at one thread (the cluster's overhead, goal <= 1.3x) and
local:2 against local:1 (the speed-up from a second worker, goal >= 1.6x), with one server's own
speed-up from a second thread beside it (what two cores give this work here), checks that the
committed stages of every mode hold the same bytes, and appends a dated section to
bench/RESULTS.md (``--results ''`` to skip).

    python3 bench/cluster.py                         # 10M edges, 2GiB per process
    python3 bench/cluster.py --edges 1M --results '' # a quick look
"""
import os
import sys

_HERE = os.path.dirname(os.path.abspath(__file__))  # bench/select.py would shadow the stdlib's select
sys.path[:] = [p for p in sys.path if os.path.abspath(p or ".") != _HERE]

import argparse  # noqa: E402
import datetime  # noqa: E402
import hashlib  # noqa: E402
import json  # noqa: E402
import shlex  # noqa: E402
import shutil  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import threading  # noqa: E402
import time  # noqa: E402
from pathlib import Path  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
MODES = {"one server": [], "one server, 2 threads": [], "local:1": ["--cluster", "local:1"],
         "local:2": ["--cluster", "local:2"]}
THREADS = {"one server": 1, "one server, 2 threads": 2}
STAGES = ("ingest", "propagate", "select")


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0],
                                     formatter_class=argparse.RawDescriptionHelpFormatter,
                                     epilog="\n".join(__doc__.splitlines()[-2:]))
    parser.add_argument("--edges", default="10M", help="edge rows of the generated graph (default %(default)s)")
    parser.add_argument("--memory-budget", default="2GiB", help="per process (default %(default)s)")
    parser.add_argument("--strategy", default="kmedian", help="the select stage's rule (default %(default)s)")
    parser.add_argument("--select-budget", default="0.1", help="the select stage's --budget (default %(default)s)")
    parser.add_argument("--repeats", type=int, default=2,
                        help="runs per mode; each figure is the fastest (default %(default)s: this "
                             "machine is noisy)")
    parser.add_argument("--data-cache", default=None, metavar="DIR",
                        help="keep the generated graph here and reuse it on the next run")
    parser.add_argument("--workdir", default=None, help="parent folder of the temporary stores")
    parser.add_argument("--results", default=str(ROOT / "bench" / "RESULTS.md"))
    args = parser.parse_args()
    started = datetime.datetime.now(datetime.timezone.utc)
    edges = int(float(args.edges.upper().rstrip("KMG")) * {"K": 1e3, "M": 1e6, "G": 1e9}.get(args.edges[-1].upper(), 1))
    with tempfile.TemporaryDirectory(dir=args.workdir) as tmp:
        tmp = Path(tmp)
        data = Path(args.data_cache).resolve() / f"edges{edges}" if args.data_cache else tmp / "data"
        if not (data / "nodes.parquet").exists():
            print(f"generating {edges:,} edge rows in {data} ...", flush=True)
            subprocess.run([sys.executable, str(ROOT / "bench" / "scale.py"), "--generate", str(data),
                            str(edges), "--dim", "64"], check=True, cwd=ROOT, stdout=subprocess.DEVNULL)
        runs = []
        for repeat in range(args.repeats):  # modes interleaved, so that a noisy spell hits them all
            for mode, flags in MODES.items():
                work = tmp / f"{mode.replace(' ', '-').replace(',', '').replace(':', '')}-{repeat}"
                job = _write_job(work, data, args, THREADS.get(mode))
                cmd = [sys.executable, "-m", "bigprune", "run", str(job), "--quiet", *flags]
                row = {"mode": mode, **_measure(cmd)}
                row["stages"] = _stage_seconds(work / "bigprune-log.jsonl")
                row["digests"] = _stage_digests(work / "store")
                shutil.rmtree(work)
                runs.append(row)
                print(_line(row), flush=True)
        rows = [_fastest([r for r in runs if r["mode"] == mode]) for mode in MODES]
    text = _report(rows, args, started)
    print(text)
    if args.results:
        with open(args.results, "a") as fh:
            fh.write("\n" + text)


def _fastest(runs):
    """One mode's runs as one row: the least wall time and stage seconds, the largest peaks."""
    ok = [r for r in runs if r["status"] == "ok"] or runs
    row = dict(ok[0])
    row["wall"] = min(r["wall"] for r in ok)
    row["stages"] = {stage: min(r["stages"][stage] for r in ok if stage in r["stages"])
                     for stage in ok[0]["stages"]}
    row["client_rss"] = max(r["client_rss"] for r in ok)
    row["worker_rss"] = max((r["worker_rss"] for r in ok), key=lambda peaks: max(peaks, default=0))
    row["digests"] = ok[0]["digests"] if all(r["digests"] == ok[0]["digests"] for r in ok) else {}
    return row


def _write_job(work, data, args, threads):
    work.mkdir(parents=True)
    lines = ['store = "store"', f'memory_budget = "{args.memory_budget}"']
    if threads:
        lines.append(f"threads = {threads}")
    lines += ["[ingest]", f'edges = "{data / "edges"}"', f'nodes = "{data / "nodes.parquet"}"',
              "[propagate]", "hops = 2", "[[select]]", f'strategy = "{args.strategy}"',
              f"budget = {float(args.select_budget)}", 'out = "picks.parquet"']
    (work / "job.toml").write_text("\n".join(lines) + "\n")
    return work / "job.toml"


def _stage_seconds(log):
    """Each step's own seconds from the job's log, by stage (ingest, propagate, select)."""
    found = {}
    for line in log.read_text().splitlines() if log.exists() else []:
        record = json.loads(line)
        if record["outcome"] == "done":
            found[record["stage"].split()[0]] = record["seconds"]
    return found


def _descendants(pid):
    """Pids below ``pid``, from /proc's parent links."""
    parents = {}
    for entry in os.listdir("/proc"):
        if entry.isdigit():
            try:
                with open(f"/proc/{entry}/stat") as fh:
                    parents[int(entry)] = int(fh.read().rsplit(")", 1)[1].split()[1])
            except OSError:
                continue
    found, frontier = set(), {pid}
    while frontier:
        frontier = {p for p, parent in parents.items() if parent in frontier} - found
        found |= frontier
    return found


def _hwm(pid):
    try:
        with open(f"/proc/{pid}/status") as fh:
            for line in fh:
                if line.startswith("VmHWM:"):
                    return int(line.split()[1]) * 1024
    except OSError:
        return 0
    return 0


def _is_worker(pid):
    """A Dask worker process (not the nanny, nor multiprocessing's resource tracker)."""
    try:
        with open(f"/proc/{pid}/cmdline", "rb") as fh:
            cmd = fh.read().replace(b"\0", b" ").decode(errors="replace")
    except OSError:
        return False
    return "spawn_main" in cmd or "dask_worker" in cmd


def _measure(cmd):
    """Run ``cmd``: its wall time, its own peak RSS, and its workers' peak RSS."""
    peaks, stop = {}, threading.Event()
    err = tempfile.TemporaryFile(mode="w+")
    tic = time.perf_counter()
    child = subprocess.Popen(cmd, cwd=ROOT, stdout=subprocess.DEVNULL, stderr=err)

    def sample():
        while not stop.wait(0.2):
            for pid in _descendants(child.pid):
                if _is_worker(pid):
                    peaks[pid] = max(peaks.get(pid, 0), _hwm(pid))

    sampler = threading.Thread(target=sample, daemon=True)
    sampler.start()
    _, code, usage = os.wait4(child.pid, 0)  # this child's own rusage (Popen.wait would lose it)
    wall = time.perf_counter() - tic
    stop.set()
    sampler.join()
    child.returncode = os.waitstatus_to_exitcode(code)
    err.seek(0)
    last = err.read().strip().splitlines()[-1:]
    status = "ok" if child.returncode == 0 else f"exit {child.returncode}: {last}"
    return {"wall": wall, "status": status, "client_rss": usage.ru_maxrss * 1024,
            "worker_rss": sorted(v for v in peaks.values() if v)}


def _stage_digests(store):
    """sha256 of every committed stage file, by stage/name (the modes must agree)."""
    manifest = json.loads((store / "manifest.json").read_text())
    found = {}
    for stage, entry in manifest["stages"].items():
        for path in sorted((store / entry["dir"]).iterdir()):
            found[f"{stage}/{path.name}"] = hashlib.sha256(path.read_bytes()).hexdigest()
    return found


def _line(row):
    workers = ", ".join(f"{v / 2**30:.2f}" for v in row["worker_rss"]) or "-"
    stages = "  ".join(f"{stage} {row['stages'].get(stage, float('nan')):6.1f}" for stage in STAGES)
    return (f"{row['mode']:<22} job {row['wall']:6.1f} s ({stages})  client peak "
            f"{row['client_rss'] / 2**30:4.2f} GiB  worker peaks [{workers}] GiB  {row['status']}")


def _report(rows, args, started):
    by_mode = {r["mode"]: r for r in rows if r["status"] == "ok"}
    lines = [f"## Cluster: one server against local:1 and local:2, {started:%Y-%m-%d %H:%M} UTC", "", "```",
             f"$ python3 bench/cluster.py {' '.join(shlex.quote(a) for a in sys.argv[1:])}",
             f"load average at the end: {os.getloadavg()[0]:.1f}; {os.cpu_count()} cores; seconds per "
             f"stage from the job's log; fastest of {args.repeats} run(s) per mode", ""]
    lines += [_line(r) for r in rows] + [""]
    for stage in (*STAGES, "job"):
        def seconds(mode):
            row = by_mode.get(mode)
            return None if row is None else row["wall"] if stage == "job" else row["stages"].get(stage)
        one, two, l1, l2 = (seconds(m) for m in MODES)
        if None in (one, two, l1, l2):
            lines.append(f"{stage:<10} not every mode finished")
            continue
        lines.append(f"{stage:<10} overhead local:1 / one server (1 thread) {l1 / one:.2f}x (goal <= 1.3); "
                     f"speed-up local:1 / local:2 {l1 / l2:.2f}x (goal >= 1.6); one server's "
                     f"1 -> 2 threads {one / two:.2f}x")
    digests = {r["mode"]: r["digests"] for r in rows if "digests" in r}
    first = next(iter(digests.values()), {})
    differ = {name: [mode for mode, found in digests.items() if found.get(name) != digest]
              for name, digest in first.items()}
    differ = {name: modes for name, modes in differ.items() if modes}
    lines.append(f"committed stage files identical in every mode: {'NO' if differ else 'yes'} "
                 f"({len(first)} files)" + "".join(f"; {name} differs in {', '.join(modes)}"
                                                   for name, modes in differ.items()))
    lines += ["```", ""]
    return "\n".join(lines)


if __name__ == "__main__":
    main()

"""Kill and resume: ``bigprune run`` SIGKILLed at random moments, rerun, compared with a clean run.

Generates the marketplace scenario once, runs the job uninterrupted twice (the reference, and a
check that two clean runs agree byte for byte), then for each trial starts the job in a fresh
directory, SIGKILLs it after a delay drawn uniformly from [0, clean run time], reruns it to
completion and compares every ``.npy`` and ``.parquet`` of the committed stages and every
selection ``.parquet`` with the reference. It also checks that nothing is left behind (staging
directories, the lock, temporary files, stage directories the manifest does not name) and that a
third run would skip every step. Prints where the kills landed and what came of them.

    python3 bench/resume.py                         # 20k nodes, 20 trials
    python3 bench/resume.py --nodes 5000 --trials 5
"""
import os
import sys

# bench/select.py would shadow the standard library's select module (which subprocess imports):
# keep this script's folder off the import path.
_HERE = os.path.dirname(os.path.abspath(__file__))
sys.path[:] = [p for p in sys.path if os.path.abspath(p or ".") != _HERE]

import argparse  # noqa: E402
import hashlib  # noqa: E402
import json  # noqa: E402
import resource  # noqa: E402
import signal  # noqa: E402
import subprocess  # noqa: E402
import tempfile  # noqa: E402
import time  # noqa: E402
from collections import Counter, defaultdict  # noqa: E402
from pathlib import Path  # noqa: E402

import numpy as np  # noqa: E402

ROOT = Path(__file__).resolve().parents[1]
STRATEGIES = ("kcenter", "kcenter-pool", "random", "degree", "pagerank")


def write_job(workdir, data, threads=None, budget=0.05, study=False):
    """``workdir/job.toml`` over the scenario in ``data``: store and selections inside ``workdir``;
    with ``study``, a two-cell study (the full pool and random at 10 %) in ``workdir/study``."""
    workdir = Path(workdir)
    (workdir / "selections").mkdir(parents=True, exist_ok=True)
    lines = ['store = "store"', 'memory_budget = "1GiB"']
    if threads is not None:
        lines.append(f"threads = {int(threads)}")
    lines += ["[ingest]", f'edges = "{Path(data) / "edges"}"', f'nodes = "{Path(data) / "nodes.parquet"}"',
              "[propagate]", "hops = 2"]
    for strategy in STRATEGIES:
        lines += ["[[select]]", f'strategy = "{strategy}"', f"budget = {budget}",
                  f'out = "selections/{strategy}.parquet"']
    if study:
        lines += ["[study]", 'out = "study"', 'strategies = ["random"]', "budgets = [0.1, 1]",
                  "repeats = 1", f'answers = "{Path(data) / "answers.parquet"}"']
    (workdir / "job.toml").write_text("\n".join(lines) + "\n")
    return workdir / "job.toml"


def command(workdir, *extra):
    return [sys.executable, "-m", "bigprune", "run", str(Path(workdir) / "job.toml"), "--quiet", *extra]


def environment():
    env = dict(os.environ, PYTHONUNBUFFERED="1")  # stage lines must reach the file before a kill
    env["PYTHONPATH"] = os.pathsep.join([str(ROOT), env.get("PYTHONPATH", "")])
    return env


def run(workdir, *extra):
    """Run the job to completion; (exit status, stdout, stderr, seconds)."""
    tic = time.perf_counter()
    done = subprocess.run(command(workdir, *extra), capture_output=True, text=True, env=environment())
    return done.returncode, done.stdout, done.stderr, time.perf_counter() - tic


def outputs(workdir):
    """sha256 of each committed stage file and each selection table, keyed by stage and name."""
    workdir = Path(workdir)
    manifest = json.loads((workdir / "store" / "manifest.json").read_text())
    found = {}
    for stage, entry in manifest["stages"].items():
        for path in sorted((workdir / "store" / entry["dir"]).iterdir()):
            found[f"{stage}/{path.name}"] = _sha(path)
    for path in sorted((workdir / "selections").glob("*.parquet")):
        found[f"selections/{path.name}"] = _sha(path)
    for path in sorted((workdir / "study" / "cells").glob("*.json")):  # a study's cells, less timings
        record = json.loads(path.read_text())  # and keys (they name the store's stage folders)
        record.pop("key", None)
        record["result"].pop("seconds", None)
        found[f"study/cells/{path.name}"] = hashlib.sha256(json.dumps(record, sort_keys=True).encode()).hexdigest()
    return found


def leftovers(workdir):
    """What an interrupted run may leave: staging, the lock, temporaries, unnamed stage dirs."""
    store = Path(workdir) / "store"
    manifest = json.loads((store / "manifest.json").read_text())
    named = {entry["dir"] for entry in manifest["stages"].values()}
    left = [p.name for p in store.iterdir() if p.name in (".staging", ".lock") or p.name.endswith(".tmp")]
    left += [f"orphan {p.name}" for p in store.iterdir()
             if p.is_dir() and not p.name.startswith(".") and p.name not in named]
    left += [str(p.relative_to(workdir)) for p in Path(workdir).rglob("*.tmp") if p.parent != store]
    return sorted(left)


def kill_and_resume(workdir, delay, at=None):
    """Start the job, SIGKILL it ``delay`` seconds after it starts (or after it starts step
    ``at``, e.g. ``"propagate"``), rerun it; a dict describing the trial."""
    workdir = Path(workdir)
    log = workdir / "killed.out"
    tic = time.perf_counter()
    with open(log, "w") as out:
        child = subprocess.Popen(command(workdir), stdout=out, stderr=subprocess.STDOUT, env=environment())
        while at is not None and child.poll() is None and at not in _started(log.read_text()):
            time.sleep(0.005)
        try:
            stage = f"finished first (exit {child.wait(timeout=delay)})"
        except subprocess.TimeoutExpired:
            child.send_signal(signal.SIGKILL)
            child.wait()
            stage = _running_stage(log.read_text())
    killed_after = time.perf_counter() - tic
    code, stdout, stderr, seconds = run(workdir)
    trial = {"stage": stage, "delay": delay, "killed_after": killed_after, "resume_code": code,
             "resume_seconds": seconds, "resume_stderr": stderr.strip(),
             "reran": _started(stdout)}
    if code == 0:
        trial["outputs"] = outputs(workdir)
        trial["leftovers"] = leftovers(workdir)
        _, plan, _, _ = run(workdir, "--dry-run")
        trial["all_skip_after"] = all(line.startswith("skip") for line in plan.splitlines() if line.strip())
    return trial


def _running_stage(text):
    """The stage a killed run was in: the last ``run`` line it printed (``startup`` if none)."""
    started = _started(text)
    return started[-1] if started else "startup"


def _started(text):
    """The steps a run started, from its ``run   <step>   <why>`` lines (selections by strategy)."""
    return [line[6:].split("  ")[0].split(" -> ")[0].strip() for line in text.splitlines()
            if line.startswith("run ")]


def _sha(path):
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def main():
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--nodes", type=int, default=20_000)
    parser.add_argument("--trials", type=int, default=20)
    parser.add_argument("--seed", type=int, default=0, help="seeds the scenario and the kill delays")
    parser.add_argument("--threads", type=int, default=None, help="threads = N in the job (default: all cores)")
    parser.add_argument("--workdir", default=None, help="where the temporary directories go")
    args = parser.parse_args()
    with tempfile.TemporaryDirectory(dir=args.workdir, prefix="bench-resume-") as tmp:
        _bench(Path(tmp), args)


def _bench(tmp, args):
    from bigprune.scenario.scenario import generate

    generate(tmp / "data", nodes=args.nodes, dim=16, days=2, parts_per_day=2, seed=args.seed)
    clean = []
    for name in ("reference", "second clean run"):
        write_job(tmp / name, tmp / "data", args.threads)
        code, _, stderr, seconds = run(tmp / name)
        if code != 0:
            sys.exit(f"{name} failed ({code}): {stderr.strip()}")
        clean.append(seconds)
    reference = outputs(tmp / "reference")
    repeatable = outputs(tmp / "second clean run") == reference
    span = float(np.median(clean))
    print(f"{args.nodes:,} nodes, {len(STRATEGIES)} selections; clean run {span:.2f} s "
          f"(two runs: {clean[0]:.2f}, {clean[1]:.2f} s); two clean runs byte-identical: {repeatable}")

    rng = np.random.default_rng(args.seed)
    trials = []
    for i in range(args.trials):
        work = tmp / f"trial-{i:02d}"
        write_job(work, tmp / "data", args.threads)
        trial = kill_and_resume(work, float(rng.uniform(0.0, span)))
        trial["identical"] = trial.get("outputs") == reference
        trials.append(trial)
        print(f"  trial {i:2d}: killed after {trial['killed_after']:5.2f} s in {trial['stage']:<24} "
              f"resume exit {trial['resume_code']}, reran {len(trial['reran'])} step(s), "
              f"identical: {trial['identical']}, left over: {trial.get('leftovers') or 'nothing'}"
              + ("" if trial["resume_code"] == 0 else f"  [{trial['resume_stderr']}]"))

    by_stage = defaultdict(Counter)
    for trial in trials:
        outcome = ("identical" if trial["identical"] else "DIFFERENT" if trial["resume_code"] == 0
                   else f"resume exit {trial['resume_code']}")
        by_stage[trial["stage"]][outcome] += 1
    print("\nkill points by stage:")
    for stage, outcomes in by_stage.items():
        print(f"  {stage:<26} {sum(outcomes.values()):>3}  " + ", ".join(f"{k} {v}" for k, v in outcomes.items()))
    ok = sum(t["identical"] for t in trials)
    skipped = sum(bool(t.get("all_skip_after")) for t in trials)
    left = sum(bool(t.get("leftovers")) for t in trials)
    ratio = np.mean([(t["killed_after"] + t["resume_seconds"]) / span for t in trials])
    print(f"\n{ok}/{len(trials)} resumed runs byte-identical to the reference; {skipped}/{len(trials)} "
          f"plan to skip every step afterwards; {left} left something behind")
    print(f"killed run + resume took {ratio:.2f}x a clean run on average")
    peak = resource.getrusage(resource.RUSAGE_CHILDREN).ru_maxrss * 1024
    print(f"largest child peak RSS: {peak / 2**20:.0f} MiB")
    if ok != len(trials) or not repeatable:
        sys.exit(1)


if __name__ == "__main__":
    main()

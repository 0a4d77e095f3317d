"""The demo: a generated second-hand marketplace, run through the nightly job.

It writes ``WORKDIR/job.toml`` and runs it, so ``bigprune run WORKDIR/job.toml`` repeats the
demo's job and skips what is already done.
"""
import json
import shutil
import time
from pathlib import Path

from ..common.errors import InputError
from ..job.job import run_job
from ..common.memory import DEFAULT_BUDGET, format_size, peak_rss
from .scenario import generate

DEMO_NODES = 100_000
DEMO_BUDGET = 0.02
# kmedian first: the rule that beat random at every budget on a real citation graph (README).
DEMO_STRATEGIES = ("kmedian", "kmeans", "kcenter", "random", "degree", "pagerank")
# The small study the demo runs: how many training nodes each rule needs to come within one
# accuracy point of the full pool, scored on this week's answers. The rungs reach 0.2 because on
# 100k listings no rule comes within the point below 0.05; two repeats keep the demo near a
# minute (kmedian and the k-supplier greedy ignore the seed and run once per budget).
DEMO_STUDY = {"strategies": ("kmedian", "kcenter", "random"), "budgets": (0.005, 0.01, 0.02, 0.05, 0.1, 0.2, 1.0),
              "repeats": 2, "tolerance": 0.01}
STAMP = "demo-params.json"
# Marks a work folder as the demo's own: only such a folder (or an empty one) is written over.
MARKER = ".bigprune-demo"


def demo(workdir, nodes=None, seed=0, memory_budget=DEFAULT_BUDGET, threads=None, echo=print):
    """Generate the marketplace under ``workdir``, write ``job.toml`` and run it.

    Returns the selection reports keyed by strategy.
    """
    nodes = DEMO_NODES if nodes is None else nodes
    if nodes < 1000:
        raise InputError(f"--nodes {nodes}: the demo needs at least 1000 listings")
    root = Path(workdir)
    _claim(root, workdir)
    started = time.time()
    data = root / "data"
    params = {"nodes": nodes, "seed": seed}
    stamp = data / STAMP
    if stamp.exists() and json.loads(stamp.read_text()) == params:
        echo(f"[data] reusing the generated marketplace in {data}")
    else:
        if data.exists():
            shutil.rmtree(data)  # our own generated files from an earlier demo run
        echo(f"[data] generating a marketplace of {nodes:,} listings in {data}")
        generate(data, nodes=nodes, seed=seed)
        stamp.write_text(json.dumps(params))
    job = root / "job.toml"
    job.write_text(_job_text(memory_budget, threads, seed))
    echo(f"[job]  {job}")
    steps = run_job(job, echo=lambda line: echo("       " + line))
    reports = {}
    for strategy in DEMO_STRATEGIES:
        report = root / "selections" / f"{strategy}.json"
        reports[strategy] = json.loads(report.read_text())
    echo("")
    echo(f"{DEMO_BUDGET:.0%} of the moderated listings, chosen to cover this week's listings "
         "(distances in the 2-hop smoothed embedding):")
    echo(_table(reports))
    echo("")
    summary = json.loads((root / "study" / "study.json").read_text())
    echo("")
    echo(_study_lines(summary))
    echo(f"selections and reports: {root / 'selections'}")
    echo(f"study report: {root / 'study' / 'report.html'}")
    echo(f"answers for this week's listings (selection never reads them): {data / 'answers.parquet'}")
    echo(f"rerun the same job: bigprune run {job}")
    ran = sum(step["run"] for step in steps)
    echo(f"done in {time.time() - started:.0f} s ({ran} of {len(steps)} steps ran), "
         f"peak memory {format_size(peak_rss())}")
    echo(f"caution: {reports[DEMO_STRATEGIES[0]]['caution']}")
    return reports


def _claim(root, given):
    """Make ``root`` the demo's folder: refuse a file, or a non-empty folder without the marker
    (the user's own files, which the demo would overwrite); mark a new or empty one."""
    if root.exists() and not root.is_dir():
        raise InputError(f"--workdir {given}: exists and is not a directory")
    if (root / MARKER).is_file():
        return
    if root.is_dir() and any(root.iterdir()):
        raise InputError(f"--workdir {given}: folder is not empty and was not made by bigprune demo "
                         f"(no {MARKER} file); the demo would overwrite what is there, so give a new "
                         f"or empty folder")
    root.mkdir(parents=True, exist_ok=True)
    (root / MARKER).write_text("made by bigprune demo, which may overwrite anything in this folder\n")


def _job_text(memory_budget, threads, seed):
    lines = ['# Written by bigprune demo; rerun with: bigprune run job.toml', 'store = "store"',
             f'memory_budget = "{memory_budget}"']
    if threads is not None:
        lines.append(f"threads = {int(threads)}")
    lines += ["", "[ingest]", 'edges = "data/edges"', 'nodes = "data/nodes.parquet"', "",
              "[propagate]", "hops = 2", 'norm = "sym"']
    for strategy in DEMO_STRATEGIES:
        lines += ["", "[[select]]", f'strategy = "{strategy}"', f"budget = {DEMO_BUDGET}", f"seed = {seed}",
                  f'out = "selections/{strategy}.parquet"']
    quoted = ", ".join(f'"{s}"' for s in DEMO_STUDY["strategies"])
    lines += ["", "[study]", 'out = "study"', f"strategies = [{quoted}]",
              f"budgets = [{', '.join(repr(b) for b in DEMO_STUDY['budgets'])}]",  # 1.0 = the pool
              f"repeats = {DEMO_STUDY['repeats']}", f"tolerance = {DEMO_STUDY['tolerance']}",
              'answers = "data/answers.parquet"']
    return "\n".join(lines) + "\n"


def _study_lines(summary):
    rec = summary["recommendation"]
    lines = [f"Study: the proxy trained on each rule's subsets, scored on this week's answers "
             f"(full pool {rec['full_accuracy']:.3f}; enough = within {rec['tolerance']:g}):",
             f"{'rule':<14}{'enough at':>10}{'nodes':>9}{'accuracy':>10}"]
    for rule, pick in rec["rules"].items():
        if pick is None:
            lines.append(f"{rule:<14}{'none':>10}")
        else:
            lines.append(f"{rule:<14}{pick['budget']:>10g}{pick['training_nodes']:>9,}{pick['accuracy']:>10.3f}")
    if rec["best"]:
        lines.append(f"fewest training nodes: {rec['best']}")
        fill = rec["rules"][rec["best"]]["fill_picks"]
        if fill:
            lines.append(f"  ({fill:,} of those nodes came from kcenter's farthest-first fill, chosen after "
                         "every target was served; see the study report)")
    return "\n".join(lines)


def _table(reports):
    header = (f"{'strategy':<14}{'picked':>8}{'radius':>9}{'mean':>8}{'p90':>8}{'classes':>9}"
              f"{'degree':>8}{'homophily':>11}")
    lines = [header, "-" * len(header)]
    for name, r in reports.items():
        cov, sel = r["coverage"], r["diagnostics"]["selected"]
        lines.append(f"{name:<14}{r['selected']:>8,}{cov['radius']:>9.3f}{cov['mean']:>8.3f}{cov['p90']:>8.3f}"
                     f"{len(r['classes']):>9}{sel['degree']:>8.1f}{sel['homophily']:>11.2f}")
    first = next(iter(reports.values()))
    pool = first["diagnostics"]["pool"]
    lines.append(f"{'(whole pool)':<14}{first['pool']:>8,}{'':>34}{pool['degree']:>8.1f}{pool['homophily']:>11.2f}")
    return "\n".join(lines)

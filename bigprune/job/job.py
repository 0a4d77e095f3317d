"""The nightly job: ingest -> propagate -> select (-> study) from one job file, skipping what is current.

A stage runs when the store lacks it or when its inputs (fingerprints) or parameters changed;
whatever it feeds runs again after it. Each stage commits atomically, so a job killed at any
point resumes on the next run. One JSON line per stage goes to the log for the scheduler.
"""
import json
import time
from pathlib import Path

from .config import load_job
from ..common.errors import BigpruneError, InputError
from ..common.fingerprint import fingerprints, key
from ..common.memory import format_size, peak_rss
from ..common.sources import edge_files
from ..common.store import Store


def plan_job(job):
    """The stages in order, each ``{"stage", "run": bool, "why": str, ...}``; reads only."""
    store = Store(job["store"])
    manifest = store.manifest()
    stages = manifest["stages"]
    steps = []

    ingest = job["ingest"]
    files = [str(p) for p in edge_files(ingest["edges"])]
    inputs = {"edges": fingerprints(files), "nodes": fingerprints([ingest["nodes"]])}
    if ingest["features"]:
        inputs["features"] = fingerprints([ingest["features"]])
    graph = stages.get("graph")
    if graph is None:
        why = "the store has no graph yet"
    elif graph["params"].get("drop_unknown") != ingest["drop_unknown"]:
        why = "drop_unknown changed"
    elif _renamed_params(graph["params"]) != _column_params(ingest):
        why = "input column names changed"
    elif _comparable(graph.get("inputs")) != _comparable(inputs):
        why = _what_changed(graph.get("inputs", {}), inputs)
    else:
        why = None
    steps.append({"stage": "ingest", "run": why is not None, "why": why or "inputs unchanged"})

    prop = stages.get("propagate")
    wanted = dict(job["propagate"])
    if steps[-1]["run"]:
        why = "the graph will be rebuilt"
    elif prop is None:
        why = "the store has no propagated features yet"
    elif {k: prop["params"].get(k) for k in wanted} != wanted:
        why = f"parameters changed to {wanted}"
    else:
        why = None
    steps.append({"stage": "propagate", "run": why is not None, "why": why or "parameters unchanged"})

    upstream = None if steps[-1]["run"] else prop["dir"]
    outputs = manifest.get("outputs", {})
    for entry in job["select"]:
        params = {k: v for k, v in entry.items() if k != "out"}
        lists = fingerprints([entry[k] for k in ("include", "exclude") if entry[k]])
        stamp = key(params, _comparable({"lists": lists}), upstream) if upstream else None
        done = outputs.get(str(Path(entry["out"]).resolve()), {})
        present = Path(entry["out"]).exists() and Path(entry["out"]).with_suffix(".json").exists()
        if stamp is None:
            why = "propagated features will change"
        elif not present:
            why = "output missing"
        elif done.get("key") != stamp:
            why = "parameters or features changed since it was written"
        else:
            why = None
        steps.append({"stage": f"select {entry['strategy']} -> {Path(entry['out']).name}", "run": why is not None,
                      "why": why or "output current", "entry": entry, "params": params})
    if job.get("study"):
        steps.append(_plan_study(job["study"], upstream, outputs))
    return steps


def _plan_study(entry, upstream, outputs):
    """The study step: current when its summary was written for the same parameters, answers
    and propagated features (the study itself also skips its finished cells)."""
    from ..selection.strategies import STRATEGIES

    params = {k: v for k, v in entry.items() if k != "answers"}
    params["strategies"] = entry["strategies"] or list(STRATEGIES)
    if entry["answers"] and Path(entry["answers"]).is_file():
        params["answers"] = fingerprints([entry["answers"]])
    summary = Path(entry["out"]) / "study.json"
    stamp = key(params, upstream) if upstream else None
    if stamp is None:
        why = "propagated features will change"
    elif not summary.exists():
        why = "output missing"
    elif outputs.get(str(summary.resolve()), {}).get("key") != stamp:
        why = "parameters, answers or features changed since it was written"
    else:
        why = None
    return {"stage": f"study -> {Path(entry['out']).name}", "run": why is not None,
            "why": why or "output current", "entry": entry, "params": params}


def run_job(path, dry_run=False, echo=print):
    """Run (or with ``dry_run`` only print) the job in ``path``; return the plan with outcomes."""
    job = load_job(path)
    store = Store(job["store"])
    if dry_run:
        steps = plan_job(job)
        for step in steps:
            echo(f"{'run ' if step['run'] else 'skip'}  {step['stage']:<40} {step['why']}")
        return steps
    from ..ingestion.ingest import ingest
    from ..propagation.propagate import propagate

    opts = {"memory_budget": job["memory_budget"], "threads": job["threads"]}
    began = time.time()
    log = Path(job["log"]) if job["log"] else Path(job["store"]).parent / "bigprune-log.jsonl"
    with store.locked():
        steps = plan_job(job)
        for step in steps:
            if not step["run"]:
                _log(log, step, "skipped", time.time(), {})
                echo(f"skip  {step['stage']:<40} {step['why']}")
                continue
            echo(f"run   {step['stage']:<40} {step['why']}")
            started = time.time()
            try:
                if step["stage"] == "ingest":
                    ing = job["ingest"]
                    result = ingest(ing["edges"], ing["nodes"], store, features=ing["features"],
                                    drop_unknown=ing["drop_unknown"], columns=input_columns(ing), **opts)
                elif step["stage"] == "propagate":
                    result = propagate(store, **job["propagate"], **opts)
                elif step["stage"].startswith("study"):
                    result = _run_study(store, step, opts)
                else:
                    entry = step["entry"]
                    Path(entry["out"]).parent.mkdir(parents=True, exist_ok=True)
                    result = _run_select(store, entry, opts)
                    lists = fingerprints([entry[k] for k in ("include", "exclude") if entry[k]])
                    store.record_output(entry["out"], key(step["params"], _comparable({"lists": lists}),
                                                          store.entry("propagate")["dir"]))
            except BigpruneError as exc:
                _log(log, step, "failed", started, {"error": str(exc)})
                raise
            _log(log, step, "done", started, _rows(result))
            step["result"] = result
    echo(_summary_line(steps, time.time() - began))
    return steps


def _summary_line(steps, seconds):
    """The job's closing line: steps run and skipped, wall time, the process's peak memory."""
    ran = sum(step["run"] for step in steps)
    return (f"done: {ran} step(s) run, {len(steps) - ran} skipped, {seconds:.1f} s, "
            f"peak memory {format_size(peak_rss())}")


def _run_select(store, entry, opts):
    """One [[select]] table; with ``keep_previous`` the selection already at ``out`` (last
    night's) is kept and seeds today's, and the report counts what changed."""
    from ..selection.select import select

    include = entry["include"]
    if entry["keep_previous"] and Path(entry["out"]).exists():
        if include:
            raise InputError(f"[[select]] {entry['out']}: use keep_previous or include, not both")
        include = entry["out"]  # read whole before the new selection replaces it
    Path(entry["out"]).parent.mkdir(parents=True, exist_ok=True)
    return select(store, entry["strategy"], entry["budget"], targets=entry["targets"], seed=entry["seed"],
                  out=entry["out"], include=include, exclude=entry["exclude"],
                  min_per_class=entry["min_per_class"], radius=entry["radius"], **opts)


def _run_study(store, step, opts):
    from ..learning.study import study

    entry = step["entry"]
    result = study(store, entry["out"], budgets=entry["budgets"], strategies=entry["strategies"],
                   repeats=entry["repeats"], answers=entry["answers"], tolerance=entry["tolerance"],
                   targets=entry["targets"], **opts)
    # keyed with the features now committed, which plan_job compares against on the next run
    store.record_output(Path(entry["out"]) / "study.json",
                        key(step["params"], store.entry("propagate")["dir"]))
    return {"cells_run": result["cells"]["run"], "best": result["recommendation"]["best"]}


def input_columns(ingest):
    """The [ingest] table's column names (``src_col`` ...) as ingest's ``columns``."""
    from ..ingestion.columns import columns

    return columns(ingest["src_col"], ingest["dst_col"], ingest["id_col"], ingest["label_col"],
                   ingest["features_col"])


def _column_params(ingest):
    return {f"{field}_col": name for field, name in input_columns(ingest).renamed().items()}


def _renamed_params(params):
    return {k: v for k, v in params.items() if k.endswith("_col")}


def _rows(result):
    keys = ("nodes", "undirected_edges", "selected", "targets", "hops", "changed", "cells_run", "best")
    return {k: result[k] for k in keys if isinstance(result, dict) and k in result}


def _log(path, step, outcome, started, extra):
    record = {"stage": step["stage"], "outcome": outcome, "why": step["why"],
              "start": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime(started)),
              "end": time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime()),
              "seconds": round(time.time() - started, 3), "peak_rss": peak_rss(), **extra}
    path.parent.mkdir(parents=True, exist_ok=True)
    with open(path, "a") as fh:
        fh.write(json.dumps(record) + "\n")


def _comparable(inputs):
    if not inputs:
        return None
    return {name: sorted((f["path"], f["bytes"], f["sha256"]) for f in files) for name, files in inputs.items()}


def _what_changed(old, new):
    before = {f["path"]: f for files in old.values() for f in files}
    after = {f["path"]: f for files in new.values() for f in files}
    added = sorted(set(after) - set(before))
    gone = sorted(set(before) - set(after))
    changed = sorted(p for p in set(after) & set(before)
                     if (after[p]["bytes"], after[p]["sha256"]) != (before[p]["bytes"], before[p]["sha256"]))
    parts = [f"{len(added)} new file(s)" if added else "", f"{len(changed)} changed" if changed else "",
             f"{len(gone)} gone" if gone else ""]
    return "inputs changed: " + ", ".join(p for p in parts if p) if any(parts) else "inputs changed"


def check_job(path, echo=print):
    """Validate the job file and the inputs' schemas, ids and splits without computing."""
    from ..ingestion.edges import EdgeFiles
    from ..ingestion.nodetable import NodeTable

    job = load_job(path)
    ingest = job["ingest"]
    if not Path(ingest["nodes"]).is_file():
        raise InputError(f"--nodes {ingest['nodes']}: no such file")
    names = input_columns(ingest)
    table = NodeTable(ingest["nodes"], needs_features=ingest["features"] is None, columns=names).load()
    edges = EdgeFiles(edge_files(ingest["edges"]), table.id_kind, names.src, names.dst)
    from ..selection.strategies import STRATEGIES

    for entry in job["select"]:
        if entry["strategy"] not in STRATEGIES:
            raise InputError(f"{path}: [[select]] strategy {entry['strategy']!r} is unknown "
                             f"(choose from {', '.join(STRATEGIES)})")
    study = job.get("study")
    for name in (study or {}).get("strategies") or ():
        if name not in STRATEGIES:
            raise InputError(f"{path}: [study] strategy {name!r} is unknown "
                             f"(choose from {', '.join(STRATEGIES)})")
    echo(f"ok: {table.rows:,} nodes, {edges.rows:,} edge rows in {len(edges.files)} file(s), "
         f"{len(job['select'])} selection(s)")
    return job


def store_status(path):
    """A few lines: each committed stage with its parameters, inputs and time; the outputs."""
    store = Store(path)
    if not (store.path / "manifest.json").exists():
        raise InputError(f"--store {path}: no store here (no manifest.json)")
    manifest = store.manifest()
    lines = [f"store {store.path} (format {manifest['format_version']})"]
    for name, entry in manifest["stages"].items():
        files = sum(len(v) for v in entry.get("inputs", {}).values())
        params = ", ".join(f"{k}={v}" for k, v in entry["params"].items() if v is not None)
        lines.append(f"  {name:<10} {entry['committed_at']}  {entry['seconds']:>8.1f} s  "
                     f"{files} input file(s)  {params}")
    for out, entry in manifest.get("outputs", {}).items():
        lines.append(f"  output     {entry['committed_at']}  {out}")
    return "\n".join(lines)

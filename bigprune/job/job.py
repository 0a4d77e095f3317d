"""The nightly job: ingest -> propagate -> select (-> study) from one job file, skipping what is current.

A stage runs when the store lacks it or when its inputs (fingerprints) or parameters changed;
whatever it feeds runs again after it. Each stage commits atomically, so a job killed at any
point resumes on the next run. One JSON line per stage goes to the log for the scheduler.
"""
import time
from contextlib import ExitStack
from pathlib import Path

from .config import load_job, select_names, study_names
from ..common.errors import BigpruneError, InputError
from ..common.fingerprint import fingerprints, key
from ..common.jsonout import dumps
from ..common.memory import format_size, peak_rss
from ..common.sources import edge_files
from ..common.store import Store
from ..common.faults import fault


def plan_job(job, clustered=False):
    """The stages in order, each ``{"stage", "run": bool, "why": str, ...}``; reads only.

    clustered : whether the steps run through a cluster; a rule that select splits into parts
    there (``composable.distributes``) is keyed apart from its one-server selection.
    """
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
        if clustered and _distributes(entry):
            params["distributed"] = True
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


def _distributes(entry):
    from ..selection.composable import distributes

    return distributes(entry["strategy"], entry["radius"])


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


def run_job(path, dry_run=False, echo=print, cluster=None, client=None):
    """Run (or with ``dry_run`` only print) the job in ``path``; return the plan with outcomes.

    cluster : a Dask scheduler address or ``local:N`` (overrides the job file's ``cluster``);
        the cluster is reached only once a step has to run. client : a ``distributed.Client``
        to use instead.
    """
    job = load_job(path)
    if cluster is not None:
        from ..cluster.connect import parse_address

        parse_address(cluster)
    store = Store(job["store"])
    clustered = client is not None or (cluster or job["cluster"]) is not None
    if dry_run:
        steps = plan_job(job, clustered)
        for step in steps:
            echo(f"{'run ' if step['run'] else 'skip'}  {step['stage']:<40} {step['why']}")
        return steps
    from ..ingestion.ingest import ingest
    from ..propagation.propagate import propagate

    opts = {"memory_budget": job["memory_budget"], "threads": job["threads"]}
    began = time.time()
    log = Path(job["log"]) if job["log"] else Path(job["store"]).parent / "bigprune-log.jsonl"
    with store.locked(), ExitStack() as stack:
        steps = plan_job(job, clustered)
        address = cluster or job["cluster"]
        checked = False
        for step in steps:
            if not step["run"]:
                _log(log, step, "skipped", time.time(), {})
                echo(f"skip  {step['stage']:<40} {step['why']}")
                continue
            if not checked and step["stage"].startswith(("select", "study")):
                # the same checks as `bigprune check`, on the graph now committed, so that an
                # error names the job file's entry before any selection is computed
                _check_selections(job, _store_nodes(store))
                checked = True
            if "client" not in opts and (client is not None or address is not None):
                opts["client"] = client if client is not None else \
                    stack.enter_context(_cluster(address, cluster, job))
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
                    fault("select", "before-manifest")
                    store.record_output(entry["out"], key(step["params"], _comparable({"lists": lists}),
                                                          store.entry("propagate")["dir"]))
            except BigpruneError as exc:
                _log(log, step, "failed", started, {"error": str(exc)})
                raise
            _log(log, step, "done", started, _rows(result))
            step["result"] = result
    echo(_summary_line(steps, time.time() - began))
    return steps


def _cluster(address, flag, job):
    """The client of the job's cluster (``--cluster`` or the job file's key, named in errors)."""
    from ..cluster.connect import cluster

    return cluster(address, "--cluster" if flag else f"{job['path']}: top level: cluster =")


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
                  min_per_class=entry["min_per_class"], radius=entry["radius"],
                  cover=entry["cover"], ensemble=entry["ensemble"], **opts)


def _run_study(store, step, opts):
    from ..learning.study import study

    entry = step["entry"]
    result = study(store, entry["out"], budgets=entry["budgets"], strategies=entry["strategies"],
                   repeats=entry["repeats"], answers=entry["answers"], tolerance=entry["tolerance"],
                   targets=entry["targets"], **opts)
    # keyed with the features now committed, which plan_job compares against on the next run
    fault("study", "before-manifest")
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
        fh.write(dumps(record) + "\n")


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
    """Every check ``run`` makes, without computing: the job file, the inputs' schemas, ids and
    splits, and each selection's and the study's options against the training pool read from
    the node table (budget, quotas, include and exclude files, radius, targets, study budgets).
    Returns what was checked (a JSON-ready dict)."""
    from ..ingestion.edges import EdgeFiles
    from ..ingestion.nodetable import NodeTable

    job = load_job(path)
    ingest = job["ingest"]
    if not Path(ingest["nodes"]).is_file():
        raise InputError(f"--nodes {ingest['nodes']}: no such file")
    names = input_columns(ingest)
    table = NodeTable(ingest["nodes"], needs_features=ingest["features"] is None, columns=names).load()
    edges = EdgeFiles(edge_files(ingest["edges"]), table.id_kind, names.src, names.dst)
    checked = _check_selections(job, (table.id_array(), table.split, table.label))
    result = {"ok": True, "job": str(path), "nodes": int(table.rows), "edge_rows": int(edges.rows),
              "edge_files": len(edges.files), **checked}
    echo(f"ok: {table.rows:,} nodes, {edges.rows:,} edge rows in {len(edges.files)} file(s), "
         f"training pool {checked['pool']:,}, {len(job['select'])} selection(s)")
    return result


def _store_nodes(store):
    """(ids, split, label) of the committed graph stage."""
    from ..common.ids import store_ids

    return (store_ids(store), store.load("graph", "split", mmap=False),
            store.load("graph", "label", mmap=False))


def _check_selections(job, nodes):
    """Check every ``[[select]]`` table and the ``[study]`` table against the graph's nodes
    ``(ids, split, label)``, naming the job file's entry; return the picks each would make."""
    import numpy as np

    from ..common.schema import NO_LABEL, SPLIT_CODES
    from ..learning.study import check_budget_sizes, parse_budgets, parse_strategies
    from ..selection.select import TARGETS, check_constraints, check_cover, check_ensemble, check_radius
    from ..selection.strategies import STRATEGIES

    ids, split, label = nodes
    whole_pool = np.flatnonzero((split == SPLIT_CODES["train"]) & (label != NO_LABEL)).astype(np.int64)
    path = job["path"]
    if len(whole_pool) == 0 and (job["select"] or job["study"]):
        raise InputError(f"{path}: [ingest]: nodes = {job['ingest']['nodes']!r}: no labelled node "
                         f"has split train, so the training pool is empty; mark training nodes in "
                         f"the node table's split column")
    selections = []
    for index, entry in enumerate(job["select"]):
        names = select_names(path, index)
        _check_choice(names, "strategy", entry["strategy"], STRATEGIES)
        _check_targets(names, entry["targets"], split, TARGETS)
        radius = check_radius(entry["radius"], entry["strategy"], entry["budget"], names)
        check_cover(entry["cover"], radius, names)
        check_ensemble(entry["ensemble"], entry["strategy"], names)
        include = entry["include"]
        if entry["keep_previous"] and Path(entry["out"]).exists():
            if include:
                raise InputError(f"{names.where} use keep_previous or include, not both")
            include = entry["out"]
        _, k, _, _, _ = check_constraints(ids, label, whole_pool, entry["budget"], radius, include,
                                          entry["exclude"], entry["min_per_class"], names)
        selections.append({"out": entry["out"], "strategy": entry["strategy"],
                           "picks": None if radius is not None else int(k)})
    result = {"pool": int(len(whole_pool)), "selections": selections}
    study = job.get("study")
    if study:
        names = study_names(path)
        for name in study["strategies"] or ():
            _check_choice(names, "strategies", name, STRATEGIES)
        parse_strategies(study["strategies"], STRATEGIES)
        _check_targets(names, study["targets"], split, TARGETS)
        sizes = check_budget_sizes(parse_budgets(study["budgets"], names), len(whole_pool), names)
        result["study"] = {"out": study["out"], "picks": [int(k) for _, k in sizes] + [len(whole_pool)]}
    return result


def _check_choice(names, key, value, known):
    if value not in known:
        raise InputError(f"{names.label(key, value)} is unknown (choose from {', '.join(known)})")


def _check_targets(names, targets, split, codes):
    import numpy as np

    if targets not in codes:
        raise InputError(f"{names.label('targets', targets)} is unknown (choose from {', '.join(codes)})")
    if not np.any(split == codes[targets]):
        others = ", ".join(t for t in codes if t != targets)
        raise InputError(f"{names.label('targets', targets)}: no node is in this set; choose "
                         f"another ({others})")


def store_state(path):
    """What the store holds, JSON-ready: each committed stage (parameters, input file count,
    commit time, seconds) and each recorded output."""
    store = Store(path)
    if not (store.path / "manifest.json").exists():
        raise InputError(f"--store {path}: no store here (no manifest.json)")
    manifest = store.manifest()
    stages = {}
    for name, entry in manifest["stages"].items():
        # inputs map a name to a list of file fingerprints, or to the upstream stage's directory
        # (a string, whose length is no file count)
        files = sum(len(v) for v in entry.get("inputs", {}).values() if isinstance(v, list))
        stages[name] = {"committed_at": entry["committed_at"], "seconds": entry["seconds"],
                        "input_files": files, "params": entry["params"]}
    outputs = {out: {"committed_at": entry["committed_at"]}
               for out, entry in manifest.get("outputs", {}).items()}
    return {"store": str(store.path), "format_version": manifest["format_version"],
            "stages": stages, "outputs": outputs}


def store_status(path):
    """A few lines: each committed stage with its parameters, inputs and time; the outputs."""
    state = store_state(path)
    lines = [f"store {state['store']} (format {state['format_version']})"]
    for name, entry in state["stages"].items():
        params = ", ".join(f"{k}={v}" for k, v in entry["params"].items() if v is not None)
        lines.append(f"  {name:<10} {entry['committed_at']}  {entry['seconds']:>8.1f} s  "
                     f"{entry['input_files']} input file(s)  {params}")
    for out, entry in state["outputs"].items():
        lines.append(f"  output     {entry['committed_at']}  {out}")
    return "\n".join(lines)

"""The ``bigprune`` command: parses options, calls one library function, prints a summary.

Errors from the library arrive typed (``bigprune.common.errors``) and leave as one line on stderr with
exit status 2 (bad input or usage) or 3 (resources: the memory budget cannot work, or the disk
is full). What goes to stdout is strict JSON (``common.jsonout``) or plain lines; a reader that
closes the pipe early (``| head``) ends the output, not the work: the command finishes and
exits 0, without a traceback.
"""
import argparse
import errno
import os
import sys
from contextlib import nullcontext

from . import __version__
from .common.errors import BigpruneError
from .common.memory import DEFAULT_BUDGET
from .common.options import BUDGET_RULE

BUDGET_HELP = BUDGET_RULE.replace("%", "%%")

EXAMPLES = {
    "demo": """examples:
  bigprune demo --workdir /tmp/market
  bigprune demo --workdir /tmp/market --nodes 200000 --seed 3""",
    "ingest": """examples:
  bigprune ingest --edges data/edges/ --nodes data/nodes.parquet --store store/
  bigprune ingest --edges 'data/edges/day=*/*.parquet' --nodes nodes.parquet \\
                  --features emb.npy --store store/ --memory-budget 8G --threads 2
  bigprune ingest --edges /shared/edges/ --nodes /shared/nodes.parquet --store /shared/store/ \\
                  --cluster local:2""",
    "propagate": """examples:
  bigprune propagate --store store/
  bigprune propagate --store store/ --hops 3 --norm rw
  bigprune propagate --store /shared/store/ --cluster scheduler.internal:8786 --memory-budget 8G""",
    "run": """examples:
  bigprune run job.toml
  bigprune run job.toml --dry-run      # which stages would run, and why
  bigprune run job.toml --cluster local:2             # two worker processes on this machine
  bigprune run job.toml --cluster scheduler.internal:8786   # or: cluster = "..." in the job file

exit status: 0 done, 2 bad input or job file, 3 memory budget too small or disk full, 4 store in use""",
    "status": """examples:
  bigprune status --store store/""",
    "check": """examples:
  bigprune check job.toml""",
    "study": """examples:
  bigprune study --store store/ --out study/                   # kmedian, kmeans, kcenter, random
  bigprune study --store store/ --out study/ --strategies kmedian,random,el2n
  bigprune study --store store/ --out study/ --budgets 0.01,0.05,0.2,1.0 --repeats 5 \\
                 --answers answers.parquet --tolerance 0.005

  bigprune study --store store/ --out study/ --l2 1             # one fixed penalty for every cell
  bigprune study --store /shared/store/ --out /shared/study/ --cluster local:2   # a task per cell

Each cell's L2 penalty is chosen on the valid split (100 .. 0.001) unless --l2 fixes it; when the
study also scores on the valid split (no --answers), that choice makes its accuracies optimistic.
A rerun with the same options skips the cells already in study/cells/.""",
    "train": """examples:
  bigprune train --store store/                                 # the whole pool
  bigprune train --store store/ --nodes-from picks.parquet --answers answers.parquet
  bigprune train --store store/ --l2 0.1 --hop 1                # fixed penalty, features after 1 hop

By default the L2 penalty is chosen on the valid split from 100, 10, 1, 0.1, 0.01, 0.001 (the
output's "l2" shows the choice and each value's valid accuracy; the valid score is then
optimistic, the --answers score is not); with no valid nodes it is 1 (scikit-learn's C = 1).""",
    "select": """examples:
  bigprune select --store store/ --strategy kmedian --budget 0.05 --out picks.parquet
  bigprune select --store store/ --strategy random --budget 5000 --seed 1 --out random.parquet
  bigprune select --store store/ --strategy kmedian --budget 0.05 --include yesterday.parquet \\
                  --exclude flagged.parquet --min-per-class 20 --out today.parquet
  bigprune select --store store/ --strategy kcenter --radius 9 --cover 0.9 --out within.parquet
  bigprune select --store /shared/store/ --strategy kmedian --budget 0.05 --out picks.parquet \\
                  --cluster local:2        # the targets in parts, one task each, then a merge""",
}


class _Parser(argparse.ArgumentParser):
    """argparse with a one-line usage error (exit 2) instead of the usage block."""

    def error(self, message):
        self.exit(2, f"{self.prog}: error: {message} (see {self.prog} --help)\n")


def _parser():
    common = argparse.ArgumentParser(add_help=False)
    common.add_argument("--quiet", action="store_true", help="no progress bars")
    common.add_argument("--memory-budget", default=DEFAULT_BUDGET, metavar="SIZE",
                        help=f"peak memory this stage may use, with a unit: e.g. 2G, 512MiB "
                             f"(default {DEFAULT_BUDGET})")
    common.add_argument("--threads", type=int, default=None, metavar="N",
                        help="worker threads (default: all available cores)")

    clustered = argparse.ArgumentParser(add_help=False)
    clustered.add_argument("--cluster", default=None, metavar="ADDRESS",
                           help="run the work as tasks on a Dask cluster: a scheduler's HOST:PORT "
                                "(the store on a file system every worker sees at the same path), "
                                "or local:N for N worker processes on this machine; "
                                "--memory-budget is then per worker")

    parser = _Parser(prog="bigprune", description="Choose the few labelled nodes worth training a node "
                     "classifier on: ingest a graph, smooth its features, select and report.")
    parser.add_argument("--version", action="version", version=f"bigprune {__version__}")
    sub = parser.add_subparsers(dest="command", metavar="COMMAND", parser_class=_Parser)
    fmt = argparse.RawDescriptionHelpFormatter

    p = sub.add_parser("demo", parents=[common], formatter_class=fmt, epilog=EXAMPLES["demo"],
                       help="generate the marketplace scenario and run the whole pipeline on it")
    p.add_argument("--workdir", required=True, metavar="DIR",
                   help="where the data, store and outputs go: a new or empty folder, or one an "
                        "earlier demo made (it holds a .bigprune-demo file)")
    p.add_argument("--nodes", type=int, default=None, metavar="N", help="listings to generate")
    p.add_argument("--seed", type=int, default=0, metavar="S", help="random seed (default 0)")

    p = sub.add_parser("ingest", parents=[common, clustered], formatter_class=fmt, epilog=EXAMPLES["ingest"],
                       help="turn Parquet edge partitions and a node table into a store")
    p.add_argument("--edges", required=True, metavar="PATH", help="Parquet file, directory or glob (src, dst[, weight])")
    p.add_argument("--nodes", required=True, metavar="PATH", help="Parquet node table (node_id, split, label, features)")
    p.add_argument("--features", default=None, metavar="FILE.npy", help="features aligned with the node table's rows")
    p.add_argument("--store", required=True, metavar="DIR", help="store directory (created if missing)")
    p.add_argument("--drop-unknown", action="store_true",
                   help="drop edge rows naming nodes missing from --nodes (counted) instead of refusing")
    for flag, default, what in (("--src-col", "src", "--edges column of one endpoint"),
                                ("--dst-col", "dst", "--edges column of the other endpoint"),
                                ("--id-col", "node_id", "--nodes column of the node ids"),
                                ("--label-col", "label", "--nodes column of the labels: int64 class ids, "
                                 "or class names (strings, numbered in sorted order)"),
                                ("--features-col", "features", "--nodes column of the feature lists")):
        p.add_argument(flag, default=None, metavar="NAME", help=f"{what} (default {default})")

    p = sub.add_parser("propagate", parents=[common, clustered], formatter_class=fmt, epilog=EXAMPLES["propagate"],
                       help="smooth features over the graph (SGC hops) and compute PageRank")
    p.add_argument("--store", required=True, metavar="DIR")
    p.add_argument("--hops", type=int, default=2, metavar="K", help="propagation hops (default 2)")
    p.add_argument("--norm", default="sym", choices=["sym", "rw"],
                   help="sym: D^-1/2 (A+I) D^-1/2 (default); rw: D^-1 (A+I)")
    p.add_argument("--dtype", default="float32", choices=["float32", "float16"],
                   help="how hops are stored; sums are float32 either way (default float32)")
    p.add_argument("--restrict", action=argparse.BooleanOptionalAction, default=False,
                   help="compute only the rows that the training pool and the valid and test "
                        "splits need; the others are NaN (default: every row)")

    p = sub.add_parser("select", parents=[common, clustered], formatter_class=fmt, epilog=EXAMPLES["select"],
                       help="pick a training subset and report what it covers")
    p.add_argument("--store", required=True, metavar="DIR")
    p.add_argument("--strategy", required=True, metavar="NAME",
                   help="kmedian (the default to start with: the mean target distance), kmeans, "
                        "kcenter (the largest target distance), kcenter-pool, random, stratified, "
                        "degree, pagerank, entropy, el2n, age, ddd or influence")
    p.add_argument("--budget", default=None, metavar="B",
                   help=f"how many training-pool nodes to pick: {BUDGET_HELP}; required unless "
                        f"--radius")
    p.add_argument("--radius", default=None, metavar="R",
                   help="kcenter only, instead of --budget: the fewest nodes that bring every "
                        "target within distance R (the report's coverage shows the scale)")
    p.add_argument("--cover", default=None, metavar="SHARE",
                   help="with --radius: the shortest prefix of the kcenter greedy that brings this "
                        "share of the targets within R, e.g. 0.95 or 95%% (default: every target; "
                        "a few outliers can set the radius of every target)")
    p.add_argument("--min-per-class", default=None, metavar="N",
                   help="each class gets at least N picks (capped at its pool size); N by the "
                        "budget's rule: a count (20) or a fraction of the budget (0.1, 10%%)")
    p.add_argument("--include", default=None, metavar="FILE.parquet",
                   help="node_id column of pool nodes that must stay (e.g. the last selection)")
    p.add_argument("--exclude", default=None, metavar="FILE.parquet",
                   help="node_id column of nodes never to choose")
    p.add_argument("--targets", default="test", metavar="SPLIT",
                   help="nodes to cover: test (default), valid or unlabeled")
    p.add_argument("--seed", type=int, default=0, metavar="S")
    p.add_argument("--ensemble", default=None, metavar="N",
                   help="ddd only: proxies in the ensemble, an even count (default 8)")
    p.add_argument("--out", required=True, metavar="FILE.parquet",
                   help="selection table; the report goes beside it as FILE.json")
    p = sub.add_parser("train", parents=[common], formatter_class=fmt, epilog=EXAMPLES["train"],
                       help="fit the proxy model on a selection or the pool and score it")
    p.add_argument("--store", required=True, metavar="DIR")
    p.add_argument("--nodes-from", default=None, metavar="FILE.parquet",
                   help="train on these nodes (a selection's node_id column); default: the whole pool")
    p.add_argument("--answers", default=None, metavar="FILE.parquet",
                   help="node_id, label of target nodes to score on as well as the valid split")
    p.add_argument("--l2", type=float, default=None, metavar="L2",
                   help="fix the L2 penalty (scikit-learn's 1/C); default: chosen on the valid "
                        "split from 100 .. 0.001, or 1 when there is no valid node")
    p.add_argument("--hop", type=int, default=None, metavar="K", help="features after K hops (default: last)")
    p.add_argument("--standardize", action="store_true",
                   help="scale each feature by the training nodes' mean and standard deviation "
                        "first (default off: it inflates rare features of sparse inputs such as "
                        "bags of words)")

    p = sub.add_parser("study", parents=[common, clustered], formatter_class=fmt, epilog=EXAMPLES["study"],
                       help="train the proxy on each rule's subsets at several budgets; recommend one")
    p.add_argument("--store", required=True, metavar="DIR")
    p.add_argument("--out", required=True, metavar="DIR", help="folder for the table, fits, plots and report")
    p.add_argument("--budgets", default="0.01,0.02,0.05,0.1,0.2,0.5,1.0", metavar="B,B,...",
                   help=f"training-pool sizes, as for select: each {BUDGET_HELP}; 1.0 = the full "
                        f"pool, 1 = one node (default %(default)s)")
    p.add_argument("--strategies", default=None, metavar="NAME,...", help="rules to compare (default: kmedian,kmeans,kcenter,random)")
    p.add_argument("--repeats", type=int, default=3, metavar="R", help="seeds 0 .. R-1 (default 3)")
    p.add_argument("--answers", default=None, metavar="FILE.parquet",
                   help="held-out labels (node_id, label) to score on (default: the valid split)")
    p.add_argument("--tolerance", type=float, default=0.01, metavar="T",
                   help="accuracy below the full pool that still counts as enough (default 0.01)")
    p.add_argument("--targets", default="test", metavar="SPLIT", help="nodes the rules cover (default test)")
    p.add_argument("--l2", type=float, default=None, metavar="L2",
                   help="fix the proxy's L2 penalty (scikit-learn's 1/C) in every cell; default: "
                        "chosen per cell on the valid split from 100 .. 0.001")
    p.add_argument("--standardize", action="store_true",
                   help="standardise each feature on the cell's training nodes first (default off)")

    p = sub.add_parser("run", parents=[common, clustered], formatter_class=fmt, epilog=EXAMPLES["run"],
                       help="run a job file: ingest, propagate, select, skipping what is current")
    p.add_argument("job", metavar="JOB.toml")
    p.add_argument("--dry-run", action="store_true", help="print the plan and change nothing")
    p.add_argument("--json", action="store_true",
                   help="one JSON document on stdout (each step: stage, run, why, outcome); the "
                        "step lines go to stderr")

    p = sub.add_parser("check", parents=[common], formatter_class=fmt, epilog=EXAMPLES["check"],
                       help="make every check run would make, without computing")
    p.add_argument("job", metavar="JOB.toml")
    p.add_argument("--json", action="store_true", help="print what was checked as one JSON document")

    p = sub.add_parser("status", parents=[common], formatter_class=fmt, epilog=EXAMPLES["status"],
                       help="show what a store holds, from which inputs, and when")
    p.add_argument("--store", required=True, metavar="DIR")
    p.add_argument("--json", action="store_true", help="print the store's state as one JSON document")
    return parser


class _Stdout:
    """Lines to stdout; once the reader has closed the pipe (``| head``), the rest is dropped
    (stdout is pointed at /dev/null) so that the command still finishes its work."""

    def __init__(self):
        self.closed = False

    def __call__(self, text):
        if self.closed:
            return
        try:
            print(text, flush=True)
        except BrokenPipeError:
            self.closed = True
            try:
                os.dup2(os.open(os.devnull, os.O_WRONLY), sys.stdout.fileno())
            except (OSError, ValueError):  # stdout is no file (e.g. captured in a test)
                pass


def _to_stderr(text):
    print(text, file=sys.stderr)


def _run(args, emit):
    if args.command in ("run", "check", "status"):
        from .job.job import check_job, run_job, store_state, store_status

        wants_json = getattr(args, "json", False)
        if args.command == "run":
            steps = run_job(args.job, dry_run=args.dry_run, echo=_to_stderr if wants_json else emit,
                            cluster=args.cluster)
            return {"job": args.job, "dry_run": args.dry_run, "steps": [_step(s) for s in steps]} \
                if wants_json else None
        if args.command == "check":
            checked = check_job(args.job, echo=(lambda text: None) if wants_json else emit)
            return checked if wants_json else None
        if wants_json:
            return store_state(args.store)
        emit(store_status(args.store))
        return None
    with _client(args) as client:
        return _stage(args, client)


def _client(args):
    """The Dask client of ``--cluster``, closed after the command; without it, None (and Dask
    is never imported)."""
    if getattr(args, "cluster", None) is None:
        return nullcontext(None)
    from .cluster.connect import cluster

    return cluster(args.cluster)


def _stage(args, client):
    """One stage's command: its library call, with the cluster's client when there is one."""
    opts = {"memory_budget": args.memory_budget, "threads": args.threads}
    if client is not None:
        opts["client"] = client
    if args.command == "demo":
        from .scenario.demo import demo

        return demo(args.workdir, nodes=args.nodes, seed=args.seed, **opts)
    if args.command == "ingest":
        from .ingestion.ingest import ingest

        from .ingestion.columns import columns

        names = columns(args.src_col, args.dst_col, args.id_col, args.label_col, args.features_col)
        return ingest(args.edges, args.nodes, args.store, features=args.features,
                      drop_unknown=args.drop_unknown, columns=names, **opts)
    if args.command == "propagate":
        from .propagation.propagate import propagate

        return propagate(args.store, hops=args.hops, norm=args.norm, dtype=args.dtype,
                         restrict=args.restrict, **opts)
    if args.command == "train":
        from .learning.train import train

        return train(args.store, nodes_from=args.nodes_from, answers=args.answers, l2=args.l2, hop=args.hop,
                     standardize=args.standardize, **opts)
    if args.command == "study":
        from .learning.study import study

        summary = study(args.store, args.out, budgets=args.budgets, strategies=args.strategies,
                        repeats=args.repeats, answers=args.answers, tolerance=args.tolerance,
                        targets=args.targets, l2=args.l2, standardize=args.standardize, **opts)
        return {k: summary[k] for k in ("recommendation", "cells", "outputs", "seconds")}
    from .selection.select import select

    report = select(args.store, args.strategy, args.budget, targets=args.targets, seed=args.seed,
                    out=args.out, include=args.include, exclude=args.exclude,
                    min_per_class=args.min_per_class, radius=args.radius,
                    cover=args.cover, ensemble=args.ensemble, **opts)
    return _printable(report)


def _printable(report):
    """A select report as printed: without the dense row numbers the Python API returns."""
    return {k: v for k, v in report.items() if k != "indices" and not k.startswith("_")}


def _step(step):
    """One step of a job as printed: what ran and why, and its result's summary."""
    out = {"stage": step["stage"], "run": step["run"], "why": step["why"]}
    if "result" in step:
        result = step["result"]
        out["result"] = _printable(result) if isinstance(result, dict) else result
    return out


def main(argv=None):
    parser = _parser()
    args = parser.parse_args(argv)
    if args.command is None:
        parser.print_help()
        return 2
    from .common.runtime import set_quiet

    set_quiet(args.quiet)
    emit = _Stdout()
    try:
        result = _run(args, emit)
    except BigpruneError as exc:
        print(f"bigprune {args.command}: error: {exc}", file=sys.stderr)
        return exc.exit_code
    except MemoryError:
        print(f"bigprune {args.command}: error: out of memory; lower the data size or raise "
              "--memory-budget", file=sys.stderr)
        return 3
    except OSError as exc:
        if exc.errno != errno.ENOSPC:
            raise
        where = f" writing {exc.filename}" if exc.filename else ""
        print(f"bigprune {args.command}: error: no space left on device{where}; free space or move "
              "the store, then rerun (the store keeps its last committed state)", file=sys.stderr)
        return 3
    except KeyboardInterrupt:
        print(f"bigprune {args.command}: interrupted; the store keeps its last committed state",
              file=sys.stderr)
        return 130
    if result is not None and args.command != "demo":
        from .common.jsonout import dumps

        emit(dumps(result, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())

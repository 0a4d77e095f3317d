"""Every exit path of the command line: 2 usage, 3 resources (DuckDB out of memory, MemoryError),
4 store in use, 130 Ctrl-C; each with exactly one stderr line and the store as it was. Also what
``status`` and a successful ``check`` print."""
import importlib
import re
import socket
import subprocess
import sys

import pyarrow.parquet as pq
import pytest

from bigprune.cli import main
from bigprune.scenario.scenario import generate
from conftest import tree_digest


def one_line(capsys):
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    return err


@pytest.fixture
def propagated(small_store):
    assert main(["propagate", "--store", str(small_store.path), "--quiet"]) == 0
    return small_store.path


@pytest.fixture(scope="module")
def market(tmp_path_factory):
    """A small generated marketplace with string ids (ingest maps them through DuckDB)."""
    root = tmp_path_factory.mktemp("market")
    generate(root / "data", nodes=1500, seed=2, id_type="string")
    return root / "data"


# ---- 2: usage --------------------------------------------------------------------------------
@pytest.mark.parametrize("argv, expected", [
    (["select", "--store", "s"], "the following arguments are required: --strategy, --out"),
    (["propagate", "--store", "s", "--hops", "two"], "argument --hops: invalid int value: 'two'"),
    (["propagate", "--store", "s", "--colour", "red"], "unrecognized arguments: --colour red"),
    (["frobnicate"], "argument COMMAND: invalid choice: 'frobnicate'"),
])
def test_usage_errors_exit_2_with_one_line(argv, expected, capsys):
    # reference: argparse's own messages for these mistakes (Python's standard library)
    with pytest.raises(SystemExit) as exit_:
        main(argv)
    assert exit_.value.code == 2
    err = one_line(capsys)
    assert expected in err and err.rstrip().endswith("--help)")


def test_no_command_prints_help_and_exits_2(capsys):
    assert main([]) == 2
    assert "usage: bigprune" in capsys.readouterr().out


# ---- 3: resources ----------------------------------------------------------------------------
def test_duckdb_out_of_memory_exits_3(market, tmp_path, monkeypatch, capsys):
    import duckdb

    ingest_module = importlib.import_module("bigprune.ingestion.ingest")

    def out_of_memory(*args, **kwargs):  # DuckDB's own exception type, raised mid-scan
        raise duckdb.OutOfMemoryException("Out of Memory Error: failed to allocate data of size 16.0 MiB")
        yield

    monkeypatch.setattr(ingest_module, "duckdb_rows", out_of_memory)
    code = main(["ingest", "--edges", str(market / "edges"), "--nodes", str(market / "nodes.parquet"),
                 "--store", str(tmp_path / "store"), "--quiet"])
    assert code == 3
    err = one_line(capsys)
    assert re.search(r"--memory-budget [\d.]+ GiB: DuckDB ran out of memory joining [\d,]+ edge rows; "
                     r"raise the budget", err), err
    assert not (tmp_path / "store").exists()


def test_memory_error_exits_3_and_keeps_the_store(propagated, monkeypatch, capsys):
    propagate_module = importlib.import_module("bigprune.propagation.propagate")
    monkeypatch.setattr(propagate_module, "_memory_hops", lambda *a: (_ for _ in ()).throw(MemoryError()))
    before = tree_digest(propagated)
    assert main(["propagate", "--store", str(propagated), "--hops", "3", "--quiet"]) == 3
    assert "error: out of memory; lower the data size or raise --memory-budget" in one_line(capsys)
    assert tree_digest(propagated) == before


# ---- 130: Ctrl-C -----------------------------------------------------------------------------
def test_ctrl_c_exits_130_with_one_line(propagated, tmp_path, monkeypatch, capsys):
    strategies = importlib.import_module("bigprune.selection.strategies")

    def interrupted(problem):
        raise KeyboardInterrupt

    monkeypatch.setitem(strategies.STRATEGIES, "random", interrupted)
    before = tree_digest(propagated)
    (tmp_path / "out").mkdir()
    out = tmp_path / "out" / "picks.parquet"
    assert main(["select", "--store", str(propagated), "--strategy", "random", "--budget", "5",
                 "--out", str(out), "--quiet"]) == 130
    assert one_line(capsys) == "bigprune select: interrupted; the store keeps its last committed state\n"
    assert tree_digest(propagated) == before and list(out.parent.iterdir()) == []


# ---- 4: store in use -------------------------------------------------------------------------
@pytest.fixture
def held(propagated):
    """The store's lock held by another live process on this host."""
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    lock = propagated / ".lock"
    lock.write_text(f"{holder.pid} {socket.gethostname()}")
    yield propagated, holder.pid, lock
    holder.kill()
    holder.wait()


def _refused_with_4(argv, store, pid, lock, capsys):
    before = tree_digest(store)
    capsys.readouterr()
    assert main([*argv, "--quiet"]) == 4
    assert f"in use by process {pid} on {socket.gethostname()} (lock file {lock})" in one_line(capsys)
    assert tree_digest(store) == before


def test_propagate_on_a_store_in_use_exits_4(held, capsys):
    store, pid, lock = held
    _refused_with_4(["propagate", "--store", str(store), "--hops", "3"], store, pid, lock, capsys)


# Readers pin the commit they start on (bigprune/common/store.py, "readers"): a writer holding
# the store does not stop them (no exit 4), and they change nothing in it.
@pytest.mark.parametrize("command", ["select", "study"])
def test_readers_run_beside_a_writer_and_leave_the_store_as_it_was(held, tmp_path, command):
    store, pid, lock = held
    before = tree_digest(store)
    out = tmp_path / "out"
    argv = (["select", "--store", str(store), "--strategy", "random", "--budget", "5",
             "--out", str(tmp_path / "picks.parquet")] if command == "select"
            else ["study", "--store", str(store), "--out", str(out), "--budgets", "5,10",
                  "--strategies", "random", "--repeats", "1"])
    assert main([*argv, "--quiet"]) == 0
    assert tree_digest(store) == before


# ---- status and check ------------------------------------------------------------------------
def test_status_lists_each_stage_and_output(market, tmp_path, capsys):
    job = tmp_path / "job.toml"
    job.write_text(f'store = "store"\n[ingest]\nedges = "{market / "edges"}"\nnodes = "{market / "nodes.parquet"}"\n'
                   '[[select]]\nstrategy = "random"\nbudget = 10\nout = "picks/random.parquet"\n')
    assert main(["run", str(job), "--quiet"]) == 0
    capsys.readouterr()
    assert main(["status", "--store", str(tmp_path / "store")]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert lines[0].startswith(f"store {tmp_path / 'store'} (format ")
    stages = {line.split()[0]: line for line in lines[1:]}
    assert set(stages) == {"graph", "propagate", "output"}
    # reference: the partitions on disk (pathlib) plus the node table are the graph's inputs
    files = len([p for p in (market / "edges").rglob("*.parquet")]) + 1
    assert f" {files} input file(s) " in stages["graph"]
    assert "hops=2" in stages["propagate"] and "norm=sym" in stages["propagate"]
    assert stages["output"].rstrip().endswith(str((tmp_path / "picks" / "random.parquet").resolve()))


def test_a_valid_job_file_checks_ok_with_its_counts(market, tmp_path, capsys):
    job = tmp_path / "job.toml"
    job.write_text(f'store = "store"\n[ingest]\nedges = "{market / "edges"}"\nnodes = "{market / "nodes.parquet"}"\n'
                   '[[select]]\nstrategy = "kmedian"\nbudget = 0.02\nout = "a.parquet"\n'
                   '[[select]]\nstrategy = "random"\nbudget = 10\nout = "b.parquet"\n')
    capsys.readouterr()
    assert main(["check", str(job)]) == 0
    # reference: row counts from the Parquet footers (pyarrow), files found with pathlib
    parts = sorted((market / "edges").rglob("*.parquet"))
    edge_rows = sum(pq.ParquetFile(p).metadata.num_rows for p in parts)
    nodes = pq.ParquetFile(market / "nodes.parquet").metadata.num_rows
    table = pq.read_table(market / "nodes.parquet", columns=["split", "label"])
    pool = sum(s == "train" and l is not None
               for s, l in zip(table.column("split").to_pylist(), table.column("label").to_pylist()))
    assert capsys.readouterr().out == (f"ok: {nodes:,} nodes, {edge_rows:,} edge rows in {len(parts)} file(s), "
                                       f"training pool {pool:,}, 2 selection(s)\n")
    assert not (tmp_path / "store").exists()  # check computes nothing and writes nothing

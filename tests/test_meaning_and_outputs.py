"""One meaning per option, and outputs a script can read: the findings of issue 12 under
"Meaning" and "Outputs for scripts", each through the command line on a generated marketplace.

References outside the project: Python's ``tomllib`` says whether a job file's value is an int
or a float; pyarrow counts the node table's pool and classes and ``glob`` the edge files; the
``json`` module with a ``parse_constant`` that raises is a strict (RFC 8259) parser, which has
no NaN or Infinity.
"""
import json
import os
import shutil
import subprocess
import sys
import tomllib
from pathlib import Path

import pyarrow.compute as pc
import pyarrow.parquet as pq
import pytest

from bigprune.cli import main
from bigprune.scenario.scenario import generate

ROOT = Path(__file__).resolve().parents[1]
JOB = """store = "store"
memory_budget = "2GiB"
threads = 1
[ingest]
edges = "data/edges"
nodes = "data/nodes.parquet"
[propagate]
hops = 1
[[select]]
strategy = "random"
budget = 10
out = "picks/a.parquet"
[[select]]
strategy = "random"
{second}
out = "picks/b.parquet"
"""


def strict_loads(text):
    """``json.loads`` that refuses NaN, Infinity and -Infinity, as RFC 8259 does."""
    def refuse(name):
        raise ValueError(f"not JSON: {name}")
    return json.loads(text, parse_constant=refuse)


@pytest.fixture(scope="module")
def built(tmp_path_factory):
    """Generated inputs and a store with its graph and propagate stages (one job run)."""
    root = tmp_path_factory.mktemp("meaning")
    generate(root / "data", nodes=1500, dim=8, days=2, parts_per_day=2, seed=3)
    (root / "job.toml").write_text(JOB.format(second="budget = 5"))
    assert main(["run", str(root / "job.toml"), "--quiet"]) == 0
    return root


@pytest.fixture
def work(built, tmp_path):
    for name in ("data", "store", "picks"):
        shutil.copytree(built / name, tmp_path / name)
    return tmp_path


def pool_of(work):
    """Training pool size and class count, read from the node table with pyarrow."""
    nodes = pq.read_table(work / "data" / "nodes.parquet")
    train = nodes.filter(pc.and_(pc.equal(nodes["split"], "train"), pc.is_valid(nodes["label"])))
    return train.num_rows, len(pc.unique(train["label"]))


def write_job(work, second):
    (work / "job.toml").write_text(JOB.format(second=second))
    return work / "job.toml"


def select_args(work, budget, out="p.parquet"):
    return ["select", "--store", str(work / "store"), "--strategy", "random", "--budget", budget,
            "--out", str(work / out), "--quiet", "--threads", "1"]


# ---- Meaning ----------------------------------------------------------------------------------
def test_budget_one_is_one_node_and_one_point_zero_the_pool_in_select_job_and_study(work, capsys):
    pool, _ = pool_of(work)
    capsys.readouterr()
    assert main(select_args(work, "1")) == 0
    assert strict_loads(capsys.readouterr().out)["selected"] == 1
    job = write_job(work, "budget = 1.0")
    # reference: tomllib reads 1.0 as a float (a fraction: the whole pool) and 1 as an int
    assert isinstance(tomllib.loads(job.read_text())["select"][1]["budget"], float)
    assert main(["run", str(job), "--quiet"]) == 0
    assert pq.read_table(work / "picks" / "b.parquet").num_rows == pool
    job.write_text(JOB.format(second="budget = 1") + '[study]\nout = "st"\nbudgets = [1, 0.5, 1.0]\n')
    assert isinstance(tomllib.loads(job.read_text())["study"]["budgets"][0], int)
    capsys.readouterr()
    assert main(["check", str(job), "--json", "--quiet"]) == 0
    checked = strict_loads(capsys.readouterr().out)
    assert [s["picks"] for s in checked["selections"]] == [10, 1]
    assert checked["study"]["picks"] == [1, round(pool / 2), pool]
    # the study's command line reads the same text the same way
    from bigprune.learning.study import check_budget_sizes, parse_budgets

    assert check_budget_sizes(parse_budgets("1,1.0,5%"), pool) == [(1, 1), (0.05, round(0.05 * pool))]


def test_check_refuses_a_budget_larger_than_the_pool_and_quotas_that_cannot_fit(work, capsys):
    pool, classes = pool_of(work)
    job = write_job(work, f"budget = {pool + 1}")
    assert main(["check", str(job), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err == (f"bigprune check: error: {job}: [[select]] #2: budget = {pool + 1}: larger than "
                   f"the training pool ({pool} nodes); use at most {pool} or a fraction such as 1.0\n")
    write_job(work, "budget = 5\nmin_per_class = 1")
    assert main(["check", str(job), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err.startswith(f"bigprune check: error: {job}: [[select]] #2: min_per_class = 1: "
                          f"{classes} classes need {classes} picks, more than the budget 5; ")
    assert "--" not in err.split(str(job))[1]  # no command-line flag named
    write_job(work, "budget = 0.5")  # a job that fits: check says so, with the pool it read
    assert main(["check", str(job), "--quiet", "--json"]) == 0
    assert strict_loads(capsys.readouterr().out)["pool"] == pool


def test_run_names_the_job_entry_not_the_flag(work, capsys):
    pool, _ = pool_of(work)
    job = write_job(work, "budget = 3\ninclude = \"picks/a.parquet\"")  # 10 included, budget 3
    before = (work / "picks" / "b.parquet").read_bytes()
    assert main(["run", str(job), "--quiet"]) == 2
    err = capsys.readouterr().err
    assert err == (f"bigprune run: error: {job}: [[select]] #2: include = "
                   f"'{work / 'picks' / 'a.parquet'}': 10 nodes, more than the budget 3; raise "
                   f"budget to at least 10 or shorten the file\n")
    assert (work / "picks" / "b.parquet").read_bytes() == before  # nothing replaced


@pytest.mark.parametrize("where", ["command line", "job file int", "job file text"])
def test_memory_budget_without_a_unit_exits_2_with_the_units(work, capsys, where):
    if where == "command line":
        code, command = main(select_args(work, "5") + ["--memory-budget", "4"]), "select"
        expected = "--memory-budget 4: give a unit, e.g. 4GiB or 4096MiB"
    else:
        job = work / "job.toml"
        value = "4" if where == "job file int" else '"4"'
        job.write_text(JOB.format(second="budget = 5").replace('memory_budget = "2GiB"',
                                                               f"memory_budget = {value}"))
        code, command = main(["run", str(job), "--quiet"]), "run"
        expected = f"{job}: top level: memory_budget = 4: give a unit, e.g. 4GiB or 4096MiB"
    assert code == 2
    assert capsys.readouterr().err == f"bigprune {command}: error: {expected}\n"
    assert not (work / "p.parquet").exists()


# ---- Outputs for scripts ------------------------------------------------------------------------
def test_select_stdout_has_no_row_numbers(work, capsys):
    capsys.readouterr()
    assert main(select_args(work, "0.05")) == 0
    printed = strict_loads(capsys.readouterr().out)
    assert "indices" not in printed and "indices" not in strict_loads((work / "p.json").read_text())
    ids = pq.read_table(work / "p.parquet").column("node_id").to_pylist()
    assert len(ids) == printed["selected"]


def test_budget_is_the_same_numbers_from_the_command_line_and_the_job(work, capsys):
    pool, _ = pool_of(work)
    capsys.readouterr()
    assert main(select_args(work, "0.05")) == 0
    from_cli = strict_loads(capsys.readouterr().out)["budget"]
    job = write_job(work, "budget = 0.05")
    assert main(["run", str(job), "--quiet"]) == 0
    from_job = strict_loads((work / "picks" / "b.json").read_text())["budget"]
    assert from_cli == from_job == {"kind": "fraction", "value": 0.05, "picks": round(0.05 * pool)}
    capsys.readouterr()
    assert main(select_args(work, "7")) == 0
    assert strict_loads(capsys.readouterr().out)["budget"] == {"kind": "count", "value": 7, "picks": 7}


def test_fits_and_study_json_are_strict(work, capsys):
    """One budget (the pool) leaves each rule a single training-set size: its power-law fit has
    no slope, which fits.json must say with null and a reason, not NaN."""
    out = work / "st"
    assert main(["study", "--store", str(work / "store"), "--out", str(out), "--budgets", "1.0",
                 "--strategies", "random", "--repeats", "1", "--quiet", "--threads", "1"]) == 0
    printed = strict_loads(capsys.readouterr().out)
    fits = strict_loads((out / "fits.json").read_text())
    assert fits["random"]["alpha"] is None and "fewer than two" in fits["random"]["reason"]
    summary = strict_loads((out / "study.json").read_text())
    assert summary["fits"] == fits and printed["recommendation"] == summary["recommendation"]
    for cell in (out / "cells").glob("*.json"):
        strict_loads(cell.read_text())


@pytest.mark.parametrize("command", ["select", "status"])
def test_a_closed_pipe_ends_the_output_quietly(work, command):
    """``| head`` closes the pipe; here the reader closes it before anything is written, so the
    first write fails every time. The work is done and the exit status is 0."""
    args = select_args(work, "5") if command == "select" else ["status", "--store", str(work / "store")]
    env = {**os.environ, "PYTHONPATH": str(ROOT)}
    proc = subprocess.Popen([sys.executable, "-m", "bigprune", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, env=env, cwd=ROOT)
    proc.stdout.close()
    err = proc.stderr.read().decode()
    assert proc.wait(timeout=120) == 0, err
    assert err == ""  # no traceback, no "Exception ignored"
    if command == "select":
        assert pq.read_table(work / "p.parquet").num_rows == 5


def test_status_counts_input_files(work, capsys):
    capsys.readouterr()
    assert main(["status", "--store", str(work / "store"), "--json"]) == 0
    stages = strict_loads(capsys.readouterr().out)["stages"]
    # reference: the edge files on disk, plus the node table
    edge_files = len(list((work / "data" / "edges").rglob("*.parquet")))
    assert stages["graph"]["input_files"] == edge_files + 1
    assert stages["propagate"]["input_files"] == 0  # its input is the graph stage, not a file
    assert main(["status", "--store", str(work / "store")]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert f"{edge_files + 1} input file(s)" in lines[1] and "0 input file(s)" in lines[2]


def test_run_json_is_one_document(work, capsys):
    job = write_job(work, "budget = 5")
    capsys.readouterr()
    assert main(["run", str(job), "--json", "--quiet"]) == 0
    out, err = capsys.readouterr()
    steps = strict_loads(out)["steps"]
    assert [s["stage"] for s in steps][:2] == ["ingest", "propagate"]
    assert all("indices" not in s.get("result", {}) for s in steps)
    assert err.splitlines()[0].split()[1] == "ingest"  # the step lines go to stderr

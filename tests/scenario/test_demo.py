"""End to end: the demo's job on a small marketplace, through the command line."""
import json

import pyarrow.parquet as pq
import pytest

from bigprune.cli import main
from bigprune.scenario.demo import DEMO_STRATEGIES, DEMO_STUDY, MARKER
from conftest import tree_digest


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    workdir = tmp_path_factory.mktemp("demo")
    assert main(["demo", "--workdir", str(workdir), "--nodes", "6000", "--quiet", "--threads", "1"]) == 0
    return workdir


def test_demo_writes_every_selection_with_its_report(demo_run):
    for strategy in DEMO_STRATEGIES:
        table = pq.read_table(demo_run / "selections" / f"{strategy}.parquet")
        assert table.column_names == ["node_id", "rank", "label"]
        report = json.loads((demo_run / "selections" / f"{strategy}.json").read_text())
        assert report["selected"] == table.num_rows == round(0.02 * report["pool"])
        assert "per-class" in report["caution"]


def test_each_distance_rule_wins_on_its_own_objective(demo_run):
    # A sanity check on the demo's clustered data, not a theorem: kmedian greedily lowers the
    # mean target distance and kcenter the largest one; a random subset of the same size aims at
    # neither. (The theorems bound each greedy against its own optimum: Nemhauser, Wolsey &
    # Fisher, 1978, for facility location; Hochbaum & Shmoys, 1986, for k-supplier.)
    cover = {rule: json.loads((demo_run / "selections" / f"{rule}.json").read_text())["coverage"]
             for rule in ("kmedian", "kcenter", "random")}
    assert cover["kmedian"]["mean"] < cover["random"]["mean"]
    assert cover["kmedian"]["mean"] < cover["kcenter"]["mean"]
    assert cover["kcenter"]["radius"] < cover["random"]["radius"]


def test_rerun_skips_everything(demo_run, capsys):
    capsys.readouterr()
    assert main(["run", str(demo_run / "job.toml"), "--quiet"]) == 0
    lines = capsys.readouterr().out.splitlines()
    # ingest, propagate, one select per demo rule, the study
    assert len(lines) == 3 + len(DEMO_STRATEGIES) and all(line.startswith("skip") for line in lines)


def test_demo_runs_a_study(demo_run):
    summary = json.loads((demo_run / "study" / "study.json").read_text())
    assert set(summary["recommendation"]["rules"]) == set(DEMO_STUDY["strategies"])
    assert summary["settings"]["evaluation"]["nodes"] == 300  # this week's answers
    assert (demo_run / "study" / "report.html").exists()



def test_demo_refuses_a_folder_holding_the_users_own_files(tmp_path, capsys):
    (tmp_path / "store").mkdir()
    (tmp_path / "store" / "manifest.json").write_text('{"format_version": 1, "stages": {}}')
    (tmp_path / "selections").mkdir()
    (tmp_path / "selections" / "picks.parquet").write_bytes(b"the user's selection")
    before = tree_digest(tmp_path)
    capsys.readouterr()
    assert main(["demo", "--workdir", str(tmp_path), "--nodes", "1000", "--quiet"]) == 2
    out, err = capsys.readouterr()
    assert err == (f"bigprune demo: error: --workdir {tmp_path}: folder is not empty and was not made "
                   f"by bigprune demo (no {MARKER} file); the demo would overwrite what is there, so "
                   "give a new or empty folder\n")
    assert out == "" and tree_digest(tmp_path) == before  # nothing written, nothing replaced


def test_demo_reruns_on_its_own_folder_and_skips_what_is_done(demo_run, capsys):
    assert (demo_run / MARKER).is_file()  # the fixture's folder existed empty: the demo marked it
    capsys.readouterr()
    assert main(["demo", "--workdir", str(demo_run), "--nodes", "6000", "--quiet", "--threads", "1"]) == 0
    out = capsys.readouterr().out
    steps = 3 + len(DEMO_STRATEGIES)  # ingest, propagate, one select per rule, the study
    assert "[data] reusing the generated marketplace" in out and f"(0 of {steps} steps ran)" in out

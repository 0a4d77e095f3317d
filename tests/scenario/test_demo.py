"""End to end: the demo's job on a small marketplace, through the command line."""
import json

import pyarrow.parquet as pq
import pytest

from bigprune.cli import main


@pytest.fixture(scope="module")
def demo_run(tmp_path_factory):
    workdir = tmp_path_factory.mktemp("demo")
    assert main(["demo", "--workdir", str(workdir), "--nodes", "6000", "--quiet", "--threads", "1"]) == 0
    return workdir


def test_demo_writes_every_selection_with_its_report(demo_run):
    for strategy in ("kcenter", "kcenter-pool", "random", "degree", "pagerank"):
        table = pq.read_table(demo_run / "selections" / f"{strategy}.parquet")
        assert table.column_names == ["node_id", "rank", "label"]
        report = json.loads((demo_run / "selections" / f"{strategy}.json").read_text())
        assert report["selected"] == table.num_rows == round(0.02 * report["pool"])
        assert "per-class" in report["caution"]


def test_kcenter_covers_targets_closer_than_random(demo_run):
    # Hochbaum & Shmoys (1986): the greedy bounds the covering radius at 3x the optimum; a random
    # subset of the same size has no such bound, and on clustered data covers worse.
    kcenter = json.loads((demo_run / "selections" / "kcenter.json").read_text())["coverage"]
    random = json.loads((demo_run / "selections" / "random.json").read_text())["coverage"]
    assert kcenter["radius"] < random["radius"]
    assert kcenter["p90"] < random["p90"]


def test_rerun_skips_everything(demo_run, capsys):
    capsys.readouterr()
    assert main(["run", str(demo_run / "job.toml"), "--quiet"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert len(lines) == 8 and all(line.startswith("skip") for line in lines)  # 7 stages + study


def test_demo_runs_a_study(demo_run):
    summary = json.loads((demo_run / "study" / "study.json").read_text())
    assert set(summary["recommendation"]["rules"]) == {"kcenter", "random"}
    assert summary["settings"]["evaluation"]["nodes"] == 300  # this week's answers
    assert (demo_run / "study" / "report.html").exists()


"""The demo's job through a ``local:2`` cluster against the same job on one server: the same
store bytes, the same selections for the rules run on the client, distributed rules within 10%
of the single server's objective, and a second run that skips every step without reaching the
cluster at all."""
import json

import pytest

from bigprune.cli import main
from bigprune.job.job import run_job
from bigprune.scenario.demo import demo
from conftest import file_digests, free_port

DISTRIBUTED = ("kmedian", "kcenter")


@pytest.fixture(scope="module")
def runs(tmp_path_factory, dask_client):
    """The demo on one server (``one``), then its job file over the same data files through the
    cluster into its own store and outputs (``cluster``)."""
    root = tmp_path_factory.mktemp("cluster-job")
    demo(root / "one", nodes=2000, seed=4, threads=1, memory_budget="1GiB", echo=lambda line: None)
    text = (root / "one" / "job.toml").read_text()
    data = root / "one" / "data"
    text = text.replace('"data/', f'"{data}/')  # the same input files: fingerprints name their paths
    (root / "cluster").mkdir()
    (root / "cluster" / "job.toml").write_text(text)
    steps = run_job(root / "cluster" / "job.toml", client=dask_client, echo=lambda line: None)
    assert all(step["run"] for step in steps)
    return root / "one", root / "cluster"


def stage_files(workdir):
    manifest = json.loads((workdir / "store" / "manifest.json").read_text())
    return {stage: file_digests(workdir / "store" / entry["dir"]) for stage, entry in manifest["stages"].items()}


def test_the_cluster_commits_the_single_server_store_bytes(runs):
    one, cluster = runs
    # The single server's stages are checked against scipy.sparse and networkx elsewhere
    # (tests/ingestion, tests/propagation); here the cluster must give the same bytes.
    assert stage_files(cluster) == stage_files(one)
    assert set(stage_files(one)) == {"graph", "propagate"}


def test_rules_run_on_the_client_give_the_same_picks(runs):
    one, cluster = runs
    for path in sorted((one / "selections").glob("*.parquet")):
        if path.stem not in DISTRIBUTED:
            assert file_digests(path.parent, [path.name]) == file_digests(cluster / "selections", [path.name])
            report = json.loads((cluster / "selections" / f"{path.stem}.json").read_text())
            assert report["distributed"] is False and report["on_client"]["parts"] == 1, report


@pytest.mark.parametrize("strategy, objective", [("kcenter", "radius"), ("kmedian", "mean")])
def test_distributed_rules_stay_within_10_percent_of_one_server(runs, strategy, objective):
    # The bar: the two-round scheme within 10% of the single-server greedy's objective.
    one, cluster = runs
    alone = json.loads((one / "selections" / f"{strategy}.json").read_text())
    spread = json.loads((cluster / "selections" / f"{strategy}.json").read_text())
    assert spread["distributed"]["parts"] > 1
    assert spread["coverage"][objective] <= 1.10 * alone["coverage"][objective]


def test_a_second_run_skips_every_step_without_reaching_the_cluster(runs, capsys):
    _, cluster = runs
    dead = f"127.0.0.1:{free_port()}"  # nothing listens: reaching it would fail the run
    capsys.readouterr()
    assert main(["run", str(cluster / "job.toml"), "--cluster", dead, "--quiet"]) == 0
    lines = capsys.readouterr().out.splitlines()
    assert all(line.startswith("skip") for line in lines[:-1]) and len(lines) == 10, lines
    assert lines[-1].startswith("done: 0 step(s) run, 9 skipped")

"""The nightly job: selection options from the job file, and last night's selection kept."""
import json

import pyarrow.parquet as pq
import pytest

from bigprune.cli import main
from bigprune.scenario.scenario import generate


@pytest.fixture(scope="module")
def data(tmp_path_factory):
    root = tmp_path_factory.mktemp("night")
    generate(root / "data", nodes=3000, seed=4)
    return root


def write_job(root, select_text):
    (root / "job.toml").write_text(f"""
store = "store"
[ingest]
edges = "data/edges"
nodes = "data/nodes.parquet"
[[select]]
{select_text}
""")
    return root / "job.toml"


def test_keep_previous_seeds_tonight_from_last_night(data, capsys):
    job = write_job(data, 'strategy = "kcenter"\nbudget = 40\nout = "picks/k.parquet"\nkeep_previous = true')
    assert main(["run", str(job), "--quiet"]) == 0
    first = set(pq.read_table(data / "picks/k.parquet").column("node_id").to_pylist())
    job.write_text(job.read_text().replace("budget = 40", "budget = 60"))  # tomorrow: a larger budget
    assert main(["run", str(job), "--quiet"]) == 0
    second = set(pq.read_table(data / "picks/k.parquet").column("node_id").to_pylist())
    report = json.loads((data / "picks/k.json").read_text())
    assert first <= second and len(second) == 60
    assert report["changed"] == {"kept": 40, "added": 20, "dropped": 0}
    log = [json.loads(line) for line in (data / "bigprune-log.jsonl").read_text().splitlines()]
    assert log[-1]["changed"] == {"kept": 40, "added": 20, "dropped": 0}


def test_radius_and_quota_options_from_the_job_file(data):
    job = write_job(data, 'strategy = "random"\nbudget = 36\nmin_per_class = 3\nout = "picks/r.parquet"')
    assert main(["run", str(job), "--quiet"]) == 0
    labels = pq.read_table(data / "picks/r.parquet").column("label").to_pylist()
    assert len(labels) == 36 and min(labels.count(c) for c in set(labels)) >= 3 and len(set(labels)) == 12


def test_cover_from_the_job_file(data):
    job = write_job(data, 'strategy = "kcenter"\nradius = 1e9\ncover = 0.5\nout = "picks/c.parquet"')
    assert main(["run", str(job), "--quiet"]) == 0
    report = json.loads((data / "picks/c.json").read_text())
    # reference: the job file's entries as written above; one node brings every target within 1e9
    assert report["constraints"]["radius"] == 1e9 and report["constraints"]["cover"] == 0.5
    assert report["selected"] == 1 and report["coverage"]["within"]["asked"] == 1.0


def test_ensemble_from_the_job_file_is_checked_and_used(data, capsys):
    # reference: the job file's entries as written here
    job = write_job(data, 'strategy = "ddd"\nbudget = 30\nensemble = 4\nout = "picks/d.parquet"')
    assert main(["check", str(job)]) == 0
    assert main(["run", str(job), "--quiet"]) == 0
    assert json.loads((data / "picks/d.json").read_text())["hardness"]["members"] == 4
    capsys.readouterr()
    bad = write_job(data, 'strategy = "ddd"\nbudget = 30\nensemble = 3\nout = "picks/e.parquet"')
    assert main(["check", str(bad)]) == 2
    assert capsys.readouterr().err == (f"bigprune check: error: {bad}: [[select]] #1: ensemble = 3: use an "
                                       f"even count >= 2 (members come in pairs trained on complementary "
                                       f"halves of the pool)\n")


def test_check_refuses_a_cover_without_radius_naming_the_entry(data, capsys):
    # reference: the job file's entry as written here; run makes the same check
    job = write_job(data, 'strategy = "kcenter"\nbudget = 10\ncover = 0.9\nout = "picks/f.parquet"')
    capsys.readouterr()
    assert main(["check", str(job)]) == 2
    assert capsys.readouterr().err == (f"bigprune check: error: {job}: [[select]] #1: cover = 0.9: goes "
                                       f"with radius (the share of targets to bring within it); give "
                                       f"radius R too\n")

"""The job file: declared keys and types, one clear line for each mistake."""
import pytest

from bigprune.job.config import load_job
from bigprune.common.errors import InputError

GOOD = """
store = "store"
memory_budget = "2GiB"
[ingest]
edges = "data/edges"
nodes = "data/nodes.parquet"
[propagate]
hops = 3
[[select]]
strategy = "kcenter"
budget = 0.05
out = "picks/k.parquet"
"""


def write(tmp_path, text):
    path = tmp_path / "job.toml"
    path.write_text(text)
    return path


def test_defaults_and_paths(tmp_path):
    job = load_job(write(tmp_path, GOOD))
    assert job["store"] == str(tmp_path / "store")
    assert job["propagate"] == {"hops": 3, "norm": "sym", "dtype": "float32", "restrict": False}
    assert job["select"][0]["targets"] == "test" and job["select"][0]["seed"] == 0
    assert job["select"][0]["out"] == str(tmp_path / "picks/k.parquet")


@pytest.mark.parametrize("edit, message", [
    (lambda t: t + "colour = 'blue'\n", "unknown key 'colour'"),
    (lambda t: t.replace("hops = 3", "hops = 'three'"), "[propagate]: hops = 'three' should be an integer"),
    (lambda t: t.replace("hops = 3", "hops = true"), "[propagate]: hops = True should be an integer"),
    (lambda t: t.replace("hops = 3", "hop = 3"), "[propagate]: unknown key 'hop'"),
    (lambda t: t.replace('nodes = "data/nodes.parquet"', ""), "[ingest]: missing key 'nodes'"),
    (lambda t: t.replace('budget = 0.05', 'budget = "5%"'), "[[select]] #1: budget = '5%' should be a number"),
    (lambda t: t.replace('store = "store"', ""), "top level: missing key 'store'"),
    (lambda t: t + "[[select]]\nstrategy='random'\nbudget=3\nout='picks/k.parquet'\n", "write the same out file"),
    (lambda t: t.replace("[ingest]", "[ingest"), "not valid TOML"),
])
def test_mistakes_name_the_key(tmp_path, edit, message):
    path = write(tmp_path, edit(GOOD))
    with pytest.raises(InputError) as info:
        load_job(path)
    assert message in str(info.value) and str(path) in str(info.value)
    assert "\n" not in str(info.value)

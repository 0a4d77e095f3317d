"""Same inputs, job and seed give byte-identical stores and selections, whatever the threads."""
from pathlib import Path

from bigprune.cli import main
from bigprune.scenario.demo import DEMO_STRATEGIES


def _stage_files(store):
    return {f"{d.name.split('-')[0]}/{f.name}": f.read_bytes()
            for d in sorted(Path(store).iterdir()) if d.is_dir() for f in sorted(d.iterdir())}


def test_thread_count_does_not_change_any_output(tmp_path):
    runs = []
    for threads in (1, 2):
        workdir = tmp_path / f"threads-{threads}"
        assert main(["demo", "--workdir", str(workdir), "--nodes", "4000", "--threads", str(threads),
                     "--quiet"]) == 0
        runs.append(workdir)
    one, two = runs
    assert _stage_files(one / "store") == _stage_files(two / "store")
    for strategy in DEMO_STRATEGIES:
        assert (one / "selections" / f"{strategy}.parquet").read_bytes() == \
            (two / "selections" / f"{strategy}.parquet").read_bytes()

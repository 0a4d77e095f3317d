"""The nightly job under faults: killed runs resume to the same bytes, locks, leftovers, reruns,
changed inputs, and a full disk.

The kill trials run the job in a subprocess that kills itself at a named step of a commit
(``BIGPRUNE_FAULT``, ``bigprune/common/faults.py``), so every step is hit on every run; the
reference is the same job run once uninterrupted. ``bench/resume.py`` kills at random moments.
"""
import errno
import importlib.util
import itertools
import json
import os
import re
import shutil
import signal
import socket
import subprocess
import sys
import time
from pathlib import Path

import numpy as np
import pyarrow.parquet as pq
import pytest

from bigprune.cli import main
from bigprune.common.faults import ENV, POINTS, STAGES
from bigprune.scenario.scenario import generate
from conftest import tree_digest

ROOT = Path(__file__).resolve().parents[1]
_spec = importlib.util.spec_from_file_location("bench_resume", ROOT / "bench" / "resume.py")
bench = importlib.util.module_from_spec(_spec)
_spec.loader.exec_module(bench)


@pytest.fixture(scope="module")
def scenario(tmp_path_factory):
    """A 2000-node scenario and the job's outputs from one uninterrupted run (in a subprocess)."""
    root = tmp_path_factory.mktemp("resume")
    generate(root / "data", nodes=2000, avg_degree=6, dim=8, days=2, parts_per_day=2, seed=11)
    bench.write_job(root / "reference", root / "data", threads=1, study=True)
    code, _, stderr, _ = bench.run(root / "reference")
    assert code == 0, stderr
    return root, bench.outputs(root / "reference")


@pytest.fixture
def done(scenario, tmp_path):
    """The job run to completion (in this process) over its own copy of the data, which tests
    may change; a copied store would not do, the manifest fingerprints inputs by path."""
    root, _ = scenario
    shutil.copytree(root / "data", tmp_path / "data")
    bench.write_job(tmp_path / "job", tmp_path / "data", threads=1)
    assert main(["run", str(tmp_path / "job" / "job.toml"), "--quiet"]) == 0
    return tmp_path / "job"




def plan(job, capsys):
    capsys.readouterr()
    assert main(["run", str(job / "job.toml"), "--dry-run", "--quiet"]) == 0
    return [line.split()[0] for line in capsys.readouterr().out.splitlines()]


# ---- kills at named points --------------------------------------------------------------------
FIRST_SELECTION = bench.STRATEGIES[0]  # the job's first [[select]]: where a select fault fires
FIRST_CELL = "full-pool-b1-r0.json"  # the study's first cell


@pytest.fixture(scope="module")
def faulted(scenario, tmp_path_factory):
    """Every (stage, point) fault: a job run in its own folder, killed there; what it left.

    The runs are independent subprocesses, run four at a time to spare the wall clock."""
    root, _ = scenario
    base = tmp_path_factory.mktemp("faults")
    pending, running, trials = list(itertools.product(STAGES, POINTS)), {}, {}
    while pending or running:
        while pending and len(running) < 4:
            stage, point = pending.pop()
            work = base / f"{stage}-{point}"
            bench.write_job(work, root / "data", threads=1, study=True)
            env = {**bench.environment(), ENV: f"{stage}:{point}"}
            running[(stage, point)] = subprocess.Popen(bench.command(work), env=env, stdout=subprocess.DEVNULL,
                                                       stderr=subprocess.PIPE, text=True)
        for trial, child in list(running.items()):
            if child.poll() is not None:
                work = base / "-".join(trial)
                trials[trial] = {"work": work, "code": child.returncode, "stderr": child.stderr.read(),
                                 "debris": debris(work), "committed": committed(work),
                                 "recorded": recorded(work), "selection": _file_sha(work / "selections" / f"{FIRST_SELECTION}.parquet")}
                child.stderr.close()
                del running[trial]
        time.sleep(0.02)
    return trials


def committed(work):
    """sha256 of each file of the stages the store's manifest names (nothing without a manifest)."""
    manifest = work / "store" / "manifest.json"
    if not manifest.exists():
        return {}
    stages = json.loads(manifest.read_text())["stages"]
    return {f"{stage}/{path.name}": bench._sha(path) for stage, entry in stages.items()
            for path in sorted((work / "store" / entry["dir"]).iterdir())}


def recorded(work):
    """The job outputs the manifest records as written, by file name."""
    manifest = work / "store" / "manifest.json"
    outputs = json.loads(manifest.read_text()).get("outputs", {}) if manifest.exists() else {}
    return sorted(Path(path).name for path in outputs)


def debris(work):
    """What a killed run left that no commit names: the lock, staging folders, stage folders
    the manifest does not name, temporaries; process ids and tokens shown as PID and TOKEN."""
    store = work / "store"
    named = {entry["dir"] for entry in json.loads((store / "manifest.json").read_text())["stages"].values()} \
        if (store / "manifest.json").exists() else set()
    found = [".lock"] if (store / ".lock").exists() else []
    found += [f"staging {p.name.split('-')[0]}" for p in (store / ".staging").glob("*")]
    found += [f"orphan {p.name.split('-')[0]}" for p in store.glob("*-*") if p.is_dir() and p.name not in named]
    found += [re.sub(r"\.\d+\.tmp$", ".PID.tmp", str(p.relative_to(work))) for p in work.rglob("*.tmp")]
    return sorted(found)


def _file_sha(path):
    return bench._sha(path) if path.exists() else None


# What each kill leaves besides the job's lock: the stage's files in staging before the rename, a
# stage folder no manifest names after it; select's and the study's temporaries beside their outputs.
DEBRIS = {
    "after-temp-write": {"select": [f"selections/.{FIRST_SELECTION}.parquet.PID.tmp"],
                         "study": [f"study/cells/.{FIRST_CELL}.PID.tmp"]},
    "before-rename": {"select": [f"selections/.{FIRST_SELECTION}.json.PID.tmp",
                                 f"selections/.{FIRST_SELECTION}.parquet.PID.tmp"],
                      "study": [f"study/cells/.{FIRST_CELL}.PID.tmp"]},
    "after-rename": {"select": [f"selections/.{FIRST_SELECTION}.parquet.PID.tmp"], "study": []},
    "before-manifest": {"select": [], "study": []},
}


def expected_debris(stage, point):
    if stage in ("graph", "propagate"):
        return sorted([".lock", f"{'staging' if point in POINTS[:2] else 'orphan'} {stage}"])
    return sorted([".lock", *DEBRIS[point][stage]])


@pytest.mark.parametrize("point", POINTS)
@pytest.mark.parametrize("stage", STAGES)
def test_killed_at_a_named_point_resumes_to_the_same_bytes(scenario, faulted, stage, point, capsys):
    _, reference = scenario
    trial = faulted[(stage, point)]
    # the run died at the named point, not by a timer: every run reaches it
    assert trial["code"] == -signal.SIGKILL, trial["stderr"]
    assert trial["debris"] == expected_debris(stage, point)
    # the store commits nothing of the killed stage: what its manifest names is what the
    # uninterrupted run (the reference) committed for the stages before it
    order = ("graph", "propagate", "select", "study")
    earlier = {s for s in ("graph", "propagate") if order.index(s) < order.index(stage)}
    assert trial["committed"] == {k: v for k, v in reference.items() if k.split("/")[0] in earlier}
    selections = [f"{s}.parquet" for s in bench.STRATEGIES]
    assert trial["recorded"] == (sorted(selections) if stage == "study" else [])
    if stage == "select":  # its output is either absent or complete, never half written
        complete = point == "before-manifest"
        assert trial["selection"] == (reference[f"selections/{FIRST_SELECTION}.parquet"] if complete else None)
    # the next run finishes the job to the reference's bytes, sweeping what the kill left
    work = trial["work"]
    assert main(["run", str(work / "job.toml"), "--quiet"]) == 0
    assert bench.outputs(work) == reference
    assert debris(work) == [] and bench.leftovers(work) == []
    assert set(plan(work, capsys)) == {"skip"}


def test_a_killed_select_leaves_a_temporary_that_the_next_select_sweeps(done, tmp_path, capsys):
    """A standalone select killed between writing and renaming its output; a live writer's
    temporary in the same folder is left alone."""
    out = tmp_path / "out"
    out.mkdir()
    live = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        (out / f".other.parquet.{live.pid}.tmp").write_text("being written")
        args = ["select", "--store", str(done / "store"), "--strategy", "random", "--budget", "0.05",
                "--out", str(out / "picks.parquet"), "--threads", "1", "--quiet"]
        killed = subprocess.Popen([sys.executable, "-m", "bigprune", *args], stdout=subprocess.DEVNULL,
                                  env={**bench.environment(), ENV: "select:after-temp-write"})
        assert killed.wait() == -signal.SIGKILL
        assert sorted(p.name for p in out.iterdir()) == sorted(
            [f".picks.parquet.{killed.pid}.tmp", f".other.parquet.{live.pid}.tmp"])
        assert main(args) == 0
        assert sorted(p.name for p in out.iterdir()) == sorted(
            ["picks.parquet", "picks.json", f".other.parquet.{live.pid}.tmp"])
    finally:
        live.kill()
        live.wait()


def test_stale_lock_is_taken_over(done, capsys):
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # its pid now names no process
    (done / "store" / ".lock").write_text(f"{dead.pid} {socket.gethostname()}")
    (done / "selections" / "random.parquet").unlink()
    assert main(["run", str(done / "job.toml"), "--quiet"]) == 0
    assert not (done / "store" / ".lock").exists() and (done / "selections" / "random.parquet").exists()


def test_live_lock_refuses_with_exit_4(done, capsys):
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    try:
        lock = done / "store" / ".lock"
        lock.write_text(f"{holder.pid} {socket.gethostname()}")
        before = tree_digest(done)
        capsys.readouterr()
        for args in (["run", str(done / "job.toml")],
                     ["ingest", "--edges", str(done.parent / "data" / "edges"), "--nodes",
                      str(done.parent / "data" / "nodes.parquet"), "--store", str(done / "store")]):
            assert main([*args, "--quiet"]) == 4
            err = capsys.readouterr().err
            assert err.count("\n") == 1 and "Traceback" not in err
            assert f"in use by process {holder.pid} on {socket.gethostname()} (lock file {lock})" in err
        assert tree_digest(done) == before
    finally:
        holder.kill()
        holder.wait()


def test_staging_of_dead_processes_is_swept(done, capsys):
    holder = subprocess.Popen([sys.executable, "-c", "import time; time.sleep(60)"])
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    try:
        staging = done / "store" / ".staging"
        for name in (f"graph-{dead.pid}-0badc0de", f"propagate-{dead.pid}-deadbeef", f"graph-{holder.pid}-a11ce000"):
            (staging / name).mkdir(parents=True)
            np.save(staging / name / "features.npy", np.zeros(3))
        # a manifest temporary of a process killed while committing
        (done / "store" / f".manifest.json.{dead.pid}.tmp").write_text("{")
        # rewrite one partition so that ingest runs and opens a stage
        first = sorted((done.parent / "data" / "edges").rglob("*.parquet"))[0]
        pq.write_table(pq.read_table(first).slice(1), first)
        assert main(["run", str(done / "job.toml"), "--quiet"]) == 0
        assert sorted(p.name for p in staging.iterdir()) == [f"graph-{holder.pid}-a11ce000"]
        assert not (done / "store" / f".manifest.json.{dead.pid}.tmp").exists()
    finally:
        holder.kill()
        holder.wait()


def test_unchanged_inputs_skip_every_step(done, capsys):
    assert set(plan(done, capsys)) == {"skip"}
    before = tree_digest(done / "store"), {p.name: p.read_bytes() for p in (done / "selections").iterdir()}
    first = sorted((done.parent / "data" / "edges").rglob("*.parquet"))[0]
    os.utime(first)  # a new modification time alone: the fingerprints compare content
    assert set(plan(done, capsys)) == {"skip"}
    assert main(["run", str(done / "job.toml"), "--quiet"]) == 0
    assert (tree_digest(done / "store"), {p.name: p.read_bytes() for p in (done / "selections").iterdir()}) == before


def test_rewritten_partition_reruns_from_ingest(done, tmp_path, capsys):
    third = sorted((tmp_path / "data" / "edges").rglob("*.parquet"))[2]
    table = pq.read_table(third)
    pq.write_table(table.slice(0, len(table) - 25), third)
    steps = plan(done, capsys)
    assert steps == ["run"] * len(steps) and len(steps) == 2 + len(bench.STRATEGIES)
    capsys.readouterr()
    assert main(["run", str(done / "job.toml"), "--quiet"]) == 0
    assert "inputs changed: 1 changed" in capsys.readouterr().out
    bench.write_job(tmp_path / "scratch", tmp_path / "data", threads=1)
    assert main(["run", str(tmp_path / "scratch" / "job.toml"), "--quiet"]) == 0
    # reference: a from-scratch run on the changed inputs
    assert bench.outputs(done) == bench.outputs(tmp_path / "scratch")
    assert bench.leftovers(done) == []


# ---- a full disk ----------------------------------------------------------------------------
@pytest.fixture
def small_disk(tmp_path):
    """A 1 MiB tmpfs (we run as root); skipped where mounting is not allowed."""
    disk = tmp_path / "disk"
    disk.mkdir()
    mounted = subprocess.run(["mount", "-t", "tmpfs", "-o", "size=1M", "tmpfs", str(disk)], capture_output=True)
    if mounted.returncode != 0:
        pytest.skip(f"cannot mount a tmpfs: {mounted.stderr.decode().strip()}")
    try:
        yield disk
    finally:
        subprocess.run(["umount", str(disk)], check=True)


def _ingest(data, store):
    return main(["ingest", "--edges", str(data / "edges"), "--nodes", str(data / "nodes.parquet"),
                 "--store", str(store), "--quiet", "--threads", "1"])


def test_full_disk_exits_3_and_keeps_the_store(scenario, small_disk, capsys):
    root, _ = scenario
    store = small_disk / "store"
    assert _ingest(root / "data", store) == 0
    need = sum(p.stat().st_size for p in store.rglob("*") if p.is_file())
    before = tree_digest(store)
    faults = set()
    for share in (0.0, 0.2, 0.4, 0.6, 0.8, 0.95):  # room for that share of a second graph stage
        stat = os.statvfs(small_disk)
        ballast = small_disk / "ballast"
        with open(ballast, "wb") as fh:
            os.posix_fallocate(fh.fileno(), 0, stat.f_bavail * stat.f_frsize - int(share * need))
        capsys.readouterr()
        assert _ingest(root / "data", store) == 3
        err = capsys.readouterr().err
        assert err.count("\n") == 1 and "Traceback" not in err
        assert "bigprune ingest: error: no space left on device" in err
        faults.add(err.split(" writing ")[1].split(";")[0] if " writing " in err else "unnamed")
        assert tree_digest(store) == before  # no staging, lock or temporary file left behind
        ballast.unlink()
    assert len(faults) >= 3, faults  # the fault landed in different files
    assert _ingest(root / "data", store) == 0


def test_full_disk_simulated(scenario, tmp_path, capsys, monkeypatch):
    """Where no tmpfs can be mounted: the second array written fails with ENOSPC."""
    root, _ = scenario
    store = tmp_path / "store"
    assert _ingest(root / "data", store) == 0
    before = tree_digest(store)
    calls = []
    real = os.posix_fallocate

    def fallocate(fd, offset, length):
        calls.append(length)
        if len(calls) == 2:
            raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))
        return real(fd, offset, length)

    monkeypatch.setattr(os, "posix_fallocate", fallocate)
    capsys.readouterr()
    assert _ingest(root / "data", store) == 3
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "no space left on device writing " in err
    assert tree_digest(store) == before
    monkeypatch.undo()
    assert main(["status", "--store", str(store)]) == 0
    assert json.loads((store / "manifest.json").read_text())["stages"]["graph"]["info"]["nodes"] == 2000


def test_orphan_stage_dir_is_swept_under_the_lock(tmp_path):
    """A kill between the stage rename and the manifest write leaves a directory no manifest
    names; the next locked stage removes it and keeps the committed ones."""
    from conftest import random_symmetric, write_graph_store

    import numpy as np

    rng = np.random.default_rng(0)
    store = write_graph_store(tmp_path / "s", random_symmetric(20, 0.3, rng), np.ones((20, 2)),
                              np.ones(20), np.zeros(20))
    orphan = tmp_path / "s" / "propagate-0123456789ab"
    orphan.mkdir()
    (orphan / "hop_1.npy").write_bytes(b"partial")
    kept = store.entry("graph")["dir"]
    with store.locked(), store.begin("propagate", params={}) as writer:
        writer.save("hop_1", np.zeros((20, 2), np.float32))
    assert not orphan.exists() and (tmp_path / "s" / kept).is_dir()

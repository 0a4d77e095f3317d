"""Reaching a cluster: addresses, a scheduler that does not answer, a store the workers cannot
see, and Dask staying out of runs without --cluster."""
import subprocess
import sys
import tempfile
from pathlib import Path

import pytest

from bigprune.cli import main
from conftest import free_port, tree_digest


def one_line(capsys):
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "Traceback" not in err, err
    return err


@pytest.mark.parametrize("address, expected", [
    ("local:0", "--cluster 'local:0': local:N needs at least one worker"),
    ("local:two", "--cluster 'local:two': write local:N with N worker processes, e.g. local:2"),
    ("no such host", "--cluster 'no such host' is not a scheduler address: use HOST:PORT, "
                     "tcp://HOST:PORT or local:N"),
])
def test_a_bad_address_exits_2_and_keeps_the_store(small_store, capsys, address, expected):
    before = tree_digest(small_store.path)
    assert main(["propagate", "--store", str(small_store.path), "--cluster", address, "--quiet"]) == 2
    assert one_line(capsys) == f"bigprune propagate: error: {expected}\n"
    assert tree_digest(small_store.path) == before


def test_the_job_files_cluster_key_is_checked_by_check_and_run(tmp_path, capsys):
    job = tmp_path / "job.toml"
    job.write_text('store = "store"\ncluster = "local:0"\n[ingest]\nedges = "e"\nnodes = "n.parquet"\n')
    for argv in (["check", str(job)], ["run", str(job)]):
        assert main(argv) == 2
        assert one_line(capsys) == (f"bigprune {argv[0]}: error: {job}: top level: cluster = 'local:0': "
                                    "local:N needs at least one worker\n")
    assert sorted(p.name for p in tmp_path.iterdir()) == ["job.toml"]


def test_a_scheduler_that_does_not_answer_exits_2(small_store, capsys):
    address = f"127.0.0.1:{free_port()}"
    before = tree_digest(small_store.path)
    assert main(["propagate", "--store", str(small_store.path), "--cluster", address, "--quiet"]) == 2
    assert one_line(capsys) == (f"bigprune propagate: error: --cluster {address}: no Dask scheduler "
                                "answered there (OSError); start one with `dask scheduler`\n")
    assert tree_digest(small_store.path) == before


@pytest.fixture
def blind_worker():
    """A scheduler and one worker that sees another folder at the store's path: the worker runs
    in its own mount namespace with an empty tmpfs over the folder holding the store (a machine
    whose disk merely has a folder of that name). Needs root, as CI and this machine have."""
    from distributed import Client, LocalCluster

    shared = Path(tempfile.mkdtemp()) / "shared"
    shared.mkdir()
    if subprocess.run(["unshare", "--mount", "true"], capture_output=True).returncode != 0:
        pytest.skip("unshare --mount is not permitted here (needs root): no worker with its own mounts")
    with LocalCluster(n_workers=0, dashboard_address=None, scheduler_port=0) as local, \
            Client(local, set_as_default=False) as client:
        command = (f"mount -t tmpfs tmpfs {shared} && exec {sys.executable} -m distributed.cli.dask_worker "
                   f"{local.scheduler_address} --nthreads 1 --no-nanny --no-dashboard")
        worker = subprocess.Popen(["unshare", "--mount", "--propagation", "private", "sh", "-c", command],
                                  stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        try:
            client.wait_for_workers(1, timeout=60)
            yield local.scheduler_address, shared, next(iter(client.scheduler_info()["workers"]))
        finally:
            worker.terminate()
            worker.wait()


def test_a_store_the_workers_cannot_see_is_refused(blind_worker, small_store, capsys):
    address, shared, worker = blind_worker
    store = shared / "store"
    small_store.path.rename(store)
    before = tree_digest(store)
    assert main(["propagate", "--store", str(store), "--cluster", address, "--quiet"]) == 2
    assert one_line(capsys) == (f"bigprune propagate: error: --cluster: worker {worker} cannot see the store "
                                f"{store} (No such file or directory); put it on a file system "
                                "every worker mounts at the same path\n")
    assert tree_digest(store) == before


def test_without_cluster_dask_is_never_imported(small_store):
    code = ("import sys; from bigprune.cli import main; "
            f"assert main(['propagate', '--store', {str(small_store.path)!r}, '--quiet']) == 0; "
            "print(sorted(m for m in ('dask', 'distributed') if m in sys.modules))")
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert done.stdout.splitlines()[-1] == "[]"

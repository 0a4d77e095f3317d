"""Reaching a Dask cluster: ``--cluster ADDRESS`` or ``local:N``, and the shared-store check.

Imported only when a run asks for a cluster, so that Dask stays out of every other run.
"""
import logging
import os
import re
import uuid
from contextlib import contextmanager
from pathlib import Path

from ..common.errors import InputError

LOCAL = re.compile(r"local:(\d+)")
CONNECT_SECONDS = 10


def parse_address(address, option="--cluster"):
    """``("local", N)`` for ``local:N``, else ``("remote", address)``; InputError if neither."""
    text = str(address).strip()
    match = LOCAL.fullmatch(text)
    if match:
        workers = int(match.group(1))
        if workers < 1:
            raise InputError(f"{option} {address!r}: local:N needs at least one worker")
        return "local", workers
    if text.startswith("local"):
        raise InputError(f"{option} {address!r}: write local:N with N worker processes, e.g. local:2")
    if not re.fullmatch(r"(tcp|tls|inproc|ucx)://[^\s]+|[A-Za-z0-9_.\-]+:\d+", text):
        raise InputError(f"{option} {address!r} is not a scheduler address: use HOST:PORT, "
                         "tcp://HOST:PORT or local:N")
    return "remote", text


@contextmanager
def cluster(address, option="--cluster"):
    """A ``distributed.Client`` for ``address``, closed (with a local cluster) on exit."""
    kind, where = parse_address(address, option)
    from distributed import Client, LocalCluster

    if kind == "local":
        # One thread per worker process: each task sets numba, FAISS and DuckDB to the worker's
        # threads. Worker logs stay quiet: a task's error reaches the user once, from the client.
        # No Dask memory limit: the stages keep within --memory-budget themselves, and Dask's
        # own limit would pause or restart a worker that holds a large window on purpose.
        local = LocalCluster(n_workers=where, threads_per_worker=1, processes=True,
                             dashboard_address=None, memory_limit=0, silence_logs=logging.CRITICAL)
        client = Client(local, set_as_default=False)
    else:
        local = None
        try:
            client = Client(where, timeout=CONNECT_SECONDS, set_as_default=False)
        except (OSError, TimeoutError) as exc:
            raise InputError(f"{option} {address}: no Dask scheduler answered there "
                             f"({type(exc).__name__}); start one with `dask scheduler`") from None
    # The workers import while the client reads its inputs (held: a released future may be dropped).
    warming = [client.submit(_warm_up, workers=[worker], pure=False, key=f"bigprune-warm-up-{worker}")
               for worker in client.scheduler_info()["workers"]]
    try:
        yield client
    finally:
        del warming
        client.close()
        if local is not None:
            local.close()


def _warm_up():
    """On a worker: import what the stages' tasks use (about 1.5 s for a new worker process)."""
    import importlib

    for name in ("bigprune.ingestion.tasks", "bigprune.propagation.tasks", "bigprune.selection.composable",
                 "bigprune.learning.studytasks"):
        importlib.import_module(name)


def check_store(client, root, option="--cluster", what="the store"):
    """Refuse a store (or ``what`` else) that a worker cannot see at the same path, with the
    same contents.

    The client writes a file with a random token into the store; every worker must read that
    token back from the same path. A worker on another machine whose disk merely has a folder of
    that name fails, as does one that cannot reach the folder at all.
    """
    root = Path(root).resolve()
    created = not root.exists()
    root.mkdir(parents=True, exist_ok=True)
    token = uuid.uuid4().hex
    probe = root / f".cluster-probe-{os.getpid()}-{token[:8]}"
    probe.write_text(token)
    try:
        seen = client.run(_read_probe, str(probe))
    finally:
        probe.unlink(missing_ok=True)
        if created:  # a refused run leaves no folder behind; the stage makes it again
            root.rmdir()
    if not seen:
        raise InputError(f"{option}: the cluster has no workers; start some with `dask worker ADDRESS`")
    for worker, (found, why) in sorted(seen.items()):
        if found != token:
            raise InputError(f"{option}: worker {worker} cannot see {what} {root} ({why}); put "
                             f"it on a file system every worker mounts at the same path")


def _read_probe(path):
    """On a worker: the probe's token and, if it cannot be read, why."""
    try:
        return Path(path).read_text(), "another folder at that path"
    except OSError as exc:
        return None, exc.strerror or type(exc).__name__

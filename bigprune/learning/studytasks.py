"""The study's cells as Dask tasks: each worker runs the single-server cell code and writes the
cell's file into ``OUT/cells/`` (shared by every worker) as the single-server study does.

The context (store path, pinned manifest, pool, evaluation and tuning rows) goes to every worker
once; a worker process reads the evaluation and tuning features once per study run, not once per
cell. Workers open the stage directories the client's pinned manifest names, which stay in place
while the client holds the store, so no cell reads another commit. ``memory_budget`` is per
worker process: a worker with several threads runs as many cells at once as its threads and the
budget allow, splitting the budget between them as the single-server pool splits it between
processes.
"""
import threading
import uuid
from pathlib import Path

from ..common.runtime import set_quiet, set_threads
from .study import _load_context, _record, _run_cell, _split_budget, _write_json

_LOADED = {}  # on a worker: the study run's id -> (loaded context, slots for cells at once)
_LOADING = threading.Lock()


def run_cells(client, todo, context, folder):
    """Run the cells ``todo`` on the cluster; their records, in order (each also in ``folder``).

    ``context`` as the single-server study builds it, with ``memory`` (per worker process) and
    ``need`` (one cell's bytes) instead of a per-process budget and thread count.
    """
    from ..cluster.tasks import run_tasks

    if not todo:
        return []
    run = uuid.uuid4().hex
    shared = client.scatter([dict(context, run=run)], broadcast=True, hash=False)[0]
    try:
        return run_tasks(client, run_cell_task,
                         [(shared, cell, str(Path(folder) / f"{cell['name']}.json")) for cell in todo],
                         desc="study", unit="cell", exclusive=False)  # cells share a worker by plan
    finally:
        client.cancel([shared])
        client.run(_forget, run, on_error="ignore")  # the workers' memory is the next stage's again


def _forget(run):
    """On a worker: drop the study run's loaded context."""
    with _LOADING:
        _LOADED.pop(run, None)


def run_cell_task(context, cell, path):
    """On a worker: run one cell, write its record to ``path`` (temporary file, then rename)."""
    set_quiet(True)  # the client's bar counts the cells
    loaded, slots = _worker_context(context)
    with slots:
        set_threads(loaded["threads"])
        result = _run_cell(cell, loaded)
    record = _record(cell, result)
    _write_json(Path(path), record)
    return record


def _worker_context(context):
    """This worker's loaded context for the study run, loaded by the first cell that needs it."""
    from ..cluster.tasks import worker_threads

    with _LOADING:
        if context["run"] not in _LOADED:
            _LOADED.clear()  # a run whose client died left its features: they go before these come
            threads = worker_threads()
            at_once, memory = _split_budget(context["memory"], context["need"], threads, threads)
            loaded = _load_context(dict(context, memory=memory,
                                        threads=1 if at_once > 1 else threads))
            _LOADED[context["run"]] = loaded, threading.BoundedSemaphore(at_once)
        return _LOADED[context["run"]]

"""Mapping a stage's pieces of work over the cluster's workers, with a progress bar.

Tasks write their own windows of the stage's files with plain file I/O and return small
results; the client alone commits. A task must give the same bytes when run again: a worker
lost mid-task has its tasks rerun elsewhere (Dask's ``distributed.scheduler.allowed-failures``,
3 by default, bounds how often). A task that raises is not retried: the error is the answer.

A stage plans each task to hold up to ``--memory-budget`` with all of its worker's threads, so a
worker process runs one such task at a time, whatever its ``--nthreads`` (the study's cells plan
their own sharing of a worker and opt out).
"""
import threading
import uuid

from ..common.errors import BudgetError
from ..common.runtime import progress


_ONE_AT_A_TIME = threading.Lock()  # on a worker: the task of a stage that holds the budget


def run_tasks(client, function, pieces, desc, unit="task", exclusive=True):
    """``[function(*piece) for piece in pieces]``, run as Dask tasks; results in order.

    The first task to fail cancels the rest and its exception is raised here (a BigpruneError
    keeps its type, so its one line and exit status reach the user as on one server). A task
    whose workers keep dying is a BudgetError (exit 3). ``exclusive``: one task of this kind at
    a time per worker process (see the module's docstring).
    """
    from distributed import as_completed
    from distributed.scheduler import KilledWorker

    pieces = list(pieces)
    run = uuid.uuid4().hex[:8]
    call = (_exclusive, function) if exclusive else (function,)
    futures = [client.submit(*call, *piece, key=f"bigprune-{desc.replace(' ', '-')}-{run}-{i}",
                             pure=False)
               for i, piece in enumerate(pieces)]
    order = {future.key: i for i, future in enumerate(futures)}
    results = [None] * len(futures)
    try:
        with progress(total=len(futures), desc=desc, unit=unit) as bar:
            for future in as_completed(futures, loop=client.loop):
                results[order[future.key]] = future.result()
                bar.update(1)
    except KilledWorker:
        raise BudgetError(f"{desc}: a task's worker died each time it ran the task (out of memory, "
                          "or killed); check the workers' memory and logs, then rerun: the store "
                          "keeps its last committed state") from None
    finally:
        client.cancel(futures)
    return results


def _exclusive(function, *args):
    """On a worker: ``function(*args)`` once no other exclusive task runs in this process."""
    with _ONE_AT_A_TIME:
        return function(*args)


def worker_count(client):
    """The worker processes the cluster has now (at least 1, for planning)."""
    return max(1, len(client.scheduler_info()["workers"]))


def worker_threads():
    """The threads this worker gives a task (its ``--nthreads``; 1 outside a worker)."""
    from distributed import get_worker

    try:
        return get_worker().state.nthreads
    except ValueError:
        return 1

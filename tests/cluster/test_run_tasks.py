"""run_tasks: results in order, a task's own error unchanged, a worker that keeps dying as exit 3."""
import operator
import os

import dask
import pytest

from bigprune.cluster.connect import cluster
from bigprune.cluster.tasks import run_tasks
from bigprune.common.errors import BudgetError, InputError


def _refuse(value):
    raise InputError(f"--thing {value}: refused")


def _die():
    os._exit(1)


def test_results_come_back_in_the_order_of_the_pieces(dask_client):
    # reference: the same map done by Python's built-in map
    pieces = [(i, 7 * i) for i in range(20)]
    assert run_tasks(dask_client, operator.add, pieces, "add") == list(map(operator.add, *zip(*pieces)))


def test_a_tasks_bigprune_error_reaches_the_client_unchanged(dask_client):
    with pytest.raises(InputError, match=r"^--thing 3: refused$"):
        run_tasks(dask_client, _refuse, [(3,)], "refuse")


def test_a_task_whose_worker_dies_is_a_budget_error():
    # Dask gives up on a task after `allowed-failures` lost workers (0 here: the first loss).
    with dask.config.set({"distributed.scheduler.allowed-failures": 0}), cluster("local:1") as client:
        with pytest.raises(BudgetError, match=r"^dying: a task's worker died each time it ran the task"):
            run_tasks(client, _die, [()], "dying")

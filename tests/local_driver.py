"""Count a run in this process, through the store, the way the coordinator does on a cluster.

For tests of the checks and queries that need real runs (counts from the
kernel, splits from node budgets) but no Dask cluster.
"""

from __future__ import annotations

import time

from foldfarm import run as runner
from foldfarm.symmetry import CURRENT_TREE, tree_of
from foldfarm.worker import work

#: The worker address recorded with every task counted here.
HERE = "tcp://127.0.0.1:9"


def count_here(store, shape: str, *, task_nodes: int = 30, tasks: int = 8, order: str = "fast",
               tree: int = CURRENT_TREE) -> int:
    """Plan ``shape`` on ``tree``, count every task with :func:`foldfarm.worker.work` (node budgets, so splits
    are reproducible), record each result, and finish the run (which verifies it); return the run id."""
    settings = runner.Settings(task_nodes=task_nodes, task_seconds=0, tasks=tasks, order=order)
    run_id = runner.create(store, shape, settings, threads=1, tree=tree)
    store.set_run_state(run_id, "running")
    count_pending(store, run_id, task_nodes)
    runner.finish(store, run_id, time.perf_counter())
    return run_id


def count_pending(store, run_id: int, task_nodes: int, most: int | None = None) -> int:
    """Count pending tasks of a run on its own tree, as :func:`count_here` does, at most ``most`` of them
    (None: until none is pending); return how many were counted."""
    info = store.get_run(run_id)
    sides = tuple(int(p) for p in info.side_order.split("x") if int(p) > 1)
    tree = tree_of(info.settings)
    counted = 0
    while (most is None or counted < most) and \
            (batch := store.next_pending(run_id, 200 if most is None else min(200, most - counted))):
        store.mark_running([t.id for t in batch], HERE)
        for task, out in zip(batch, work(sides, [t.prefix for t in batch], task_nodes, 0, tree=tree)):
            if out["complete"]:
                store.record_done(task.id, out["count"], out["nodes"], out["seconds"], HERE)
            else:
                store.record_split(task.id, out["count"], out["nodes"], out["seconds"], HERE, out["remainder"])
        counted += len(batch)
    return counted

"""What runs on a Dask worker: the kernel's jobs and the plugin that readies each worker.

:func:`work` counts prefix tasks within a budget and returns plain dicts;
it is what the coordinator (:mod:`foldfarm.run`) submits, and what the
audit (:mod:`foldfarm.check`) submits again on another worker.
:func:`plan_coarse` and :func:`plan_pieces` (the plan of a new run, in
pieces) and :func:`children` (the tree the completeness check walks) are the coordinator's other uses of the
kernel: given a cluster it sends them to a worker, so the coordinator
itself never loads numba (about 0.6 s of CPU at start-up, the compiler's
memory, and on a cluster's login node a compile of its own).  Without a
cluster they run in the calling process.

:class:`ReadyWorker` is a Dask worker plugin.  On a worker that starts (or
joins a running cluster later) it loads the compiled kernel before the
first task, so no task's time budget pays for the load (about 0.5 s a
process).  On a worker that closes it freezes the garbage collector's
objects, which cuts the interpreter's exit from about 0.4 s to a few
milliseconds (the final collections would walk every object numba and
LLVM created); nothing is left to collect on a process that is ending.

:data:`DASK_SETTINGS` is the Dask configuration of a counting cluster:
the local cluster uses it, and ``deploy/dask.yaml`` carries the same
values for workers started by hand or by a batch system.
"""

from __future__ import annotations

import gc

from distributed.core import Status
from distributed.diagnostics.plugin import WorkerPlugin

#: Dask's periodic bookkeeping, slowed down for long CPU-bound tasks.  With
#: Dask's defaults the event loops of the scheduler, nannies and workers took
#: about 6% of the CPU of a 2-core machine whose workers were counting (the
#: loop-health tick every 20 ms, the memory monitor every 100 ms, the system
#: monitor every 500 ms, the statistical profiler every 10 ms); with these,
#: under 1% (measured in one run, 8 s of counting on 2 workers: 1.03 against
#: 0.15 CPU-seconds).  What they cost: the dashboard's profile page stays
#: empty (it would show only the compiled kernel anyway), its resource plots
#: update every 5 s, and a worker over its memory limit is caught within a
#: second instead of 0.1 s (a task holds a few kilobytes).
DASK_SETTINGS = {
    "distributed.admin.tick.interval": "1s",
    "distributed.admin.system-monitor.interval": "5s",
    "distributed.worker.memory.monitor-interval": "1s",
    "distributed.worker.profile.enabled": False,
}


def work(sides: tuple[int, ...], prefixes: list[str] | str, task_nodes: int, task_seconds: float, *,
         tree: int) -> list[dict]:
    """Count the subtrees below ``prefixes`` of the map with working sides ``sides``, searched on tree ``tree``.

    ``tree`` is the run's (:func:`foldfarm.symmetry.tree_of`): a prefix names
    a subtree of one tree only, so it has no default.
    Runs on a Dask worker; each prefix is one task with its own budget
    (``task_nodes`` search nodes and ``task_seconds`` seconds, 0 for no
    bound).  Returns one plain dict per prefix: ``count`` (foldings),
    ``nodes``, ``seconds``, ``complete``, ``remainder`` (prefix texts) and
    ``worker`` (this worker's address, None outside a worker).  ``prefixes``
    may come as one text, a prefix a line: Dask walks a list argument item
    by item looking for futures (about 3 µs an item on the coordinator).
    """
    from foldfarm.kernel import count_below, tables_for
    from foldfarm.prefix import parse_prefix, prefix_text

    tables = tables_for(tuple(sides), tree)
    address = worker_address()
    if isinstance(prefixes, str):
        prefixes = prefixes.split("\n")
    results = []
    for prefix in prefixes:
        out = count_below(tables, parse_prefix(prefix), budget=task_nodes or None, seconds=task_seconds or None)
        results.append({
            "count": out.count,
            "nodes": out.nodes,
            "seconds": out.seconds,
            "complete": out.complete,
            "remainder": [prefix_text(r) for r in out.remainder],
            "worker": address,
        })
    return results


def plan_coarse(sides: tuple[int, ...], target: int, probes: int, seed: int,
                eta_probes: int, *, tree: int) -> tuple[list[tuple[str, int]], float]:
    """The pieces of a run's plan (:func:`foldfarm.plan.pieces`: prefix text, tasks) and its search size.

    For the map with working sides ``sides`` on tree ``tree``.  The size is
    a quick Knuth estimate of the nodes in the whole search tree
    (``eta_probes`` probes; 0 for a single cell), for progress ETAs.  Runs
    on a worker, where the kernel is loaded, or in the coordinator.
    """
    from foldfarm.estimate import estimate
    from foldfarm.kernel import tables_for
    from foldfarm.plan import pieces
    from foldfarm.prefix import prefix_text

    tables = tables_for(tuple(sides), tree)
    nodes = estimate(tables, eta_probes, seed).nodes if tables.n > 1 else 0.0
    return [(prefix_text(root), tasks) for root, tasks in pieces(tables, target, probes, seed)], nodes


def plan_pieces(sides: tuple[int, ...], pieces: list[tuple[str, int]], probes: int, seed: int, *,
                tree: int) -> list[str]:
    """The tasks (prefix texts, sorted) of consecutive pieces of a plan (:func:`plan_coarse`), one after another."""
    from foldfarm.kernel import tables_for
    from foldfarm.plan import plan_piece
    from foldfarm.prefix import parse_prefix, prefix_text

    tables = tables_for(tuple(sides), tree)
    return [prefix_text(steps) for root, tasks in pieces
            for steps in plan_piece(tables, parse_prefix(root), tasks, probes, seed)]


def children(sides: tuple[int, ...], nodes: list[tuple[int, ...]], trusted: list[bool], *,
             tree: int) -> list[list[int] | None]:
    """:func:`foldfarm.kernel.children_of` for the map with working sides ``sides`` on tree ``tree`` (the checks ask)."""
    from foldfarm.kernel import children_of, tables_for

    return children_of(tables_for(tuple(sides), tree), nodes, trusted)


def worker_address() -> str | None:
    """The address of the Dask worker running this code, or None outside a worker."""
    from distributed import get_worker

    try:
        return get_worker().address
    except ValueError:
        return None


def warm_worker() -> None:
    """Load every compiled function a worker calls (counting, planning, the checks' children); a no-op once loaded."""
    from foldfarm.kernel import expand_many, prepare, probe, warm

    warm()
    tables = prepare("2x3")
    expand_many(tables, [()], 2)
    probe(tables, (), 2)


class ReadyWorker(WorkerPlugin):
    """Loads the kernel on every worker as it starts; lets a closing worker exit at once.

    Given to the local cluster's workers at construction (a worker forked
    from the fork server has the kernel already; one its nanny restarted
    after a crash loads it before it registers) and registered with the
    scheduler by every coordinator (so workers that join a cluster later
    load it too).  Registering it again is a no-op.
    """

    name = "foldfarm-ready-worker"
    idempotent = True

    def setup(self, worker) -> None:
        warm_worker()

    def teardown(self, worker) -> None:
        # Only on the way out: a plugin replaced on a live worker must not stop its collector.
        if worker.status in (Status.closing, Status.closing_gracefully, Status.closed):
            gc.freeze()

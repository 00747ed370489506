r"""The results store: every task of every run, checkpointed in SQLite or PostgreSQL.

A *run* counts the foldings of one map shape.  Its search tree is cut into
*tasks*, each named by a *prefix* (``/`` is the whole tree, ``/1/2/4`` the
subtree below the choices 1, 2, 4).  The store is the single source of truth
for which subtrees are counted, which are waiting, and what each one gave.

Actors
------

- The **driver** (one per run, the coordinator): plans the first tasks,
  hands pending tasks to workers, records what comes back, and finishes the
  run.  It is the only process that writes a run's tasks; the **lease**
  enforces that.
- The **workers** (Dask): receive ``(task id, prefix, budget)``, search that
  subtree, and return either an exact count or, when the budget runs out, a
  partial count plus the *remainder*: prefixes covering the unexplored rest.
  Workers never touch the store.
- The **checkers** and **readers** (status commands, audits, people with
  ``sqlite3``/``psql``): read at any time; audits add rows to ``audits``.

Shared state
------------

``runs``
    one row per run: shape, side order, state (``planned`` → ``running`` ⇄
    ``stopped`` → ``done`` → ``verified``/``suspect``), settings (JSON), the
    exact final total (decimal text: it may exceed 64 bits).
``tasks``
    one row per prefix of a run: state ``pending``, ``running``, ``done``,
    ``split`` or ``failed``; its count (exact for done, partial for split;
    NULL while open; at most 2**63-1); nodes, seconds, attempts, worker;
    ``parent_id`` of the split task it is a remainder of.
``audits``
    second computations of done tasks and whether they matched.
``leases``
    one row per driven run: holder, acquired and heartbeat times.
``run_tallies``
    one row per run: how many task numbers it has handed out (its task ids,
    see :mod:`foldfarm.store.models`), tasks per state, exact sums of done
    and partial counts, nodes, seconds, audits; changed in the same
    transaction as the tasks, read by the runs list and a run's progress.
``meta``, ``id_counters``
    schema version; next free ids of runs and audits.

The invariant
-------------

At every moment, for every run::

    done subtrees  ⊔  explored parts of split subtrees  ⊔  pending/running/failed subtrees
        = the whole search tree

so ``total = Σ count(done) + Σ partial count(split)`` once nothing is open,
with nothing counted twice and nothing lost.  It holds across crashes
because every change that moves part of the tree from one side to another is
ONE transaction:

- :meth:`Store.add_tasks` inserts a whole cover (streamed in chunks, one
  transaction);
- :meth:`Store.record_done` turns an open task done (count written once);
- :meth:`Store.record_split` turns an open task split AND inserts its
  remainder children (checked to be disjoint subtrees inside it) together;
  if anything fails midway, neither is stored.

A result is never overwritten: recording the same result again is a no-op
(``Recorded.SAME``), a different one is a :class:`ResultConflict` and leaves
the store as it was.  A split task never becomes done (its children already
cover the remainder).  So even a stale driver that outlived its lease cannot
corrupt a run: the worst it does is repeat a result or trigger a conflict.

Protocol of a driver
--------------------

1. ``run = store.create_run(shape, side_order, settings)``;
   ``store.add_tasks(run, prefixes)``;
2. ``store.acquire_lease(run, holder, ttl)``; ``store.set_run_state(run, "running")``;
   on resume: ``store.reset_running(run)`` (tasks the dead driver had out go back to pending);
3. loop: ``batch = store.next_pending(run, n)``; ``store.mark_running(ids, worker)``;
   per reply ``record_done`` / ``record_done_many`` / ``record_split`` / ``mark_failed``;
   ``store.heartbeat(run, holder)`` at least every ttl/3 seconds
   (:class:`LeaseLost` means stop at once);
4. when ``progress(run).open == 0``: ``store.finish_run(run, total)``;
   ``store.release_lease(run, holder)``.

Example
-------

::

    >>> import tempfile, os
    >>> folder = tempfile.TemporaryDirectory()
    >>> store = Store("sqlite:///" + os.path.join(folder.name, "tern.sqlite"))
    >>> run = store.create_run("2x3", "3x2", {"task_budget": 1000})
    >>> store.add_tasks(run, ["/1", "/2"])
    2
    >>> store.set_run_state(run, "running")
    >>> [t.prefix for t in store.next_pending(run, 10)]
    ['/1', '/2']
    >>> first, second = (t.id for t in store.next_pending(run, 10))
    >>> store.mark_running([first, second], "tcp://127.0.0.1:40000")
    2
    >>> store.record_done(first, 30, nodes=120, seconds=0.5)
    <Recorded.NEW: 'new'>
    >>> store.record_split(second, 10, 80, 0.4, None, ["/2/1", "/2/3"])
    <Recorded.NEW: 'new'>
    >>> p = store.progress(run)
    >>> p.tasks["pending"], p.counted
    (2, 40)
    >>> store.close(); folder.cleanup()

Keep a SQLite store on a local disk (file locking on network shares is
unreliable); use PostgreSQL when the driver may move between hosts.
"""

from foldfarm.store.core import RunInfo, Store
from foldfarm.store.errors import (
    LeaseHeld,
    LeaseLost,
    ResultConflict,
    SchemaVersionError,
    StoreError,
    StoreUnavailable,
    is_transient,
)
from foldfarm.store.leases import LeaseInfo
from foldfarm.store.models import SCHEMA_VERSION
from foldfarm.store.queries import (
    TASK_ORDERS,
    AuditRecord,
    BranchTotal,
    CheckRow,
    IdGap,
    Progress,
    RunSummary,
    TaskRecord,
    TaskStat,
)
from foldfarm.store.rules import Recorded
from foldfarm.store.tasks import BatchReport, TaskResult, TaskRow
from foldfarm.store.tallies import Tallies
from foldfarm.store.upgrade import upgrade_store
from foldfarm.store.urls import ENV_VAR, redact, resolve_store_url

__all__ = [
    "ENV_VAR",
    "SCHEMA_VERSION",
    "TASK_ORDERS",
    "AuditRecord",
    "BatchReport",
    "BranchTotal",
    "CheckRow",
    "IdGap",
    "LeaseHeld",
    "LeaseInfo",
    "LeaseLost",
    "Progress",
    "Recorded",
    "ResultConflict",
    "RunInfo",
    "RunSummary",
    "SchemaVersionError",
    "Store",
    "StoreError",
    "StoreUnavailable",
    "TaskRecord",
    "TaskResult",
    "TaskRow",
    "TaskStat",
    "Tallies",
    "is_transient",
    "redact",
    "resolve_store_url",
    "upgrade_store",
]

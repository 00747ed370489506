"""Read-only questions about runs, as plain functions of a connection.

Each question is answered from bounded work, whatever the size of the run:
the runs list and a run's progress read the tallies (:mod:`foldfarm.store.tallies`),
the longest, largest or latest tasks walk an index from its top
(``ix_tasks_run_count``, ``_seconds``, ``_finished``), and the listings that
read every task stream them.  Sums of counts over a scan (branch totals) are
exact on both back ends: SQLite's SUM fails past 2**63, so each count is
summed as ``count // 2**32`` and ``count % 2**32`` (each part stays far
below 2**63 for up to 2**31 tasks) and recombined in Python.
"""

from __future__ import annotations

import heapq
from dataclasses import dataclass, field
from datetime import datetime
from typing import Literal

from sqlalchemy import Connection, case, func, or_, select

from foldfarm.store.models import TASK_ID_SPAN, Audit, Run, RunTally, Task
from foldfarm.store.rules import OPEN_STATES, TASK_STATES
from foldfarm.store.tallies import join_sum as _join_sum
from foldfarm.store.tallies import read as _read_tallies
from foldfarm.store.tallies import split_sum as _split_sum


@dataclass(frozen=True)
class RunSummary:
    """One line of the runs list; ``counted`` = foldings in done and split tasks."""

    id: int
    shape: str
    state: str
    done: int
    pending: int
    running: int
    split: int
    failed: int
    counted: int
    total: int | None


@dataclass(frozen=True)
class Progress:
    """Where a run stands: tasks per state, foldings counted so far, nodes, core-seconds."""

    run_id: int
    shape: str
    state: str
    tasks: dict[str, int] = field(default_factory=dict)
    counted: int = 0
    nodes: int = 0
    core_seconds: float = 0.0

    @property
    def open(self) -> int:
        """Tasks not counted yet (pending, running or failed)."""
        return sum(self.tasks[s] for s in OPEN_STATES)


@dataclass(frozen=True)
class TaskStat:
    """A task with its measurements (``count`` is partial for split tasks)."""

    id: int
    prefix: str
    state: str
    count: int | None
    nodes: int | None
    seconds: float | None
    worker: str | None


@dataclass(frozen=True)
class BranchTotal:
    """Tasks below one first choice (``branch`` None: the root task itself)."""

    branch: int | None
    tasks: int
    open: int
    counted: int


def list_runs(conn: Connection) -> list[RunSummary]:
    """Every run, oldest first, with task numbers per state and foldings counted so far (its tallies row)."""
    stmt = (
        select(Run.id, Run.shape, Run.state, Run.total, *(getattr(RunTally, s) for s in TASK_STATES),
               RunTally.done_count, RunTally.split_count)
        .outerjoin(RunTally, RunTally.run_id == Run.id)
        .order_by(Run.id)
    )
    out = []
    for row in conn.execute(stmt):
        if row.done_count is None:
            _read_tallies(conn, row.id)  # says in one line that the row is missing
        per_state = {s: getattr(row, s) for s in TASK_STATES}
        counted = row.done_count + row.split_count
        out.append(RunSummary(row.id, row.shape, row.state, counted=counted, total=row.total, **per_state))
    return out


def progress(conn: Connection, run_id: int, shape: str, state: str) -> Progress:
    """Tasks per state, exact foldings counted, nodes visited and core-seconds of one run (its tallies row)."""
    t = _read_tallies(conn, run_id)
    return Progress(run_id, shape, state, dict(t.tasks), t.counted, t.nodes, t.seconds)


def top_tasks(conn: Connection, run_id: int, k: int, by: Literal["seconds", "count", "nodes"]) -> list[TaskStat]:
    """The ``k`` tasks of a run with the largest ``by`` (ties: lower id first); ``nodes`` has no index."""
    column = {"seconds": Task.seconds, "count": Task.count, "nodes": Task.nodes}[by]
    stmt = (
        select(Task.id, Task.prefix, Task.state, Task.count, Task.nodes, Task.seconds, Task.worker)
        .where(Task.run_id == run_id, column.is_not(None))
        .order_by(column.desc(), Task.id)  # the order of the partial index, which holds no NULL
        .limit(k)
    )
    return [TaskStat(*row) for row in conn.execute(stmt)]


def branch_totals(conn: Connection, run_id: int) -> list[BranchTotal]:
    """Tasks, open tasks and foldings counted per first prefix component, root first."""
    is_open = case((Task.state.in_(OPEN_STATES), 1), else_=0)
    stmt = (
        select(Task.branch, func.count(Task.id), func.sum(is_open), *_split_sum(Task.count))
        .where(Task.run_id == run_id)
        .group_by(Task.branch)
    )
    rows = [BranchTotal(b, n, int(o or 0), _join_sum(h, lo)) for b, n, o, h, lo in conn.execute(stmt)]
    return sorted(rows, key=lambda r: (r.branch is not None, r.branch or 0))


# -- task listings (status, tasks, export, checks) ---------------------------------------


@dataclass(frozen=True)
class TaskRecord:
    """Every stored column of a task; ``count`` is exact (partial for split tasks), times naive UTC."""

    id: int
    prefix: str
    state: str
    count: int | None
    nodes: int | None
    seconds: float | None
    attempts: int
    worker: str | None
    parent_id: int | None
    depth: int
    error: str | None
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None


@dataclass(frozen=True)
class CheckRow:
    """What the checks read of a task (see :mod:`foldfarm.check`)."""

    id: int
    prefix: str
    state: str
    count: int | None
    parent_id: int | None
    worker: str | None
    #: The key stored beside the prefix; a prefix edited after it was stored no longer matches it.
    sort_key: str | None = None


@dataclass(frozen=True)
class AuditRecord:
    """A second computation of a done task, beside the task's recorded count."""

    id: int
    task_id: int
    prefix: str
    recorded: int
    count: int
    matched: bool
    nodes: int | None
    seconds: float | None
    worker: str | None
    audited_at: datetime


@dataclass(frozen=True)
class IdGap:
    """Task ids ``first..last`` that no task of the store has, and the runs of the tasks on either side."""

    first: int
    last: int
    run_before: int | None
    run_after: int | None


#: Sort orders of :func:`task_listing`: ``time`` is seconds spent, longest first.
TASK_ORDERS = ("id", "time", "count", "finished")

_RECORD_COLUMNS = [getattr(Task, name) for name in TaskRecord.__dataclass_fields__]


def run_ids(run_id: int, legacy_ids: int = 0):
    """The run's tasks as a condition that lets a listing in id order walk the primary key.

    Every id of the run's own range belongs to the run, so in a store made
    as version 2 the range alone picks its tasks (said beside ``run_id =``,
    the planners preferred another index and sorted the run).  Tasks from
    before version 2 (ids up to ``legacy_ids``) need the run id too.
    """
    own = Task.id.between(run_id * TASK_ID_SPAN + 1, (run_id + 1) * TASK_ID_SPAN - 1)
    return (Task.run_id == run_id) & or_(Task.id <= legacy_ids, own) if legacy_ids else own


def task_records(run_id: int, legacy_ids: int = 0):
    """SELECT of every column of a run's tasks, in id order (stream it)."""
    return select(*_RECORD_COLUMNS).where(run_ids(run_id, legacy_ids)).order_by(Task.id)


def check_rows(run_id: int):
    """SELECT of :class:`CheckRow` columns of a run's tasks, in tree order (``sort_key``; stream it)."""
    columns = [getattr(Task, name) for name in CheckRow.__dataclass_fields__]
    return select(*columns).where(Task.run_id == run_id).order_by(Task.sort_key)


#: Column of each listing order but ``id``; its index ``ix_tasks_run_<name>`` holds the rows that have one.
_SORTED = {"time": Task.seconds, "count": Task.count, "finished": Task.finished_at}


def task_listing(
    conn: Connection,
    run_id: int,
    states: tuple[str, ...] = (),
    order: str = "id",
    limit: int | None = None,
    legacy_ids: int = 0,
) -> list[TaskRecord]:
    """A run's tasks in ``states`` (all when empty), sorted by ``order``, at most ``limit`` of them.

    ``time``, ``count`` and ``finished`` put the largest (latest) first and
    tasks without the value last; ties go to the lower id.  The tasks with a
    value come from the top of the column's index, then, if the limit is not
    reached, those without one in id order: two queries that each read
    about ``limit`` rows, where one ``ORDER BY ... NULLS LAST`` would sort
    the whole run.
    """
    where = [Task.run_id == run_id]
    if states:
        where.append(Task.state.in_(states))
    if order == "id":
        # With states: the (run_id, state, id) index; without: the primary key over the run's range.
        stmt = select(*_RECORD_COLUMNS).where(*(where if states else [run_ids(run_id, legacy_ids)]))
        return [TaskRecord(*row) for row in conn.execute(stmt.order_by(Task.id).limit(limit))]
    column = _SORTED[order]
    stmt = select(*_RECORD_COLUMNS).where(*where, column.is_not(None)).order_by(column.desc(), Task.id)
    out = [TaskRecord(*row) for row in conn.execute(stmt.limit(limit))]
    if limit is not None and len(out) == limit:
        return out
    # Done and split tasks always have all three values, so the rest are open tasks: per state from
    # the (run_id, state, id) index, merged by id.
    rest = limit if limit is None else limit - len(out)
    lists = []
    for state in OPEN_STATES:
        if not states or state in states:
            part = select(*_RECORD_COLUMNS).where(Task.run_id == run_id, Task.state == state, column.is_(None))
            lists.append([TaskRecord(*row) for row in conn.execute(part.order_by(Task.id).limit(rest))])
    return out + list(heapq.merge(*lists, key=lambda t: t.id))[:rest]


def audit_records(conn: Connection, run_id: int) -> list[AuditRecord]:
    """Every audit of a run's tasks, oldest first."""
    stmt = (
        select(Audit.id, Audit.task_id, Task.prefix, Task.count, Audit.count, Audit.matched, Audit.nodes,
               Audit.seconds, Audit.worker, Audit.audited_at)
        .join(Task, Task.id == Audit.task_id)
        .where(Task.run_id == run_id)
        .order_by(Audit.id)
    )
    return [AuditRecord(*row) for row in conn.execute(stmt)]


def runs_of_shape(conn: Connection, shape: str) -> list[tuple[int, str]]:
    """``(id, state)`` of the runs of exactly ``shape`` (canonical text), oldest first."""
    return [tuple(row) for row in conn.execute(select(Run.id, Run.state).where(Run.shape == shape).order_by(Run.id))]


def id_gaps(conn: Connection, first: int, last: int, legacy_ids: int = 0) -> list[IdGap]:
    """Ranges of ids in ``first..last`` that were handed out but no task has (any run).

    Ids handed out: ``1 .. legacy_ids`` (version 1 took them from one
    counter for all runs) and each run's own numbers ``1 .. tasks_numbered``
    (see :data:`TASK_ID_SPAN`).  Ids are never freed, so a gap is a deleted
    task; the runs on either side of a gap in a run's own range are that run.
    """
    gaps = _holes(conn, max(first, 1), min(last, legacy_ids)) if legacy_ids else []
    spans = (
        select(RunTally.run_id, RunTally.tasks_numbered)
        .where(RunTally.run_id.between(first // TASK_ID_SPAN, last // TASK_ID_SPAN))
        .order_by(RunTally.run_id)
    )
    for run_id, numbered in conn.execute(spans).all():
        base = run_id * TASK_ID_SPAN
        for gap in _holes(conn, max(first, base + 1), min(last, base + numbered)):
            gaps.append(IdGap(gap.first, gap.last, run_id, run_id))
    return gaps


def run_id_gaps(conn: Connection, run_id: int, legacy_ids: int = 0) -> list[IdGap]:
    """Ranges of the ids handed out to run ``run_id`` that no task has: its own range up to its last
    number, and the holes between its tasks from before version 2 (ids ``1 .. legacy_ids``)."""
    gaps = []
    if legacy_ids:
        low, high = conn.execute(
            select(func.min(Task.id), func.max(Task.id)).where(Task.run_id == run_id, Task.id <= legacy_ids)
        ).one()
        if low is not None:
            gaps = [g for g in _holes(conn, low, high) if run_id in (g.run_before, g.run_after)]
    numbered = _read_tallies(conn, run_id).tasks_numbered
    base = run_id * TASK_ID_SPAN
    gaps += [IdGap(g.first, g.last, run_id, run_id) for g in _holes(conn, base + 1, base + numbered)]
    return gaps


def _holes(conn: Connection, first: int, last: int) -> list[IdGap]:
    """Ranges of ids in ``first..last`` that no task has, with the runs of the tasks on either side.

    One COUNT answers the usual case (no hole); only then are the ids of the
    range read.
    """
    if last < first:
        return []
    present = conn.execute(select(func.count(Task.id)).where(Task.id.between(first, last))).scalar_one()
    if present == last - first + 1:
        return []
    stmt = select(Task.id, Task.run_id).where(Task.id.between(first - 1, last + 1)).order_by(Task.id)
    gaps = []
    previous: tuple[int, int | None] = (first - 1, None)
    for task_id, run_id in conn.execute(stmt):
        if task_id > previous[0] + 1:
            gaps.append(IdGap(previous[0] + 1, task_id - 1, previous[1], run_id))
        previous = (task_id, run_id)
    if previous[0] < last:
        gaps.append(IdGap(previous[0] + 1, last, previous[1], None))
    return gaps

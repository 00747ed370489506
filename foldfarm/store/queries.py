"""Read-only questions about runs, as plain functions of a connection.

Sums of counts are exact on both back ends: SQLite's SUM fails past 2**63,
so each count is summed as ``count // 2**32`` and ``count % 2**32`` (each
part stays far below 2**63 for up to 2**31 tasks) and recombined in Python.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from datetime import datetime
from typing import Literal

from sqlalchemy import Connection, case, func, select

from foldfarm.store.models import Audit, Run, Task
from foldfarm.store.rules import COUNTED_STATES, OPEN_STATES, TASK_STATES

_LOW = 2**32


def _split_sum(column):
    return func.sum(column // _LOW), func.sum(column % _LOW)


def _join_sum(high, low) -> int:
    return int(high or 0) * _LOW + int(low or 0)


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


def _state_rows(conn: Connection, *where):
    stmt = select(Task.run_id, Task.state, func.count(Task.id), *_split_sum(Task.count))
    return conn.execute(stmt.where(*where).group_by(Task.run_id, Task.state)).all()


def list_runs(conn: Connection) -> list[RunSummary]:
    """Every run, oldest first, with task numbers per state and foldings counted so far."""
    per_run: dict[int, dict[str, int]] = {}
    counted: dict[int, int] = {}
    for run_id, state, n, high, low in _state_rows(conn):
        per_run.setdefault(run_id, {})[state] = n
        if state in COUNTED_STATES:
            counted[run_id] = counted.get(run_id, 0) + _join_sum(high, low)
    out = []
    for run_id, shape, state, total in conn.execute(select(Run.id, Run.shape, Run.state, Run.total).order_by(Run.id)):
        n = per_run.get(run_id, {})
        per_state = {s: n.get(s, 0) for s in TASK_STATES}
        out.append(RunSummary(run_id, shape, state, counted=counted.get(run_id, 0), total=total, **per_state))
    return out


def progress(conn: Connection, run_id: int, shape: str, state: str) -> Progress:
    """Tasks per state, exact foldings counted, nodes visited and core-seconds of one run."""
    stmt = (
        select(
            Task.state,
            func.count(Task.id),
            *_split_sum(Task.count),
            *_split_sum(Task.nodes),
            func.sum(Task.seconds),
        )
        .where(Task.run_id == run_id)
        .group_by(Task.state)
    )
    tasks = dict.fromkeys(TASK_STATES, 0)
    counted = nodes = 0
    seconds = 0.0
    for task_state, n, c_high, c_low, n_high, n_low, secs in conn.execute(stmt):
        tasks[task_state] = n
        if task_state in COUNTED_STATES:
            counted += _join_sum(c_high, c_low)
        nodes += _join_sum(n_high, n_low)
        seconds += float(secs or 0.0)
    return Progress(run_id, shape, state, tasks, counted, nodes, seconds)


def top_tasks(conn: Connection, run_id: int, k: int, by: Literal["seconds", "count", "nodes"]) -> list[TaskStat]:
    """The ``k`` tasks of a run with the largest ``by`` (ties: lower id first)."""
    column = {"seconds": Task.seconds, "count": Task.count, "nodes": Task.nodes}[by]
    stmt = (
        select(Task.id, Task.prefix, Task.state, Task.count, Task.nodes, Task.seconds, Task.worker)
        .where(Task.run_id == run_id, column.is_not(None))
        .order_by(column.desc(), Task.id)
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


def task_records(run_id: int):
    """SELECT of every column of a run's tasks, in id order (stream it)."""
    return select(*_RECORD_COLUMNS).where(Task.run_id == run_id).order_by(Task.id)


def check_rows(run_id: int):
    """SELECT of :class:`CheckRow` columns of a run's tasks, in id order (stream it)."""
    columns = [getattr(Task, name) for name in CheckRow.__dataclass_fields__]
    return select(*columns).where(Task.run_id == run_id).order_by(Task.id)


def task_listing(
    conn: Connection, run_id: int, states: tuple[str, ...] = (), order: str = "id", limit: int | None = None
) -> list[TaskRecord]:
    """A run's tasks in ``states`` (all when empty), sorted by ``order``, at most ``limit`` of them.

    ``time``, ``count`` and ``finished`` put the largest (latest) first and
    tasks without the value last; ties go to the lower id.
    """
    keys = {
        "id": [Task.id],
        "time": [Task.seconds.desc().nulls_last(), Task.id],
        "count": [Task.count.desc().nulls_last(), Task.id],
        "finished": [Task.finished_at.desc().nulls_last(), Task.id],
    }[order]
    stmt = select(*_RECORD_COLUMNS).where(Task.run_id == run_id)
    if states:
        stmt = stmt.where(Task.state.in_(states))
    stmt = stmt.order_by(*keys)
    if limit is not None:
        stmt = stmt.limit(limit)
    return [TaskRecord(*row) for row in conn.execute(stmt)]


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


def id_gaps(conn: Connection, first: int, last: int) -> list[IdGap]:
    """Ranges of ids in ``first..last`` that no task has (any run).

    Ids are handed out consecutively and never freed, so a gap is a deleted
    task.  One COUNT answers the usual case (no gap); only then are the ids
    of the range read.
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

"""Read-only questions about runs, as plain functions of a connection.

Sums of counts are exact on both back ends: SQLite's SUM fails past 2**63,
so each count is summed as ``count // 2**32`` and ``count % 2**32`` (each
part stays far below 2**63 for up to 2**31 tasks) and recombined in Python.
"""

from __future__ import annotations

from dataclasses import dataclass, field
from typing import Literal

from sqlalchemy import Connection, case, func, select

from foldfarm.store.models import Run, Task
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

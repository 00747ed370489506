"""A run's tallies: kept by the transactions that change its tasks, checked by a recount.

Every write of :class:`foldfarm.store.Store` that changes a run's tasks (or
audits) gathers what it changed in a :class:`Delta` and, before it commits,
applies it to the run's ``run_tallies`` row with :func:`apply`: one SELECT
(which takes the row's lock) and one UPDATE per run and transaction, however
many tasks changed.  Sums are exact Python integers on the way (the row
keeps them as decimal text), so no sum ever rounds or overflows.

:func:`recount` computes the same numbers from the tasks themselves (a scan
of the run); the two agree unless someone changed the tables behind the
store's back.  Seconds are float sums, added in another order by the two,
so they agree to rounding only.

>>> d = Delta()
>>> d.move("pending", "running", 3); d.move("running", "done"); d.add_result("done", 24, 100, 0.5)
>>> dict(d.states), d.done_count, d.nodes
({'pending': -3, 'running': 2, 'done': 1}, 24, 100)
"""

from __future__ import annotations

from collections import Counter
from dataclasses import dataclass, field

from sqlalchemy import Connection, case, func, select, update

from foldfarm.store.errors import StoreError
from foldfarm.store.models import TASK_ID_SPAN, Audit, RunTally, Task
from foldfarm.store.rules import TASK_STATES

_LOW = 2**32


def split_sum(column):
    """SUM of ``column`` in two parts that stay far below 2**63 (SQLite's SUM fails past it)."""
    return func.sum(column // _LOW), func.sum(column % _LOW)


def join_sum(high, low) -> int:
    """The exact sum from the two parts of :func:`split_sum`."""
    return int(high or 0) * _LOW + int(low or 0)


@dataclass(frozen=True)
class Tallies:
    """A run's numbers: ``tasks`` per state, exact sums, ``tasks_numbered`` (see :data:`TASK_ID_SPAN`)."""

    run_id: int
    tasks_numbered: int
    tasks: dict[str, int]
    done_count: int
    split_count: int
    nodes: int
    seconds: float
    audits: int
    mismatches: int

    @property
    def counted(self) -> int:
        """Foldings counted so far: done counts plus split partial counts."""
        return self.done_count + self.split_count


@dataclass
class Delta:
    """What one transaction changes in one run's tallies."""

    states: Counter = field(default_factory=Counter)
    numbered: int = 0
    done_count: int = 0
    split_count: int = 0
    nodes: int = 0
    seconds: float = 0.0
    audits: int = 0
    mismatches: int = 0

    def move(self, old: str, new: str, n: int = 1) -> None:
        """``n`` tasks went from state ``old`` to ``new``."""
        if old != new and n:
            self.states[old] -= n
            self.states[new] += n

    def add_result(self, state: str, count: int, nodes: int, seconds: float) -> None:
        """A task became ``done`` (exact count) or ``split`` (partial count) with these measurements."""
        if state == "done":
            self.done_count += count
        else:
            self.split_count += count
        self.nodes += nodes
        self.seconds += seconds

    def __bool__(self) -> bool:
        return bool(self.numbered or self.audits or any(self.states.values()) or self.done_count
                    or self.split_count or self.nodes or self.seconds)


def initial(run_id: int) -> dict:
    """The tallies row of a new run."""
    return {"run_id": run_id, "tasks_numbered": 0, **dict.fromkeys(TASK_STATES, 0), "done_count": 0,
            "split_count": 0, "nodes": 0, "seconds": 0.0, "audits": 0, "mismatches": 0}


_COLUMNS = [getattr(RunTally, name) for name in initial(0)]


def _tallies(row) -> Tallies:
    return Tallies(row.run_id, row.tasks_numbered, {s: getattr(row, s) for s in TASK_STATES}, row.done_count,
                   row.split_count, row.nodes, row.seconds, row.audits, row.mismatches)


def read(conn: Connection, run_id: int, lock: bool = False) -> Tallies:
    """The tallies row of ``run_id`` (locked for this transaction with ``lock``)."""
    stmt = select(*_COLUMNS).where(RunTally.run_id == run_id)
    row = conn.execute(stmt.with_for_update() if lock else stmt).one_or_none()
    if row is None:
        raise StoreError(f"run {run_id} has no tallies row: the store was changed by hand")
    return _tallies(row)


def apply(conn: Connection, run_id: int, delta: Delta) -> Tallies:
    """Add ``delta`` to the run's row; return the row as it was before (its lock is held until commit)."""
    before = read(conn, run_id, lock=True)
    if not delta:
        return before
    values = {state: before.tasks[state] + delta.states[state] for state in TASK_STATES if delta.states[state]}
    if any(values[state] < 0 for state in values):
        raise StoreError(f"the tallies of run {run_id} would go negative: the store was changed by hand")
    numbered = before.tasks_numbered + delta.numbered
    if numbered >= TASK_ID_SPAN:
        raise StoreError(f"run {run_id} would have more than {TASK_ID_SPAN - 1} tasks, the most a run may have")
    values.update(
        tasks_numbered=numbered,
        done_count=before.done_count + delta.done_count,
        split_count=before.split_count + delta.split_count,
        nodes=before.nodes + delta.nodes,
        seconds=before.seconds + delta.seconds,
        audits=before.audits + delta.audits,
        mismatches=before.mismatches + delta.mismatches,
    )
    conn.execute(update(RunTally).where(RunTally.run_id == run_id).values(**values))
    return before


def apply_all(conn: Connection, deltas: dict[int, Delta]) -> None:
    """:func:`apply` for several runs, in run order (so two transactions lock rows in the same order)."""
    for run_id in sorted(deltas):
        apply(conn, run_id, deltas[run_id])


def recount(conn: Connection, run_id: int, legacy_ids: int = 0) -> Tallies:
    """The tallies of ``run_id`` counted from its tasks and audits (a scan of the run).

    ``tasks_numbered`` is recounted as the run's tasks with an id in its own
    range; ``legacy_ids`` is the highest id given out before version 2.
    """
    tasks = dict.fromkeys(TASK_STATES, 0)
    sums = {"done": 0, "split": 0}
    nodes = 0
    seconds = 0.0
    stmt = (
        select(Task.state, func.count(Task.id), *split_sum(Task.count), *split_sum(Task.nodes), func.sum(Task.seconds))
        .where(Task.run_id == run_id)
        .group_by(Task.state)
    )
    for state, n, c_high, c_low, n_high, n_low, secs in conn.execute(stmt):
        tasks[state] = n
        if state in sums:
            sums[state] = join_sum(c_high, c_low)
            nodes += join_sum(n_high, n_low)
            seconds += float(secs or 0.0)
    own = conn.execute(
        select(func.count(Task.id)).where(Task.run_id == run_id, Task.id > max(legacy_ids, run_id * TASK_ID_SPAN))
    ).scalar_one()
    audits, mismatches = conn.execute(
        select(func.count(Audit.id), func.sum(case((Audit.matched.is_(False), 1), else_=0)))
        .join(Task, Task.id == Audit.task_id)
        .where(Task.run_id == run_id)
    ).one()
    return Tallies(run_id, own, tasks, sums["done"], sums["split"], nodes, seconds, int(audits), int(mismatches or 0))

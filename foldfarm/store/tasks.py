"""Task writes of the protocol: planning, dispatch, results, splits.

Each public method is one transaction (see :mod:`foldfarm.store` for the invariant).
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Iterator
from dataclasses import dataclass, field
from datetime import datetime
from typing import Any, NamedTuple

from sqlalchemy import bindparam, or_, select, update

from foldfarm.store import tallies
from foldfarm.store.base import INSERT_CHUNK, StoreBase, chunks, worker_address
from foldfarm.store.errors import ResultConflict, StoreError
from foldfarm.store.models import Task
from foldfarm.store.prefixes import check_remainder
from foldfarm.store.rules import (
    OPEN_STATES,
    Recorded,
    Verdict,
    check_int64,
    check_seconds,
    judge_done,
    judge_split,
    utc,
)

log = logging.getLogger("foldfarm.store")

#: Results per transaction in :meth:`Store.record_done_many`.
DONE_BATCH = 1_000
#: Ids per ``IN (...)`` list, well below SQLite's bound-parameter limit.
_ID_CHUNK = 1_000
_MAX_TEXT = 4000


class TaskRow(NamedTuple):
    """A task to hand to a worker."""

    id: int
    prefix: str


@dataclass(frozen=True)
class TaskResult:
    """A finished task: exact ``count`` of foldings, ``nodes`` visited, ``seconds`` on one core."""

    task_id: int
    count: int
    nodes: int
    seconds: float
    worker: str | None = None


@dataclass
class BatchReport:
    """What :meth:`Store.record_done_many` did: new results, identical repeats, conflicts (not written)."""

    new: int = 0
    same: int = 0
    conflicts: list[ResultConflict] = field(default_factory=list)


class TaskStore(StoreBase):
    """The task half of :class:`foldfarm.store.Store`."""

    def add_tasks(
        self,
        run_id: int,
        prefixes: Iterable[str],
        parent_id: int | None = None,
        *,
        chunk_size: int = INSERT_CHUNK,
        now: datetime | None = None,
    ) -> int:
        """Add pending tasks; return how many.

        ``prefixes`` may be any iterable (a generator of millions is fine): it
        is consumed ``chunk_size`` at a time, each chunk one multi-row insert,
        all in ONE transaction, so a crash never leaves part of a cover.  The
        prefixes must be disjoint subtrees; with ``parent_id`` they must lie
        inside that task's prefix.
        """
        with self._write("adding tasks") as conn:
            self._run(conn, run_id)
            parent_prefix = None
            if parent_id is not None:
                parent = self._task(conn, parent_id)
                if parent.run_id != run_id:
                    raise StoreError(f"task {parent_id} belongs to run {parent.run_id}, not run {run_id}")
                parent_prefix = parent.prefix
            return self._insert_tasks(conn, run_id, prefixes, parent_id, parent_prefix, utc(now), chunk_size)

    def next_pending(self, run_id: int, limit: int) -> list[TaskRow]:
        """Up to ``limit`` pending tasks of a run, oldest (lowest id) first."""
        stmt = (
            select(Task.id, Task.prefix)
            .where(Task.run_id == run_id, Task.state == "pending")
            .order_by(Task.id)
            .limit(limit)
        )
        with self._read("listing pending tasks") as conn:
            return [TaskRow(*row) for row in conn.execute(stmt)]

    def mark_running(self, task_ids: Iterable[int], worker: str | None = None, *, now: datetime | None = None) -> int:
        """Hand tasks to a worker: open tasks become ``running``, attempts + 1.

        Tasks already done or split are left alone.  Returns how many changed.
        """
        worker = worker_address(worker)
        now = utc(now)
        changed = 0
        deltas: dict[int, tallies.Delta] = {}
        with self._write("marking tasks running") as conn:
            for chunk in chunks(task_ids, _ID_CHUNK):
                # Read (and lock) the rows first: the tallies need the states they leave.
                rows = conn.execute(
                    select(Task.id, Task.run_id, Task.state)
                    .where(Task.id.in_(chunk), Task.state.in_(OPEN_STATES))
                    .order_by(Task.id)
                    .with_for_update()
                ).all()
                if not rows:
                    continue
                stmt = (
                    update(Task)
                    .where(Task.id.in_([row.id for row in rows]))
                    .values(state="running", attempts=Task.attempts + 1, started_at=now, worker=worker)
                )
                changed += conn.execute(stmt).rowcount
                for row in rows:
                    deltas.setdefault(row.run_id, tallies.Delta()).move(row.state, "running")
            tallies.apply_all(conn, deltas)
        return changed

    def reset_running(self, run_id: int, *, failed: bool = False) -> int:
        """Return a run's ``running`` tasks (and ``failed`` ones if asked) to ``pending``; how many.

        Used on resume: tasks a dead driver had out run again, and so do
        tasks that failed last time (the cause may be gone).
        """
        states = ("running", "failed") if failed else ("running",)
        delta = tallies.Delta()
        changed = 0
        with self._write("resetting running tasks") as conn:
            self._run(conn, run_id)
            for state in states:  # one state at a time: the tallies need each one's number
                stmt = update(Task).where(Task.run_id == run_id, Task.state == state).values(state="pending")
                n = conn.execute(stmt).rowcount
                delta.move(state, "pending", n)
                changed += n
            tallies.apply(conn, run_id, delta)
        return changed

    def mark_failed(self, task_id: int, error: str, *, now: datetime | None = None) -> bool:
        """Mark an open task ``failed`` with a message; False (no change) if it is done or split."""
        message = str(error)[:_MAX_TEXT]
        with self._write("marking a task failed") as conn:
            task = self._task(conn, task_id)
            if task.state not in OPEN_STATES:
                return False
            stmt = update(Task).where(Task.id == task_id).values(state="failed", error=message, finished_at=utc(now))
            conn.execute(stmt)
            delta = tallies.Delta()
            delta.move(task.state, "failed")
            tallies.apply(conn, task.run_id, delta)
            return True

    def record_done(
        self,
        task_id: int,
        count: int,
        nodes: int,
        seconds: float,
        worker: str | None = None,
        *,
        now: datetime | None = None,
    ) -> Recorded:
        """Record the exact ``count`` of a task's subtree.

        Returns ``Recorded.NEW``, or ``Recorded.SAME`` when the identical count
        is already stored.  Raises :class:`ResultConflict` (nothing written)
        when the task is done with another count or is split.
        """
        report = self.record_done_many([TaskResult(task_id, count, nodes, seconds, worker)], now=now)
        if report.conflicts:
            raise report.conflicts[0]
        return Recorded.NEW if report.new else Recorded.SAME

    def record_done_many(
        self, results: Iterable[TaskResult], *, batch_size: int = DONE_BATCH, now: datetime | None = None
    ) -> BatchReport:
        """Record many done results, one transaction per ``batch_size`` results.

        Conflicting results are returned in the report, not raised, so they do
        not hold back the rest; they are never written.  An unknown task id or
        an out-of-range number fails its whole batch (earlier batches stay).
        """
        now = utc(now)
        report = BatchReport()
        for batch in chunks(results, batch_size):
            self._record_done_batch(batch, now, report)
        return report

    def _record_done_batch(self, batch: list[TaskResult], now: datetime, report: BatchReport) -> None:
        for r in batch:
            check_int64(r.count, f"count of task {r.task_id}")
            check_int64(r.nodes, f"nodes of task {r.task_id}")
            check_seconds(r.seconds, f"seconds of task {r.task_id}")
            worker_address(r.worker)
        ids = sorted({r.task_id for r in batch})
        # Locks taken in id order, so two overlapping batches cannot deadlock on PostgreSQL.
        stmt = (
            select(Task.id, Task.run_id, Task.prefix, Task.state, Task.count)
            .where(Task.id.in_(ids))
            .order_by(Task.id)
            .with_for_update()
        )
        updates: list[dict[str, Any]] = []
        new = same = 0
        conflicts = []
        deltas: dict[int, tallies.Delta] = {}
        with self._write("recording results") as conn:
            current = {row.id: row for row in conn.execute(stmt)}
            seen: dict[int, int] = {}  # results earlier in this batch
            for r in batch:
                row = current.get(r.task_id)
                if row is None:
                    raise StoreError(f"no task {r.task_id} in {self.display_url}")
                count = int(r.count)
                if r.task_id in seen:
                    state, stored = "done", seen[r.task_id]
                else:
                    state, stored = row.state, row.count
                verdict = judge_done(state, stored, count)
                if verdict is Verdict.WRITE:
                    seen[r.task_id] = count
                    delta = deltas.setdefault(row.run_id, tallies.Delta())
                    delta.move(state, "done")
                    delta.add_result("done", count, int(r.nodes), float(r.seconds))
                    updates.append(
                        {
                            "b_id": r.task_id,
                            "b_count": count,
                            "b_nodes": int(r.nodes),
                            "b_seconds": float(r.seconds),
                            "b_worker": r.worker,
                        }
                    )
                    new += 1
                elif verdict is Verdict.SAME:
                    same += 1
                else:
                    conflicts.append(ResultConflict(r.task_id, row.prefix, _describe(state, stored), f"count {count}"))
            if updates:
                conn.execute(_DONE_UPDATE.values(finished_at=now), updates)
                tallies.apply_all(conn, deltas)
        report.new += new
        report.same += same
        report.conflicts.extend(conflicts)
        for conflict in conflicts:
            log.warning("%s", conflict)

    def record_split(
        self,
        task_id: int,
        partial_count: int,
        nodes: int,
        seconds: float,
        worker: str | None,
        children: Iterable[str],
        *,
        now: datetime | None = None,
    ) -> Recorded:
        """Record that a task's budget ran out: its partial count and its remainder.

        In one transaction the task becomes ``split`` with ``partial_count``
        and each prefix of ``children`` becomes a pending task whose parent is
        this task.  The children must be disjoint subtrees inside the task's
        prefix.  Returns ``Recorded.NEW``, or ``Recorded.SAME`` if this very
        split is already stored; raises :class:`ResultConflict` otherwise.
        """
        partial = check_int64(partial_count, f"partial count of task {task_id}")
        nodes = check_int64(nodes, f"nodes of task {task_id}")
        seconds = check_seconds(seconds, f"seconds of task {task_id}")
        worker = worker_address(worker)
        children = list(children)
        now = utc(now)
        with self._write("recording a split") as conn:
            task = self._task(conn, task_id)
            children = check_remainder(task.prefix, children)
            stored_children: frozenset[str] = frozenset()
            if task.state == "split":
                stored_children = frozenset(conn.scalars(select(Task.prefix).where(Task.parent_id == task_id)))
            verdict = judge_split(task.state, task.count, stored_children, partial, frozenset(children))
            if verdict is Verdict.SAME:
                return Recorded.SAME
            if verdict is Verdict.CONFLICT:
                offered = f"split with partial count {partial} and {len(children)} remainder task(s)"
                stored = _describe(task.state, task.count, len(stored_children))
                raise ResultConflict(task_id, task.prefix, stored, offered)
            conn.execute(
                update(Task)
                .where(Task.id == task_id)
                .values(state="split", count=partial, nodes=nodes, seconds=seconds, worker=worker, finished_at=now)
            )
            delta = tallies.Delta()
            delta.move(task.state, "split")
            delta.add_result("split", partial, nodes, seconds)
            self._insert_tasks(conn, task.run_id, children, task_id, task.prefix, now, delta=delta)
        return Recorded.NEW

    def done_tasks(self, run_id: int) -> Iterator[tuple[str, int]]:
        """Stream ``(prefix, count)`` of a run's done tasks in id order (for checks)."""
        with self._read("reading a run") as conn:
            self._run(conn, run_id)  # a missing run fails now, not at the first next()
        stmt = select(Task.prefix, Task.count).where(Task.run_id == run_id, Task.state == "done").order_by(Task.id)
        return self._stream(stmt)

    def _stream(self, stmt) -> Iterator[tuple]:
        with self._read("streaming tasks") as conn:
            for row in conn.execution_options(yield_per=INSERT_CHUNK).execute(stmt):
                yield tuple(row)


def _describe(state: str, count: int | None, children: int | None = None) -> str:
    if state == "done":
        return f"done with count {count}"
    if state == "split":
        tail = f" and {children} remainder task(s)" if children is not None else ""
        return f"split with partial count {count}{tail}"
    return state


# One statement executed with a list of parameter sets (executemany).  The
# state condition is a second guard: the batch holds the rows locked anyway.
# (Spelled with OR: an IN list cannot be expanded inside an executemany.)
_DONE_UPDATE = (
    update(Task)
    .where(Task.id == bindparam("b_id"), or_(*(Task.state == state for state in OPEN_STATES)))
    .values(
        state="done",
        count=bindparam("b_count"),
        nodes=bindparam("b_nodes"),
        seconds=bindparam("b_seconds"),
        worker=bindparam("b_worker"),
        error=None,
    )
)

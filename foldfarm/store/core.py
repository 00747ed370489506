"""The :class:`Store`: every write of the protocol as one explicit transaction.

See the package docstring (:mod:`foldfarm.store`) for actors, shared state and
the invariant these methods keep.
"""

from __future__ import annotations

import logging
from collections.abc import Iterable, Iterator
from dataclasses import dataclass
from datetime import datetime
from typing import Any

from sqlalchemy import case, func, insert, select, update
from sqlalchemy.exc import IntegrityError, SQLAlchemyError

from foldfarm.prefix import PrefixError, parse_prefix, sort_key
from foldfarm.store import leases, queries
from foldfarm.store.base import short_text, worker_address
from foldfarm.store.errors import StoreError
from foldfarm.store.leases import LeaseInfo
from foldfarm.store.models import Audit, Run, Task, check_json
from foldfarm.store.rules import (
    OPEN_STATES,
    TASK_STATES,
    check_int64,
    check_run_transition,
    check_seconds,
    check_total,
    utc,
)
from foldfarm.store.tasks import TaskStore

log = logging.getLogger("foldfarm.store")


@dataclass(frozen=True)
class RunInfo:
    """A run as stored; ``total`` is exact (None until finished); times naive UTC."""

    id: int
    shape: str
    side_order: str
    state: str
    settings: dict
    created_at: datetime
    finished_at: datetime | None
    total: int | None
    verification: str
    certificate: str | None
    checks: dict | None


class Store(TaskStore):
    """A results store at a SQLite file or PostgreSQL database.

    ``Store(url)`` resolves ``url`` (see :func:`resolve_store_url`), connects,
    creates the tables in an empty database and checks the schema version of
    an existing one.  Every method is one transaction; every failure is a
    :class:`StoreError` with a one-line message naming the store by its
    redacted URL.  Methods taking ``now`` use it (naive or aware datetime,
    default: the current time) instead of the clock, so tests need not sleep.
    """

    # -- runs ---------------------------------------------------------------

    def create_run(self, shape: str, side_order: str, settings: dict, *, now: datetime | None = None) -> int:
        """Add a run in state ``planned``; return its id.  ``settings`` is any JSON object."""
        short_text(shape, "shape", 64)
        short_text(side_order, "side order", 64)
        check_json(settings, "run settings")
        with self._write("creating a run") as conn:
            run_id = self._allocate_ids(conn, "runs", 1)
            conn.execute(
                insert(Run).values(
                    id=run_id,
                    shape=shape,
                    side_order=side_order,
                    state="planned",
                    settings=settings,
                    created_at=utc(now),
                    verification="unchecked",
                )
            )
        log.info("created run %d (%s) in %s", run_id, shape, self.display_url)
        return run_id

    def get_run(self, run_id: int) -> RunInfo:
        """The run ``run_id``; :class:`StoreError` "no run N in <url>" if there is none."""
        with self._read("reading a run") as conn:
            row = self._run(conn, run_id)
        return RunInfo(*(row._mapping[name] for name in RunInfo.__dataclass_fields__))

    def set_run_state(self, run_id: int, state: str) -> None:
        """Move a run to ``state`` along the allowed transitions (see :data:`rules.RUN_TRANSITIONS`).

        ``done`` is reached through :meth:`finish_run`, ``verified``/``suspect``
        through :meth:`set_verification` or directly here.
        """
        if state == "done":
            raise StoreError(f"use finish_run to mark run {run_id} done: it records the total")
        with self._write("changing a run's state") as conn:
            run = self._run(conn, run_id, lock=True)
            check_run_transition(run_id, run.state, state)
            conn.execute(update(Run).where(Run.id == run_id).values(state=state))

    def finish_run(
        self,
        run_id: int,
        total: int,
        *,
        certificate: str | None = None,
        checks: dict | None = None,
        now: datetime | None = None,
    ) -> None:
        """Mark a running run ``done`` with its exact ``total`` (any size).

        Refused while any task is pending, running or failed.
        """
        total = check_total(total)
        if checks is not None:
            check_json(checks, "checks outcome")
        with self._write("finishing a run") as conn:
            run = self._run(conn, run_id, lock=True)
            check_run_transition(run_id, run.state, "done")
            still_open = conn.execute(
                select(func.count(Task.id)).where(Task.run_id == run_id, Task.state.in_(OPEN_STATES))
            ).scalar_one()
            if still_open:
                raise StoreError(f"run {run_id} still has {still_open} open task(s); finish it once all are counted")
            values: dict[str, Any] = {"state": "done", "total": total, "finished_at": utc(now)}
            if certificate is not None:
                values["certificate"] = short_text(certificate, "certificate digest", 128)
            if checks is not None:
                values["checks"] = checks
            conn.execute(update(Run).where(Run.id == run_id).values(**values))

    def set_verification(
        self, run_id: int, passed: bool, *, checks: dict | None = None, certificate: str | None = None
    ) -> None:
        """Record the outcome of a finished run's checks: state ``verified`` or ``suspect``."""
        verification = "passed" if passed else "failed"
        if checks is not None:
            check_json(checks, "checks outcome")
        with self._write("recording verification") as conn:
            run = self._run(conn, run_id, lock=True)
            state = "verified" if passed else "suspect"
            check_run_transition(run_id, run.state, state)
            values: dict[str, Any] = {"state": state, "verification": verification}
            if checks is not None:
                values["checks"] = checks
            if certificate is not None:
                values["certificate"] = short_text(certificate, "certificate digest", 128)
            conn.execute(update(Run).where(Run.id == run_id).values(**values))

    # -- audits -------------------------------------------------------------

    def record_audit(
        self,
        task_id: int,
        count: int,
        *,
        nodes: int | None = None,
        seconds: float | None = None,
        worker: str | None = None,
        now: datetime | None = None,
    ) -> bool:
        """Store a second computation of a done task; return whether its count matched."""
        count = check_int64(count, f"audited count of task {task_id}")
        nodes = None if nodes is None else check_int64(nodes, f"audited nodes of task {task_id}")
        seconds = None if seconds is None else check_seconds(seconds, f"audit seconds of task {task_id}")
        worker = worker_address(worker)
        with self._write("recording an audit") as conn:
            task = self._task(conn, task_id)
            if task.state != "done":
                raise StoreError(f"task {task_id} ({task.prefix}) is {task.state}; only done tasks can be audited")
            matched = task.count == count
            audit_id = self._allocate_ids(conn, "audits", 1)
            conn.execute(
                insert(Audit).values(
                    id=audit_id,
                    task_id=task_id,
                    count=count,
                    nodes=nodes,
                    seconds=seconds,
                    worker=worker,
                    audited_at=utc(now),
                    matched=matched,
                )
            )
        if not matched:
            log.warning("audit of task %d (%s): %d, recorded %d", task_id, task.prefix, count, task.count)
        return matched

    def audit_summary(self, run_id: int) -> tuple[int, int]:
        """``(audits, mismatches)`` recorded for a run's tasks."""
        mismatched = func.sum(case((Audit.matched.is_(False), 1), else_=0))
        stmt = (
            select(func.count(Audit.id), mismatched).join(Task, Task.id == Audit.task_id).where(Task.run_id == run_id)
        )
        with self._read("summarising audits") as conn:
            self._run(conn, run_id)
            n, bad = conn.execute(stmt).one()
        return int(n), int(bad or 0)

    # -- lease --------------------------------------------------------------

    def acquire_lease(
        self, run_id: int, holder: str, ttl_seconds: float, *, force: bool = False, now: datetime | None = None
    ) -> LeaseInfo:
        """Become the driver of a run (or renew if ``holder`` already is).

        Raises :class:`LeaseHeld` naming the holder while another driver's
        heartbeat is at most ``ttl_seconds`` old; ``force=True`` takes over
        anyway (only when that driver is known to be gone).
        """
        check_seconds(ttl_seconds, "lease TTL")
        leases.check_holder(holder)
        now = utc(now)
        for attempt in (1, 2):
            try:
                with self._writer.begin() as conn:
                    self._run(conn, run_id)
                    return leases.acquire(conn, run_id, holder, ttl_seconds, now, force)
            except IntegrityError:
                # Two drivers inserted the first lease row at once; the retry sees the winner.
                if attempt == 2:
                    raise StoreError(f"store {self.display_url}: could not take the lease of run {run_id}") from None
            except SQLAlchemyError as exc:
                raise self._fail(exc, "taking a lease") from None
        raise AssertionError("unreachable")

    def heartbeat(self, run_id: int, holder: str, *, now: datetime | None = None) -> LeaseInfo:
        """Renew the lease; raises :class:`LeaseLost` if ``holder`` no longer has it."""
        with self._write("renewing a lease") as conn:
            return leases.beat(conn, run_id, holder, utc(now))

    def release_lease(self, run_id: int, holder: str) -> bool:
        """Give up the lease; False if ``holder`` did not hold it."""
        with self._write("releasing a lease") as conn:
            return leases.release(conn, run_id, holder)

    def lease(self, run_id: int) -> LeaseInfo | None:
        """The run's current lease row (live or expired), or None."""
        with self._read("reading a lease") as conn:
            return leases.current(conn, run_id)

    # -- queries ------------------------------------------------------------

    def list_runs(self) -> list[queries.RunSummary]:
        """Every run with tasks per state and foldings counted so far."""
        with self._read("listing runs") as conn:
            return queries.list_runs(conn)

    def progress(self, run_id: int) -> queries.Progress:
        """Tasks per state, exact foldings counted, nodes and core-seconds of a run."""
        with self._read("reading progress") as conn:
            run = self._run(conn, run_id)
            return queries.progress(conn, run_id, run.shape, run.state)

    def slowest_tasks(self, run_id: int, k: int = 10) -> list[queries.TaskStat]:
        """The ``k`` tasks that took the most seconds."""
        with self._read("finding slow tasks") as conn:
            self._run(conn, run_id)
            return queries.top_tasks(conn, run_id, k, "seconds")

    def largest_tasks(self, run_id: int, k: int = 10) -> list[queries.TaskStat]:
        """The ``k`` tasks with the largest count (partial counts for split tasks)."""
        with self._read("finding large tasks") as conn:
            self._run(conn, run_id)
            return queries.top_tasks(conn, run_id, k, "count")

    def branch_totals(self, run_id: int) -> list[queries.BranchTotal]:
        """Tasks, open tasks and foldings counted per depth-1 branch (root task first)."""
        with self._read("totalling branches") as conn:
            self._run(conn, run_id)
            return queries.branch_totals(conn, run_id)

    def tasks(
        self, run_id: int, states: Iterable[str] = (), order: str = "id", limit: int | None = None
    ) -> list[queries.TaskRecord]:
        """A run's tasks in ``states`` (all when empty), sorted by ``order`` (one of
        :data:`queries.TASK_ORDERS`; largest first except ``id``), at most ``limit``."""
        states = tuple(states)
        for state in states:
            if state not in TASK_STATES:
                raise StoreError(f"{state!r} is not a task state; use one of {', '.join(TASK_STATES)}")
        if order not in queries.TASK_ORDERS:
            raise StoreError(f"cannot sort tasks by {order!r}; use one of {', '.join(queries.TASK_ORDERS)}")
        if limit is not None and limit < 0:
            raise StoreError(f"a task limit must be 0 or more, got {limit}")
        with self._read("listing tasks") as conn:
            self._run(conn, run_id)
            return queries.task_listing(conn, run_id, states, order, limit)

    def iter_tasks(self, run_id: int) -> Iterator[queries.TaskRecord]:
        """Stream every task of a run with all its columns, in id order (for exports)."""
        self.get_run(run_id)  # a missing run fails now, not at the first next()
        return (queries.TaskRecord(*row) for row in self._stream(queries.task_records(run_id)))

    def check_rows(self, run_id: int) -> Iterator[queries.CheckRow]:
        """Stream ``(id, prefix, state, count, parent_id, worker)`` of a run's tasks in tree order: tuple order
        of the prefixes (:func:`foldfarm.prefix.sort_key`), what :mod:`foldfarm.check` reads."""
        self.get_run(run_id)
        return _in_tree_order_temporary(queries.CheckRow(*row) for row in self._stream(queries.check_rows(run_id)))

    def audits(self, run_id: int) -> list[queries.AuditRecord]:
        """Every audit of a run's tasks, oldest first, beside the recorded counts."""
        with self._read("reading audits") as conn:
            self._run(conn, run_id)
            return queries.audit_records(conn, run_id)

    def runs_of_shape(self, shape: str) -> list[tuple[int, str]]:
        """``(id, state)`` of every run of exactly ``shape`` (canonical text), oldest first."""
        with self._read("finding runs") as conn:
            return queries.runs_of_shape(conn, shape)

    def task_id_gaps(self, first: int, last: int) -> list[queries.IdGap]:
        """Ranges of task ids in ``first..last`` held by no task of any run (deleted tasks)."""
        with self._read("looking for deleted tasks") as conn:
            return queries.id_gaps(conn, first, last)


def _in_tree_order_temporary(rows: Iterator[queries.CheckRow]) -> Iterator[queries.CheckRow]:
    """TEMPORARY (issue 13): rows read in id order, sorted here by :func:`foldfarm.prefix.sort_key`.

    Holds every row of the run (O(tasks) memory); to be replaced by the
    indexed ``ORDER BY sort_key`` of store schema v2, which streams.  Rows
    whose prefix does not parse (tampering) come first, in id order: the
    checks report them wherever they come.
    """
    def key(row: queries.CheckRow) -> tuple[int, str]:
        try:
            return 1, sort_key(parse_prefix(row.prefix))
        except PrefixError:
            return 0, ""

    return iter(sorted(rows, key=key))

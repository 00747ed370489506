"""Tables of the store as SQLAlchemy 2 typed models.

``results_schema.sql`` at the top of the repository is the same schema as
portable DDL; a test creates one store from each and compares them.  Keep
both in step and bump :data:`SCHEMA_VERSION` when they change.

Times are naive UTC.  Ids are allocated by the store, not by the database
(SQLite and PostgreSQL share no auto-increment syntax).

Task ids.  A run numbers its own tasks: task ``k`` (1, 2, ...) of run ``r``
has the id ``r * TASK_ID_SPAN + k`` (run 3's first task is 30000000001), and
the run's row in ``run_tallies`` holds how many numbers it has handed out
(``tasks_numbered``), bumped in the very transaction that inserts the tasks.
So:

- two transactions inserting tasks of different runs never wait on each
  other (version 1 took every task id from one counter row, which made a
  planning transaction on PostgreSQL hold up every other run's splits until
  it committed); within a run they take turns on the run's tallies row,
  which every state change updates anyway;
- a run's ids are consecutive and never freed: an insert that rolls back
  rolls its numbers back with it, so a number in ``1 .. tasks_numbered``
  held by no task is a deleted task, the last one included
  (:meth:`foldfarm.store.Store.missing_task_ids`);
- nothing PostgreSQL-only (a SEQUENCE hands out numbers outside the
  transaction: a rolled-back insert would leave holes no one deleted).

Tasks of a store upgraded from version 1 keep their ids: those were taken
from one counter for all runs, ``1 .. legacy`` (``meta`` row
``legacy_task_ids``, absent in a store made as version 2), all below
:data:`TASK_ID_SPAN`.  Runs and audits are added one per transaction and still
take their ids from ``id_counters``.

Tallies.  ``run_tallies`` keeps, per run, the tasks in each state, the exact
sums of done counts and split partial counts, nodes and seconds, and the
audits, each changed in the same transaction as the tasks it counts, so the
runs list and a run's progress read one row instead of every task.  Exact
sums are decimal text (:class:`ExactInt`): a run's counts may pass 2**63.
"""

from __future__ import annotations

import json
from datetime import datetime
from typing import Any

from sqlalchemy import (
    BIGINT,
    BOOLEAN,
    DOUBLE_PRECISION,
    INTEGER,
    TEXT,
    TIMESTAMP,
    VARCHAR,
    CheckConstraint,
    ForeignKey,
    Index,
    UniqueConstraint,
    desc,
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator

from foldfarm.store.errors import StoreError
from foldfarm.store.rules import TOTAL_DIGITS, check_total

#: Version of the schema below; stored in ``meta`` as ``schema_version``.
SCHEMA_VERSION = 2
#: Task ids of run ``r`` are ``r * TASK_ID_SPAN + k`` for its tasks ``k = 1, 2, ...``.
TASK_ID_SPAN = 10**10


def check_json(value: object, what: str) -> dict:
    """Return ``value`` if it is a dict that JSON can store, else raise :class:`StoreError`."""
    if not isinstance(value, dict):
        raise StoreError(f"{what} must be a dict, got {type(value).__name__}")
    try:
        json.dumps(value)
    except (TypeError, ValueError) as exc:
        raise StoreError(f"{what} cannot be stored as JSON: {exc}") from None
    return value


class ExactInt(TypeDecorator):
    """A non-negative integer of any size up to 64 digits, stored as decimal text.

    Both back ends keep text exactly, whereas SQLite's NUMERIC affinity would
    turn a number above 2**63 into a float.  A CHECK on the column refuses
    anything but digits.
    """

    impl = VARCHAR(TOTAL_DIGITS)
    cache_ok = True

    def process_bind_param(self, value: Any, dialect: Any) -> str | None:
        return None if value is None else str(check_total(value))

    def process_result_value(self, value: Any, dialect: Any) -> int | None:
        return None if value is None else int(value)


class JsonText(TypeDecorator):
    """A JSON object stored as text (sorted keys, so equal settings give equal text)."""

    impl = TEXT
    cache_ok = True

    def process_bind_param(self, value: Any, dialect: Any) -> str | None:
        return None if value is None else json.dumps(value, sort_keys=True)

    def process_result_value(self, value: Any, dialect: Any) -> Any:
        return None if value is None else json.loads(value)


# CHECK clauses, written once in the dialect-neutral SQL that results_schema.sql repeats.
def digits_check(column: str) -> str:
    """CHECK clause of an :class:`ExactInt` column: NULL or decimal digits without a leading zero."""
    return (
        f"{column} IS NULL OR (LENGTH({column}) BETWEEN 1 AND 64 AND TRIM({column}, '0123456789') = '' "
        f"AND ({column} = '0' OR SUBSTR({column}, 1, 1) <> '0'))"
    )


DIGITS_CHECK = digits_check("total")
RUN_STATE_CHECK = "state IN ('planned', 'running', 'stopped', 'done', 'verified', 'suspect')"
VERIFICATION_CHECK = "verification IN ('unchecked', 'passed', 'failed')"
TASK_STATE_CHECK = "state IN ('pending', 'running', 'done', 'split', 'failed')"
COUNT_PRESENT_CHECK = (
    "(state IN ('done', 'split') AND count IS NOT NULL) "
    "OR (state IN ('pending', 'running', 'failed') AND count IS NULL)"
)


class Base(DeclarativeBase):
    """Declarative base of the store's tables."""


class Run(Base):
    """One count of one map shape."""

    __tablename__ = "runs"
    __table_args__ = (
        CheckConstraint(RUN_STATE_CHECK, name="ck_runs_state"),
        CheckConstraint(VERIFICATION_CHECK, name="ck_runs_verification"),
        CheckConstraint(DIGITS_CHECK, name="ck_runs_total_digits"),
    )

    id: Mapped[int] = mapped_column(BIGINT, primary_key=True, autoincrement=False)
    shape: Mapped[str] = mapped_column(VARCHAR(64))
    side_order: Mapped[str] = mapped_column(VARCHAR(64))
    state: Mapped[str] = mapped_column(VARCHAR(16))
    settings: Mapped[dict] = mapped_column(JsonText)
    created_at: Mapped[datetime] = mapped_column(TIMESTAMP)
    finished_at: Mapped[datetime | None] = mapped_column(TIMESTAMP)
    total: Mapped[int | None] = mapped_column(ExactInt)
    verification: Mapped[str] = mapped_column(VARCHAR(16))
    certificate: Mapped[str | None] = mapped_column(VARCHAR(128))
    checks: Mapped[dict | None] = mapped_column(JsonText)


class Task(Base):
    """One subtree of a run's search tree, named by its prefix."""

    __tablename__ = "tasks"
    __table_args__ = (
        # One row per node: the key has one spelling per node, as the prefix does.
        UniqueConstraint("run_id", "sort_key", name="uq_tasks_run_sort_key"),
        CheckConstraint(TASK_STATE_CHECK, name="ck_tasks_state"),
        CheckConstraint(COUNT_PRESENT_CHECK, name="ck_tasks_count_present"),
        CheckConstraint("count >= 0 AND nodes >= 0 AND depth >= 0 AND attempts >= 0", name="ck_tasks_nonnegative"),
        Index("ix_tasks_run_state", "run_id", "state", "id"),
        Index("ix_tasks_parent", "parent_id"),
    )

    id: Mapped[int] = mapped_column(BIGINT, primary_key=True, autoincrement=False)
    run_id: Mapped[int] = mapped_column(BIGINT, ForeignKey("runs.id"))
    prefix: Mapped[str] = mapped_column(TEXT)
    #: :func:`foldfarm.prefix.sort_key` of the prefix: ordered by it, a run's tasks come in tree order.
    sort_key: Mapped[str] = mapped_column(TEXT)
    depth: Mapped[int] = mapped_column(INTEGER)
    branch: Mapped[int | None] = mapped_column(INTEGER)
    parent_id: Mapped[int | None] = mapped_column(BIGINT, ForeignKey("tasks.id"))
    state: Mapped[str] = mapped_column(VARCHAR(8))
    count: Mapped[int | None] = mapped_column(BIGINT)
    nodes: Mapped[int | None] = mapped_column(BIGINT)
    seconds: Mapped[float | None] = mapped_column(DOUBLE_PRECISION)
    attempts: Mapped[int] = mapped_column(INTEGER)
    worker: Mapped[str | None] = mapped_column(VARCHAR(256))
    error: Mapped[str | None] = mapped_column(TEXT)
    created_at: Mapped[datetime] = mapped_column(TIMESTAMP)
    started_at: Mapped[datetime | None] = mapped_column(TIMESTAMP)
    finished_at: Mapped[datetime | None] = mapped_column(TIMESTAMP)


# The longest, the largest and the latest tasks of a run without sorting them all.  Partial: the
# open tasks have none of these values, so claiming one (pending -> running) touches none of them.
for _name, _column in (("count", Task.count), ("seconds", Task.seconds), ("finished", Task.finished_at)):
    Index(
        f"ix_tasks_run_{_name}",
        Task.run_id,
        desc(_column),
        Task.id,
        sqlite_where=_column.is_not(None),
        postgresql_where=_column.is_not(None),
    )


class Audit(Base):
    """A second, independent computation of a done task."""

    __tablename__ = "audits"
    __table_args__ = (
        CheckConstraint("count >= 0 AND nodes >= 0", name="ck_audits_nonnegative"),
        Index("ix_audits_task", "task_id"),
    )

    id: Mapped[int] = mapped_column(BIGINT, primary_key=True, autoincrement=False)
    task_id: Mapped[int] = mapped_column(BIGINT, ForeignKey("tasks.id"))
    count: Mapped[int] = mapped_column(BIGINT)
    nodes: Mapped[int | None] = mapped_column(BIGINT)
    seconds: Mapped[float | None] = mapped_column(DOUBLE_PRECISION)
    worker: Mapped[str | None] = mapped_column(VARCHAR(256))
    audited_at: Mapped[datetime] = mapped_column(TIMESTAMP)
    matched: Mapped[bool] = mapped_column(BOOLEAN)


class Lease(Base):
    """The one driver allowed to dispatch a run's tasks."""

    __tablename__ = "leases"

    run_id: Mapped[int] = mapped_column(BIGINT, ForeignKey("runs.id"), primary_key=True, autoincrement=False)
    holder: Mapped[str] = mapped_column(VARCHAR(256))
    acquired_at: Mapped[datetime] = mapped_column(TIMESTAMP)
    heartbeat_at: Mapped[datetime] = mapped_column(TIMESTAMP)


class Meta(Base):
    """Facts about the store itself, e.g. ``schema_version``."""

    __tablename__ = "meta"

    name: Mapped[str] = mapped_column(VARCHAR(64), primary_key=True)
    value: Mapped[str] = mapped_column(VARCHAR(256))


class RunTally(Base):
    """A run's task numbers and tallies, kept by every transaction that changes its tasks or audits."""

    __tablename__ = "run_tallies"
    __table_args__ = (
        CheckConstraint(
            "tasks_numbered >= 0 AND pending >= 0 AND running >= 0 AND done >= 0 AND split >= 0 AND failed >= 0 "
            "AND seconds >= 0 AND audits >= 0 AND mismatches >= 0",
            name="ck_run_tallies_nonnegative",
        ),
        CheckConstraint(digits_check("done_count"), name="ck_run_tallies_done_count_digits"),
        CheckConstraint(digits_check("split_count"), name="ck_run_tallies_split_count_digits"),
        CheckConstraint(digits_check("nodes"), name="ck_run_tallies_nodes_digits"),
    )

    run_id: Mapped[int] = mapped_column(BIGINT, ForeignKey("runs.id"), primary_key=True, autoincrement=False)
    #: Task numbers handed out: the run's task ids are ``run_id * TASK_ID_SPAN + 1 ..`` this many.
    tasks_numbered: Mapped[int] = mapped_column(BIGINT)
    pending: Mapped[int] = mapped_column(BIGINT)
    running: Mapped[int] = mapped_column(BIGINT)
    done: Mapped[int] = mapped_column(BIGINT)
    split: Mapped[int] = mapped_column(BIGINT)
    failed: Mapped[int] = mapped_column(BIGINT)
    #: Σ count of done tasks and Σ partial count of split tasks (exact).
    done_count: Mapped[int] = mapped_column(ExactInt)
    split_count: Mapped[int] = mapped_column(ExactInt)
    #: Σ nodes and Σ seconds of the done and split tasks.
    nodes: Mapped[int] = mapped_column(ExactInt)
    seconds: Mapped[float] = mapped_column(DOUBLE_PRECISION)
    #: Audits of the run's tasks, and how many disagreed with the recorded count.
    audits: Mapped[int] = mapped_column(BIGINT)
    mismatches: Mapped[int] = mapped_column(BIGINT)


class IdCounter(Base):
    """Next free id of a table (``runs``, ``audits``; tasks are numbered per run in ``run_tallies``)."""

    __tablename__ = "id_counters"

    name: Mapped[str] = mapped_column(VARCHAR(16), primary_key=True)
    next_id: Mapped[int] = mapped_column(BIGINT)


#: Rows every new store starts with.
INITIAL_META = [{"name": "schema_version", "value": str(SCHEMA_VERSION)}]
INITIAL_COUNTERS = [{"name": table, "next_id": 1} for table in ("audits", "runs")]
#: Meta row of a store upgraded from version 1: task ids ``1 ..`` this were handed out by one counter.
LEGACY_TASK_IDS = "legacy_task_ids"

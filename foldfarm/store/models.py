"""Tables of the store as SQLAlchemy 2 typed models.

``results_schema.sql`` at the top of the repository is the same schema as
portable DDL; a test creates one store from each and compares them.  Keep
both in step and bump :data:`SCHEMA_VERSION` when they change.

Times are naive UTC.  Ids are allocated by the store from ``id_counters``
(one row per table) inside the inserting transaction: that works the same on
SQLite and PostgreSQL, which share no auto-increment syntax.  The price: on
PostgreSQL two transactions inserting into the same table (say, one run's
planning and another run's split) take turns on the counter row until the
first commits; SQLite serialises all writers anyway.
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
)
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column
from sqlalchemy.types import TypeDecorator

from foldfarm.store.errors import StoreError
from foldfarm.store.rules import TOTAL_DIGITS, check_total

#: Version of the schema below; stored in ``meta`` as ``schema_version``.
SCHEMA_VERSION = 1


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
DIGITS_CHECK = (
    "total IS NULL OR (LENGTH(total) BETWEEN 1 AND 64 AND TRIM(total, '0123456789') = '' "
    "AND (total = '0' OR SUBSTR(total, 1, 1) <> '0'))"
)
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
        UniqueConstraint("run_id", "prefix", name="uq_tasks_run_prefix"),
        CheckConstraint(TASK_STATE_CHECK, name="ck_tasks_state"),
        CheckConstraint(COUNT_PRESENT_CHECK, name="ck_tasks_count_present"),
        CheckConstraint("count >= 0 AND nodes >= 0 AND depth >= 0 AND attempts >= 0", name="ck_tasks_nonnegative"),
        Index("ix_tasks_run_state", "run_id", "state", "id"),
        Index("ix_tasks_parent", "parent_id"),
    )

    id: Mapped[int] = mapped_column(BIGINT, primary_key=True, autoincrement=False)
    run_id: Mapped[int] = mapped_column(BIGINT, ForeignKey("runs.id"))
    prefix: Mapped[str] = mapped_column(TEXT)
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


class IdCounter(Base):
    """Next free id of a table (``runs``, ``tasks``, ``audits``)."""

    __tablename__ = "id_counters"

    name: Mapped[str] = mapped_column(VARCHAR(16), primary_key=True)
    next_id: Mapped[int] = mapped_column(BIGINT)


#: Rows every new store starts with.
INITIAL_META = [{"name": "schema_version", "value": str(SCHEMA_VERSION)}]
INITIAL_COUNTERS = [{"name": table, "next_id": 1} for table in ("audits", "runs", "tasks")]

"""Connections, transactions and shared helpers under :class:`foldfarm.store.Store`."""

from __future__ import annotations

import logging
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from datetime import datetime
from typing import Any, Self

from sqlalchemy import Connection, insert, inspect, select, update
from sqlalchemy.exc import IntegrityError, SQLAlchemyError

from foldfarm.prefix import is_ancestor, sort_key
from foldfarm.store import tallies
from foldfarm.store.errors import SchemaVersionError, StoreError, StoreUnavailable, is_transient
from foldfarm.store.models import (
    INITIAL_COUNTERS,
    INITIAL_META,
    LEGACY_TASK_IDS,
    SCHEMA_VERSION,
    TASK_ID_SPAN,
    Base,
    IdCounter,
    Meta,
    Run,
    Task,
)
from foldfarm.store.prefixes import steps_of
from foldfarm.store.urls import make_engine, redact, resolve_store_url, scrub

log = logging.getLogger("foldfarm.store")

#: Prefixes inserted per statement by :meth:`Store.add_tasks` and splits.
INSERT_CHUNK = 10_000


def chunks(items: Iterable[Any], size: int) -> Iterator[list[Any]]:
    chunk: list[Any] = []
    for item in items:
        chunk.append(item)
        if len(chunk) == size:
            yield chunk
            chunk = []
    if chunk:
        yield chunk


def short_text(value: object, what: str, limit: int) -> str:
    if not isinstance(value, str) or not value.strip() or len(value) > limit:
        raise StoreError(f"{what} must be non-empty text of at most {limit} characters, got {value!r}")
    return value


def worker_address(value: object) -> str | None:
    return None if value is None else short_text(value, "worker address", 256)


def check_version(found: str | None, display_url: str) -> None:
    """Refuse a store of another schema version in one line (naming the upgrade of a version 1 store)."""
    if found == str(SCHEMA_VERSION):
        return
    if found == "1":
        raise SchemaVersionError(
            f"the store {display_url} has schema version 1 and this foldfarm reads version {SCHEMA_VERSION}: "
            f"upgrade it first with: foldfarm upgrade --store {display_url}"
        )
    raise SchemaVersionError(
        f"the store {display_url} has schema version {found or 'unknown'} but this foldfarm "
        f"reads version {SCHEMA_VERSION}; open it with the foldfarm that wrote it, or use a new store"
    )


class StoreBase:
    """Engine, schema check and transaction helpers; :class:`foldfarm.store.Store` adds the protocol."""

    def __init__(self, url: str | None = None, *, create: bool = True) -> None:
        self.url = resolve_store_url(url)
        #: The URL with its password hidden: the only form that goes into messages.
        self.display_url = redact(self.url)
        self.engine = make_engine(self.url, create)
        self._writer = self.engine.execution_options(foldfarm_write=True)
        #: Task ids ``1 ..`` this were handed out before version 2 (0: a store made as version 2).
        self.legacy_task_ids = 0
        try:
            self._open_schema(create)
        except BaseException:
            self.engine.dispose()
            raise
        log.info("opened store %s", self.display_url)

    def close(self) -> None:
        """Close all connections."""
        self.engine.dispose()

    def __enter__(self) -> Self:
        return self

    def __exit__(self, *exc: object) -> None:
        self.close()

    def __repr__(self) -> str:
        return f"Store({self.display_url!r})"

    # -- transactions -------------------------------------------------------

    def _fail(self, exc: SQLAlchemyError, doing: str) -> StoreError:
        orig = getattr(exc, "orig", None) or exc
        lines = [line for line in str(orig).splitlines() if line.strip()]
        detail = scrub(lines[0] if lines else type(orig).__name__, self.url)
        detail = detail.removeprefix("connection failed: ")  # psycopg's prefix; "connecting failed" says it
        kind = StoreUnavailable if is_transient(exc) else StoreError
        return kind(f"store {self.display_url}: {doing} failed: {detail}")

    @contextmanager
    def _write(self, doing: str) -> Iterator[Connection]:
        """One write transaction: commit on success, roll back on any exception."""
        try:
            with self._writer.begin() as conn:
                yield conn
        except SQLAlchemyError as exc:
            raise self._fail(exc, doing) from None

    @contextmanager
    def _read(self, doing: str) -> Iterator[Connection]:
        try:
            with self.engine.connect() as conn:
                yield conn
        except SQLAlchemyError as exc:
            raise self._fail(exc, doing) from None

    def _open_schema(self, create: bool) -> None:
        ours = set(Base.metadata.tables)
        with self._write("connecting") as conn:
            present = set(inspect(conn).get_table_names()) & ours
            if not present:
                if not create:
                    raise StoreError(f"{self.display_url} holds no foldfarm store")
                Base.metadata.create_all(conn)
                conn.execute(insert(Meta), INITIAL_META)
                conn.execute(insert(IdCounter), INITIAL_COUNTERS)
                log.info("created store tables in %s", self.display_url)
                return
            if "meta" not in present:
                raise StoreError(f"{self.display_url} is not a foldfarm store (it has no meta table)")
            found = conn.execute(select(Meta.value).where(Meta.name == "schema_version")).scalar_one_or_none()
            check_version(found, self.display_url)
            if present != ours:
                raise StoreError(
                    f"the store {self.display_url} is incomplete: table(s) {', '.join(sorted(ours - present))} missing"
                )
            legacy = conn.execute(select(Meta.value).where(Meta.name == LEGACY_TASK_IDS)).scalar_one_or_none()
            self.legacy_task_ids = int(legacy or 0)

    @staticmethod
    def _allocate_ids(conn: Connection, table: str, n: int) -> int:
        """Reserve ``n`` consecutive ids of ``table``; return the first."""
        # The UPDATE comes first so that it takes the row lock before anyone reads.
        conn.execute(update(IdCounter).where(IdCounter.name == table).values(next_id=IdCounter.next_id + n))
        return conn.execute(select(IdCounter.next_id).where(IdCounter.name == table)).scalar_one() - n

    def _run(self, conn: Connection, run_id: int, lock: bool = False):
        stmt = select(Run.__table__).where(Run.id == run_id)
        row = conn.execute(stmt.with_for_update() if lock else stmt).one_or_none()
        if row is None:
            raise StoreError(f"no run {run_id} in {self.display_url}")
        return row

    def _task(self, conn: Connection, task_id: int, lock: bool = True):
        stmt = select(Task.id, Task.run_id, Task.prefix, Task.state, Task.count).where(Task.id == task_id)
        row = conn.execute(stmt.with_for_update() if lock else stmt).one_or_none()
        if row is None:
            raise StoreError(f"no task {task_id} in {self.display_url}")
        return row

    def _insert_tasks(
        self,
        conn: Connection,
        run_id: int,
        prefixes: Iterable[str],
        parent_id: int | None,
        parent_prefix: str | None,
        now: datetime,
        chunk_size: int = INSERT_CHUNK,
        delta: tallies.Delta | None = None,
    ) -> int:
        """Insert pending tasks in chunks of ``chunk_size`` rows; return how many.

        Each chunk takes the next numbers of the run (see :data:`TASK_ID_SPAN`)
        and counts its tasks pending in the run's tallies; ``delta``, the
        caller's own change to the tallies, rides along with the first chunk.
        """
        added = 0
        parent_steps = None if parent_prefix is None else steps_of(parent_prefix)
        for chunk in chunks(prefixes, chunk_size):
            steps = [steps_of(prefix) for prefix in chunk]
            if parent_steps is not None:
                for prefix, s in zip(chunk, steps):
                    if s == parent_steps or not is_ancestor(parent_steps, s):
                        raise StoreError(f"prefix {prefix} is not inside its parent task's prefix {parent_prefix}")
            change = delta if delta is not None else tallies.Delta()
            delta = None
            change.numbered += len(chunk)
            change.states["pending"] += len(chunk)
            first = run_id * TASK_ID_SPAN + tallies.apply(conn, run_id, change).tasks_numbered + 1
            rows = [
                {
                    "id": first + i,
                    "run_id": run_id,
                    "prefix": prefix,
                    "sort_key": sort_key(s),
                    "depth": len(s),
                    "branch": s[0] if s else None,
                    "parent_id": parent_id,
                    "state": "pending",
                    "attempts": 0,
                    "created_at": now,
                }
                for i, (prefix, s) in enumerate(zip(chunk, steps))
            ]
            try:
                conn.execute(insert(Task), rows)
            except IntegrityError:
                raise StoreError(
                    f"run {run_id} in {self.display_url} already has a task with one of the prefixes "
                    f"{chunk[0]} .. {chunk[-1]}, or lists one twice; nothing was added"
                ) from None
            added += len(chunk)
        if delta is not None:  # nothing to insert: the caller's change still counts
            tallies.apply(conn, run_id, delta)
        return added

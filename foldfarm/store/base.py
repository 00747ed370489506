"""Connections, transactions and shared helpers under :class:`foldfarm.store.Store`."""

from __future__ import annotations

import logging
from collections.abc import Iterable, Iterator
from contextlib import contextmanager
from datetime import datetime
from typing import Any, Self

from sqlalchemy import Connection, insert, inspect, select, update
from sqlalchemy.exc import IntegrityError, SQLAlchemyError

from foldfarm.store.errors import SchemaVersionError, StoreError, StoreUnavailable, is_transient
from foldfarm.store.models import (
    INITIAL_COUNTERS,
    INITIAL_META,
    SCHEMA_VERSION,
    Base,
    IdCounter,
    Meta,
    Run,
    Task,
)
from foldfarm.store.prefixes import check_prefix, is_ancestor, prefix_branch, prefix_depth
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


class StoreBase:
    """Engine, schema check and transaction helpers; :class:`foldfarm.store.Store` adds the protocol."""

    def __init__(self, url: str | None = None, *, create: bool = True) -> None:
        self.url = resolve_store_url(url)
        #: The URL with its password hidden: the only form that goes into messages.
        self.display_url = redact(self.url)
        self.engine = make_engine(self.url, create)
        self._writer = self.engine.execution_options(foldfarm_write=True)
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
            if found != str(SCHEMA_VERSION):
                raise SchemaVersionError(
                    f"the store {self.display_url} has schema version {found or 'unknown'} but this foldfarm "
                    f"reads version {SCHEMA_VERSION}; open it with the foldfarm that wrote it, or use a new store"
                )
            if present != ours:
                raise StoreError(
                    f"the store {self.display_url} is incomplete: table(s) {', '.join(sorted(ours - present))} missing"
                )

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
    ) -> int:
        """Insert pending tasks in chunks of ``chunk_size`` rows; return how many."""
        added = 0
        for chunk in chunks(prefixes, chunk_size):
            for prefix in chunk:
                check_prefix(prefix)
                if parent_prefix is not None and not is_ancestor(parent_prefix, prefix):
                    raise StoreError(f"prefix {prefix} is not inside its parent task's prefix {parent_prefix}")
            first = self._allocate_ids(conn, "tasks", len(chunk))
            rows = [
                {
                    "id": first + i,
                    "run_id": run_id,
                    "prefix": prefix,
                    "depth": prefix_depth(prefix),
                    "branch": prefix_branch(prefix),
                    "parent_id": parent_id,
                    "state": "pending",
                    "attempts": 0,
                    "created_at": now,
                }
                for i, prefix in enumerate(chunk)
            ]
            try:
                conn.execute(insert(Task), rows)
            except IntegrityError:
                raise StoreError(
                    f"run {run_id} in {self.display_url} already has a task with one of the prefixes "
                    f"{chunk[0]} .. {chunk[-1]}, or lists one twice; nothing was added"
                ) from None
            added += len(chunk)
        return added

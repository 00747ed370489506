"""Upgrading a store of schema version 1 to version 2 (``foldfarm upgrade``), in one transaction.

Version 2 (see :mod:`foldfarm.store.models`) adds to ``tasks`` the column
``sort_key`` (tree order), which replaces ``prefix`` in the unique key of a
run's tasks, and the indexes of the top-N listings; it adds ``run_tallies``;
and it numbers new tasks per run instead of from the ``tasks`` row of
``id_counters``.  The upgrade:

1. gives every task its ``sort_key``.  PostgreSQL alters ``tasks`` in place.
   SQLite cannot drop a table's constraint, so the table is rebuilt the way
   SQLite's documentation prescribes: with foreign keys off, the old table
   is renamed, the new one created from the models, the rows copied, the
   old table dropped, and ``PRAGMA foreign_key_check`` must find nothing;
2. creates ``run_tallies`` with one row per run, recounted from its tasks
   and audits;
3. records the task ids handed out so far as ``legacy_task_ids`` in
   ``meta`` (those tasks keep their ids, and a missing one among them still
   reads as deleted) and drops the ``tasks`` counter;
4. sets ``schema_version`` to 2.

All of it is one transaction: a failure (or Ctrl-C) leaves the version 1
store as it was.  Upgrading a version 2 store changes nothing.  Rows are
read and written a page at a time, so memory stays flat for any number of
tasks.  Counts, totals, certificates and checks are untouched.
"""

from __future__ import annotations

import logging

from sqlalchemy import (
    Connection,
    Engine,
    MetaData,
    Table,
    UniqueConstraint,
    bindparam,
    delete,
    insert,
    inspect,
    select,
    update,
)
from sqlalchemy.exc import SQLAlchemyError
from sqlalchemy.ext.compiler import compiles
from sqlalchemy.schema import AddConstraint, DDLElement, DropConstraint

from foldfarm.prefix import PrefixError, parse_prefix, sort_key
from foldfarm.store import tallies
from foldfarm.store.base import check_version
from foldfarm.store.errors import StoreError, StoreUnavailable, is_transient
from foldfarm.store.models import (
    LEGACY_TASK_IDS,
    SCHEMA_VERSION,
    TASK_ID_SPAN,
    IdCounter,
    Meta,
    Run,
    RunTally,
    Task,
)
from foldfarm.store.urls import make_engine, redact, resolve_store_url, scrub

log = logging.getLogger("foldfarm.store")

#: Tasks read and written per statement while upgrading.
PAGE = 10_000
_OLD_UNIQUE = "uq_tasks_run_prefix"


class _RenameTable(DDLElement):
    def __init__(self, old: str, new: str) -> None:
        self.old, self.new = old, new


class _AddColumn(DDLElement):
    def __init__(self, table: str, column) -> None:
        self.table, self.column = table, column


class _SetNotNull(DDLElement):
    def __init__(self, table: str, column: str) -> None:
        self.table, self.column = table, column


@compiles(_RenameTable)
def _rename(element, compiler, **kw) -> str:
    quote = compiler.preparer.quote
    return f"ALTER TABLE {quote(element.old)} RENAME TO {quote(element.new)}"


@compiles(_AddColumn)
def _add_column(element, compiler, **kw) -> str:
    quote = compiler.preparer.quote
    kind = compiler.dialect.type_compiler_instance.process(element.column.type)
    return f"ALTER TABLE {quote(element.table)} ADD COLUMN {quote(element.column.name)} {kind}"


@compiles(_SetNotNull)
def _set_not_null(element, compiler, **kw) -> str:
    quote = compiler.preparer.quote
    return f"ALTER TABLE {quote(element.table)} ALTER COLUMN {quote(element.column)} SET NOT NULL"


def upgrade_store(url: str | None = None) -> str:
    """Upgrade the store at ``url`` (default as for :class:`foldfarm.store.Store`) to the current
    schema version; return one line saying what was done.  :class:`StoreError` (one line) if it is no
    foldfarm store, has a version this foldfarm does not know, or the upgrade failed (nothing changed)."""
    url = resolve_store_url(url)
    display = redact(url)
    engine = make_engine(url, create=False)
    try:
        return _upgrade(engine, display)
    except SQLAlchemyError as exc:
        orig = getattr(exc, "orig", None) or exc
        detail = scrub(str(orig).splitlines()[0] if str(orig).strip() else type(orig).__name__, url)
        kind = StoreUnavailable if is_transient(exc) else StoreError
        raise kind(f"store {display}: upgrading failed, nothing was changed: {detail}") from None
    finally:
        engine.dispose()


def _upgrade(engine: Engine, display: str) -> str:
    sqlite = engine.dialect.name == "sqlite"
    with engine.execution_options(foldfarm_write=True).connect() as conn:
        driver = conn.connection.driver_connection
        if sqlite:  # outside any transaction, where SQLite honours them
            driver.execute("PRAGMA foreign_keys=OFF")
            driver.execute("PRAGMA legacy_alter_table=ON")  # a rename leaves other tables' references alone
        try:
            with conn.begin():
                found = _version(conn, display)
                if found == str(SCHEMA_VERSION):
                    return f"the store {display} is at schema version {SCHEMA_VERSION} already: nothing to do"
                if found != "1":
                    check_version(found, display)  # refuses, naming the version
                runs, tasks = _to_version_2(conn, sqlite)
        finally:
            if sqlite:
                driver.execute("PRAGMA legacy_alter_table=OFF")
                driver.execute("PRAGMA foreign_keys=ON")
    log.info("upgraded %s to schema version 2", display)
    return f"upgraded the store {display} from schema version 1 to {SCHEMA_VERSION}: {runs} run(s), {tasks} task(s)"


def _version(conn: Connection, display: str) -> str | None:
    names = set(inspect(conn).get_table_names())
    if not names & {"runs", "tasks", "meta"}:
        raise StoreError(f"{display} holds no foldfarm store")
    if "meta" not in names:
        raise StoreError(f"{display} is not a foldfarm store (it has no meta table)")
    return conn.execute(select(Meta.value).where(Meta.name == "schema_version")).scalar_one_or_none()


def _to_version_2(conn: Connection, sqlite: bool) -> tuple[int, int]:
    """Every step of the upgrade on an open transaction; return (runs, tasks)."""
    counter = select(IdCounter.next_id).where(IdCounter.name == "tasks")
    legacy = (conn.execute(counter).scalar_one_or_none() or 1) - 1
    if legacy >= TASK_ID_SPAN:
        raise StoreError(f"the store has handed out {legacy} task ids; version 2 keeps older ids below {TASK_ID_SPAN}")
    tasks = _rebuild_tasks(conn) if sqlite else _alter_tasks(conn)
    RunTally.__table__.create(conn)
    run_ids = conn.execute(select(Run.id).order_by(Run.id)).scalars().all()
    for run_id in run_ids:
        recount = tallies.recount(conn, run_id, legacy)
        row = tallies.initial(run_id)
        row.update({state: n for state, n in recount.tasks.items()}, done_count=recount.done_count,
                   split_count=recount.split_count, nodes=recount.nodes, seconds=recount.seconds,
                   audits=recount.audits, mismatches=recount.mismatches)
        conn.execute(insert(RunTally).values(**row))
    if legacy:
        conn.execute(insert(Meta).values(name=LEGACY_TASK_IDS, value=str(legacy)))
    conn.execute(delete(IdCounter).where(IdCounter.name == "tasks"))
    conn.execute(update(Meta).where(Meta.name == "schema_version").values(value=str(SCHEMA_VERSION)))
    return len(run_ids), tasks


def _keys(rows) -> list[dict]:
    out = []
    for row in rows:
        try:
            key = sort_key(parse_prefix(row.prefix))
        except PrefixError:
            raise StoreError(f"task {row.id} has the malformed prefix {row.prefix[:40]!r}; "
                             "the store was changed by hand") from None
        out.append({**row._mapping, "sort_key": key})
    return out


def _pages(conn: Connection, table: Table, columns):
    """Rows of ``table`` in id order, :data:`PAGE` at a time (keyset paging: flat memory, one connection)."""
    after = 0
    while rows := conn.execute(
        select(*columns).where(table.c.id > after).order_by(table.c.id).limit(PAGE)
    ).all():
        yield rows
        after = rows[-1].id


def _rebuild_tasks(conn: Connection) -> int:
    """SQLite: the tasks table made anew from the models, rows copied with their keys; return how many."""
    old = Table("tasks", MetaData(), autoload_with=conn)
    for index in old.indexes:  # their names belong to the new table
        index.drop(conn)
    conn.execute(_RenameTable("tasks", "tasks_v1"))
    Task.__table__.create(conn)
    v1 = Table("tasks_v1", MetaData(), autoload_with=conn)
    columns = [v1.c[c.name] for c in Task.__table__.columns if c.name != "sort_key"]
    copied = 0
    for rows in _pages(conn, v1, columns):
        conn.execute(insert(Task), _keys(rows))
        copied += len(rows)
    v1.drop(conn)
    broken = conn.exec_driver_sql("PRAGMA foreign_key_check").all()
    if broken:
        raise StoreError(f"the store's references are broken ({broken[0][0]} row {broken[0][1]} refers to a "
                         f"missing {broken[0][2]} row); nothing was changed")
    return copied


def _alter_tasks(conn: Connection) -> int:
    """PostgreSQL: the column added and filled, the unique key swapped, the new indexes made; return tasks."""
    old = Table("tasks", MetaData(), autoload_with=conn)
    conn.execute(_AddColumn("tasks", Task.__table__.c.sort_key))
    fill = update(Task).where(Task.id == bindparam("b_id")).values(sort_key=bindparam("b_key"))
    filled = 0
    for rows in _pages(conn, old, [old.c.id, old.c.prefix]):
        conn.execute(fill, [{"b_id": r["id"], "b_key": r["sort_key"]} for r in _keys(rows)])
        filled += len(rows)
    conn.execute(_SetNotNull("tasks", "sort_key"))
    for constraint in old.constraints:
        if constraint.name == _OLD_UNIQUE:
            conn.execute(DropConstraint(constraint))
    # AddConstraint marks its constraint as made already (no longer part of CREATE TABLE): give it a
    # copy on a table of its own, never the model's, or stores made later in this process would lack it.
    new = Table("tasks", MetaData(), autoload_with=conn)
    for constraint in Task.__table__.constraints:
        if isinstance(constraint, UniqueConstraint):
            copy = UniqueConstraint(*(new.c[c.name] for c in constraint.columns), name=constraint.name)
            conn.execute(AddConstraint(copy))
    present = {index.name for index in old.indexes}
    for index in Task.__table__.indexes:
        if index.name not in present:
            index.create(conn)
    return filled

"""A store of schema version 1 is refused in one line, upgraded by ``foldfarm upgrade``, and still verifies.

``tests/data/v1-runs.sqlite`` was written by foldfarm at schema version 1
(tests/local_driver.py's way): run 1 counts 3x4 with splits (15552 foldings,
OEIS A001416), run 2 counts 2x4 (320, OEIS A001415), run 3 (2x2x3) stopped
with one task pending.  ``tests/data/schema_v1.sql`` is version 1's DDL;
the PostgreSQL half loads it and the same rows.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from pathlib import Path

import pytest
from local_driver import count_here, count_pending
from sqlalchemy import MetaData, Table, create_engine, delete, insert, select, update

from foldfarm import check
from foldfarm import run as runner
from foldfarm.published import published
from foldfarm.store import SchemaVersionError, Store, StoreError, resolve_store_url, upgrade_store
from foldfarm.store.models import TASK_ID_SPAN, IdCounter, Task
from test_store import reflect, sql_statements

DATA = Path(__file__).resolve().parent / "data"
V1_STORE = DATA / "v1-runs.sqlite"
V1_SCHEMA = DATA / "schema_v1.sql"
#: What the version 1 store holds (its runs were verified by the version that wrote them).
TOTALS = {1: published("3x4")[0].count, 2: published("2x4")[0].count}  # OEIS A001416, A001415
V1_TASKS = 64


def foldfarm(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "foldfarm", *args], capture_output=True, text=True, timeout=120)


@pytest.fixture
def v1_url(backend, new_store_url, tmp_path):
    """URL of a version 1 store holding the runs of tests/data/v1-runs.sqlite, on ``backend``."""
    if backend == "sqlite":
        path = tmp_path / "v1.sqlite"
        shutil.copy(V1_STORE, path)
        return f"sqlite:///{path}"
    url = new_store_url()
    source = create_engine(f"sqlite:///{V1_STORE}")
    target = create_engine(resolve_store_url(url))
    with source.connect() as read, target.begin() as write:
        for statement in sql_statements(V1_SCHEMA):
            write.exec_driver_sql(statement)
        tables = MetaData()
        tables.reflect(read)
        for name in ("runs", "tasks", "audits", "leases"):
            rows = [dict(r._mapping) for r in read.execute(select(tables.tables[name]).order_by(*tables.tables[name].primary_key))]
            if rows:
                write.execute(insert(Table(name, MetaData(), autoload_with=write)), rows)
        for name, next_id in read.execute(select(tables.tables["id_counters"])):
            write.execute(update(IdCounter).where(IdCounter.name == name).values(next_id=next_id))
    source.dispose()
    target.dispose()
    return url


def test_a_version_1_store_is_refused_in_one_line_naming_the_upgrade(v1_url):
    with pytest.raises(SchemaVersionError) as info:
        Store(v1_url)
    message = str(info.value)
    assert "schema version 1" in message and "foldfarm upgrade --store " in message and "\n" not in message
    if v1_url.startswith("sqlite"):  # the command line says the same (its URL has no search_path to quote)
        out = foldfarm("status", "--store", v1_url)
        assert out.returncode == 2 and out.stdout == ""
        assert out.stderr.strip() == f"foldfarm: {message}"


def test_upgrade_keeps_every_number_and_the_runs_still_verify(v1_url, new_store_url):
    engine = create_engine(resolve_store_url(v1_url))
    with engine.connect() as conn:
        before = conn.execute(select(Task.__table__.c.id, Task.__table__.c.prefix, Task.__table__.c.state,
                                     Task.__table__.c.count).order_by(Task.__table__.c.id)).all()
        certificates = dict(conn.exec_driver_sql("SELECT id, certificate FROM runs").all())
    engine.dispose()
    assert len(before) == V1_TASKS

    said = upgrade_store(v1_url)
    assert said.startswith("upgraded the store ") and "from schema version 1 to 2: 3 run(s), 64 task(s)" in said
    assert "already" in upgrade_store(v1_url)  # a second upgrade changes nothing

    with Store(v1_url) as store:
        assert store.legacy_task_ids == V1_TASKS
        with store.engine.connect() as conn:
            after = conn.execute(select(Task.id, Task.prefix, Task.state, Task.count).order_by(Task.id)).all()
        assert after == before
        for run in (1, 2, 3):
            kept, recount = store.tallies(run), store.recount_tallies(run)
            assert (kept.tasks, kept.counted, kept.nodes, kept.audits) == \
                (recount.tasks, recount.counted, recount.nodes, recount.audits)
            assert store.missing_task_ids(run) == []
        summary = {r.id: r for r in store.list_runs()}
        assert {run: summary[run].total for run in TOTALS} == TOTALS
        assert {run: summary[run].counted for run in TOTALS} == TOTALS
        for run in TOTALS:
            checks = check.verify_run(store, run)
            assert check.passed(checks), checks
            assert checks["certificate"]["digest"] == certificates[run] and "same as stored" in \
                checks["certificate"]["detail"]
            assert checks["completeness"]["ok"] is True and checks["total"]["value"] == TOTALS[run]

        # The stopped run goes on under version 2: its new tasks take the run's own numbers.
        store.set_run_state(3, "running")
        count_pending(store, 3, task_nodes=3)  # a small budget, so the last task splits
        newer = [t.id for t in store.tasks(3) if t.id > V1_TASKS]
        assert newer and newer == list(range(3 * TASK_ID_SPAN + 1, 3 * TASK_ID_SPAN + 1 + len(newer)))
        runner.finish(store, 3, 0.0)
        info = store.get_run(3)
        # No published value for 2x2x3 to hand: the same map counted afresh in this version must agree.
        assert info.state == "verified" and info.total == store.get_run(count_here(store, "2x2x3")).total
        same = store.tallies(3)
        assert same.counted == info.total and same.tasks_numbered == len(newer)

        # Tampering after the upgrade is caught: a deleted old task and a deleted new one.
        old_victim = next(t for t in store.tasks(1, ["done"]) if t.id < V1_TASKS)
        new_victim = store.tasks(3, ["done"])[-1]
        assert new_victim.id > V1_TASKS
        with store.engine.begin() as conn:
            conn.execute(delete(Task).where(Task.id.in_([old_victim.id, new_victim.id])))
        for run, victim in ((1, old_victim), (3, new_victim)):
            checks = check.verify_run(store, run)
            assert checks["completeness"]["ok"] is False
            assert f"task id {victim.id} is missing" in checks["completeness"]["detail"]
            assert store.get_run(run).state == "suspect"

    # The upgraded store has the tables, keys and indexes of a store made as version 2.
    fresh = new_store_url()
    Store(fresh).close()
    made, upgraded = reflect(fresh), reflect(v1_url)
    assert set(made) == set(upgraded)
    for table in made:
        a, b = made[table], upgraded[table]
        assert sorted(a.pop("columns")) == sorted(b.pop("columns")), table  # PostgreSQL adds a column last
        assert a == b, table


def test_upgrade_command_says_one_line(tmp_path):
    path = tmp_path / "v1.sqlite"
    shutil.copy(V1_STORE, path)
    url = f"sqlite:///{path}"
    out = foldfarm("upgrade", "--store", url)
    assert out.returncode == 0 and out.stderr == ""
    assert out.stdout == f"upgraded the store {url} from schema version 1 to 2: 3 run(s), 64 task(s)\n"
    out = foldfarm("upgrade", "--store", url)
    assert (out.returncode, out.stdout) == (0, f"the store {url} is at schema version 2 already: nothing to do\n")
    out = foldfarm("status", "--store", url)
    assert out.returncode == 0 and "15552" in out.stdout  # OEIS A001416

    for bad, words in ((f"sqlite:///{tmp_path}/none.sqlite", "no store"), ("mysql://127.0.0.1/x", "not supported")):
        out = foldfarm("upgrade", "--store", bad)
        assert out.returncode == 2 and out.stdout == "" and "Traceback" not in out.stderr
        assert len(out.stderr.strip().splitlines()) == 1 and words in out.stderr
    assert not (tmp_path / "none.sqlite").exists()


def test_a_failed_upgrade_changes_nothing(tmp_path, monkeypatch):
    path = tmp_path / "v1.sqlite"
    shutil.copy(V1_STORE, path)
    url = f"sqlite:///{path}"
    engine = create_engine(url)
    with engine.begin() as conn:  # a prefix no version writes: the upgrade cannot key it
        conn.exec_driver_sql("UPDATE tasks SET prefix = '/1/x' WHERE id = 40")
    with pytest.raises(StoreError) as info:
        upgrade_store(url)
    assert "task 40 has the malformed prefix" in str(info.value)
    with engine.connect() as conn:
        assert conn.exec_driver_sql("SELECT value FROM meta WHERE name = 'schema_version'").scalar_one() == "1"
        assert conn.exec_driver_sql("SELECT COUNT(*) FROM tasks").scalar_one() == V1_TASKS
        assert conn.exec_driver_sql("SELECT name FROM sqlite_master WHERE name = 'run_tallies' OR name = "
                                    "'tasks_v1'").all() == []
    engine.dispose()
    with pytest.raises(SchemaVersionError):
        Store(url)

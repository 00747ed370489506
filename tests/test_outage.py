"""A store that goes away mid-run: the coordinator waits, continues, or stops cleanly for a resume.

The decisions (:mod:`foldfarm.outage`, :func:`foldfarm.store.is_transient`)
are tested on their own; the rest restarts and stops a PostgreSQL server of
the test's own (a cluster on a free loopback port, made with Debian's
``pg_createcluster`` and dropped afterwards: the shared server on 5432 is
never touched) under a real ``foldfarm run``.  Every run ends with the
published total (OEIS A001416, 3x9) and a store whose done tasks partition
the tree.
"""

from __future__ import annotations

import json
import os
import shutil
import socket
import subprocess
import sys
import uuid

import pytest
from sqlalchemy.exc import IntegrityError, OperationalError

from foldfarm.outage import Outage, PatientStore, StoreGone, retry_delay
from foldfarm.store import Store, StoreError, StoreUnavailable, is_transient
from test_cluster import LONG, LONG_COUNT, assert_partition, snapshot, start, wait_for_done

PG_ENV = "FOLDFARM_TEST_POSTGRES_URL"


# ---- decisions -------------------------------------------------------------------------------

def test_backoff_doubles_up_to_its_cap_and_the_outage_ends_on_its_deadline():
    assert [retry_delay(n, first=1, most=10) for n in range(1, 7)] == [1, 2, 4, 8, 10, 10]
    outage = Outage(wait=30)
    pauses, now = [], 1000.0
    while (pause := outage.failed(now)) is not None:
        pauses.append(pause)
        now += pause
    assert now == 1030.0, "the last try falls on the deadline"
    assert sum(pauses) == 30 and pauses[:4] == [0.5, 1.0, 2.0, 4.0]
    assert outage.over(now + 1) == 31.0 and outage.began is None and outage.tries == 0
    assert outage.failed(2000.0) == 0.5, "a new outage starts its backoff again"


@pytest.mark.parametrize("driver_error, transient", [
    ("connection refused", True),                        # no SQLSTATE: the client never reached a server
    ("57P01", True),                                     # admin shutdown: a restart
    ("57P03", True),                                     # the database system is starting up
    ("08006", True),                                     # connection failure
    ("28P01", False),                                    # wrong password
    ("3D000", False),                                    # no such database
])
def test_postgres_errors_that_say_not_now(driver_error, transient):
    import psycopg.errors as pg

    orig = pg.lookup(driver_error)("x") if driver_error[0].isdigit() else pg.OperationalError(driver_error)
    assert is_transient(OperationalError("SELECT 1", {}, orig)) is transient


def test_sqlite_busy_is_transient_and_a_broken_constraint_is_not():
    import sqlite3

    assert is_transient(OperationalError("INSERT", {}, sqlite3.OperationalError("database is locked")))
    assert not is_transient(OperationalError("SELECT", {}, sqlite3.OperationalError("no such table: runs")))
    assert not is_transient(IntegrityError("INSERT", {}, sqlite3.IntegrityError("UNIQUE constraint failed")))


class FlakyStore:
    """Answers ``recorded`` after failing ``failures`` times; counts the calls."""

    display_url = "postgresql+psycopg://halvorsen@127.0.0.1/tern"

    def __init__(self, failures: int, error: type = StoreUnavailable):
        self.failures, self.error, self.calls = failures, error, 0

    def record(self, n):
        self.calls += 1
        if self.calls <= self.failures:
            raise self.error(f"store {self.display_url}: recording failed: connection refused")
        return n


def test_patient_store_waits_says_so_twice_and_gives_up_after_its_wait():
    clock, said = [0.0], []
    sleep = lambda s: clock.__setitem__(0, clock[0] + s)  # noqa: E731
    flaky = FlakyStore(failures=5)
    patient = PatientStore(flaky, wait=60, notice=said.append, holding=lambda: 12, sleep=sleep, clock=lambda: clock[0])
    assert patient.record(7) == 7 and flaky.calls == 6
    assert patient.display_url == flaky.display_url
    assert len(said) == 2, said
    assert "recording failed" in said[0] and "holding 12 results not yet recorded" in said[0] and "up to 60 s" in said[0]
    assert said[1] == "foldfarm: the store answers again after 16 s; continuing"  # 0.5+1+2+4+8

    gone = PatientStore(FlakyStore(failures=10**6), wait=20, notice=said.append, sleep=sleep, clock=lambda: clock[0])
    began = clock[0]
    with pytest.raises(StoreGone, match="did not answer for 20 s"):
        gone.record(1)
    assert clock[0] - began == 20


def test_patient_store_passes_other_errors_at_once():
    flaky = FlakyStore(failures=1, error=StoreError)
    patient = PatientStore(flaky, wait=60, sleep=lambda s: pytest.fail("it waited"))
    with pytest.raises(StoreError):
        patient.record(1)
    assert flaky.calls == 1


# ---- a real PostgreSQL that restarts and goes away ------------------------------------------

def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class OwnPostgres:
    """A PostgreSQL cluster of this test's own on a free loopback port (Debian's pg_createcluster)."""

    def __init__(self):
        self.version = sorted(os.listdir("/etc/postgresql"))[-1]
        self.name = f"foldfarm_{os.getpid()}_{uuid.uuid4().hex[:6]}"
        self.port = free_port()
        subprocess.run(["pg_createcluster", self.version, self.name, "--port", str(self.port),
                        "--start-conf", "manual", "-o", "listen_addresses=localhost", "--", "--auth=trust"],
                       check=True, capture_output=True)
        self.url = f"postgresql+psycopg://postgres@127.0.0.1:{self.port}/postgres"
        self.ctl("start")

    def ctl(self, action: str) -> None:
        subprocess.run(["pg_ctlcluster", "--skip-systemctl-redirect", self.version, self.name, action],
                       check=True, capture_output=True)

    def drop(self) -> None:
        subprocess.run(["pg_dropcluster", "--stop", self.version, self.name], capture_output=True)


@pytest.fixture(scope="module")
def own_postgres():
    """A server the test may restart and stop; fails rather than skips where PostgreSQL tests must run."""
    missing = shutil.which("pg_createcluster") is None or not os.path.isdir("/etc/postgresql")
    if missing or os.geteuid() != 0:
        why = "needs root and Debian's postgresql-common (pg_createcluster) to make a server it may restart"
        if os.environ.get(PG_ENV):
            pytest.fail(why)
        pytest.skip(why)
    server = OwnPostgres()
    yield server
    server.drop()


@pytest.fixture
def pg_store(own_postgres):
    """A URL of a new empty database on the test's own server."""
    name = f"tern_{uuid.uuid4().hex[:8]}"
    subprocess.run(["psql", "-h", "127.0.0.1", "-p", str(own_postgres.port), "-U", "postgres", "-qc",
                    f"CREATE DATABASE {name}"], check=True, capture_output=True)
    return own_postgres.url.rsplit("/", 1)[0] + f"/{name}"


def counting(url: str, *extra: str) -> subprocess.Popen:
    return start("run", LONG, "--workers", "2", "--store", url, "--task-nodes", "300000", "--json", "--quiet",
                 *extra)


@pytest.mark.slow
@pytest.mark.postgres
def test_a_restart_mid_run_is_waited_out_and_the_total_is_exact(own_postgres, pg_store):
    proc = counting(pg_store)
    wait_for_done(pg_store, 1, 40, proc)
    own_postgres.ctl("restart")
    stdout, stderr = proc.communicate(timeout=300)
    assert proc.returncode == 0, stderr
    assert json.loads(stdout)["count"] == LONG_COUNT, f"{LONG}: OEIS A001416 publishes {LONG_COUNT}"
    lines = stderr.strip().splitlines()
    waiting = [n for n, line in enumerate(lines) if "trying again for up to 300 s" in line]
    back = [n for n, line in enumerate(lines) if "the store answers again after" in line]
    assert waiting and back and waiting[0] < back[0], stderr
    assert_partition(pg_store, 1, LONG_COUNT)


@pytest.mark.slow
@pytest.mark.postgres
def test_an_outage_longer_than_the_wait_stops_cleanly_and_resume_gives_the_exact_total(own_postgres, pg_store):
    proc = counting(pg_store, "--store-wait", "3")
    wait_for_done(pg_store, 1, 40, proc)
    before = snapshot(pg_store, 1)
    own_postgres.ctl("stop")
    try:
        _, stderr = proc.communicate(timeout=120)
    finally:
        own_postgres.ctl("start")
    assert proc.returncode == 130, stderr
    lines = stderr.strip().splitlines()
    assert any("trying again for up to 3 s" in line for line in lines), stderr
    assert any("did not answer for 3 s" in line for line in lines), stderr
    assert f"resume with: foldfarm resume 1 --store {pg_store}" in lines[-1], stderr
    assert len(lines) <= 4 and "Traceback" not in stderr, stderr

    out = subprocess.run([sys.executable, "-m", "foldfarm", "resume", "1", "--workers", "2", "--store", pg_store,
                          "--json", "--quiet"], capture_output=True, text=True, timeout=300)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout)["count"] == LONG_COUNT, f"{LONG}: OEIS A001416 publishes {LONG_COUNT}"
    assert_partition(pg_store, 1, LONG_COUNT)
    after = snapshot(pg_store, 1)
    assert len(before) >= 40 and all(after[p] == before[p] for p in before), "a recorded task was counted again"
    with Store(pg_store) as store:
        assert store.lease(1) is None

"""A Dask scheduler that goes away mid-run: the coordinator waits for it, carries on, or stops cleanly.

The decisions (:mod:`foldfarm.reconnect`) are tested on their own; the rest
kills a real ``dask scheduler`` on loopback with SIGKILL under a running
``foldfarm run`` and starts another on the same address (or does not).
Every run ends with the published total (OEIS A000136 for 1x22, through
``LONG_COUNT``) and a store whose done tasks partition the tree.
"""

from __future__ import annotations

import json
import signal
import socket
import subprocess
import threading
import time

import pytest
from test_cluster import (DASK, LONG, LONG_COUNT, LONG_TASK_NODES, WORKER, assert_partition, foldfarm, snapshot,
                          start, stop_processes, wait_for_done)

from foldfarm.errors import UserError
from foldfarm.reconnect import (LOST_REASON, SchedulerGone, SchedulerWait, reconnect, reconnectable,
                                scheduler_lost)
from foldfarm.run import Dispatch, Settings, _next_results
from foldfarm.store import Store

# ---- decisions -------------------------------------------------------------------------------


class FutureCancelledError(Exception):
    """Shaped as Dask's: a key and the reason it was cancelled."""

    def __init__(self, reason: str):
        super().__init__(f"foldfarm-1-7-1 cancelled for reason: {reason}.")
        self.reason = reason


class ClosedClientError(Exception):
    """Named as Dask's: a call on a client that closed."""


def test_what_counts_as_a_lost_scheduler():
    for status in ("connecting", "closing", "closed"):
        assert scheduler_lost(status) and scheduler_lost(status, KeyError("x"))
    assert not scheduler_lost("running") and not scheduler_lost("newly-created")
    assert scheduler_lost("running", FutureCancelledError(LOST_REASON))
    assert scheduler_lost("running", ClosedClientError("Client is closed. Can't send update-graph message."))
    # A task Dask gave up on, or an error from the task itself, is the task's business (classify_failure).
    assert not scheduler_lost("running", FutureCancelledError("unknown"))
    assert not scheduler_lost("running", RuntimeError("injected fault"))
    assert reconnectable("tcp://127.0.0.1:8786", own_cluster=False)
    assert not reconnectable("tcp://127.0.0.1:8786", own_cluster=True)  # a local or SLURM cluster's own scheduler
    assert not reconnectable(None, own_cluster=False)  # a client closed before the run began: no address kept


def test_the_wait_backs_off_to_its_cap_and_ends_on_its_deadline():
    wait = SchedulerWait(30)
    pauses, now = [], 500.0
    while (pause := wait.failed(now)) is not None:
        pauses.append(pause)
        now += pause
    assert now == 530.0, "the last try falls on the deadline"
    assert pauses[:5] == [0.5, 1.0, 2.0, 4.0, 5.0] and max(pauses) == 5.0
    assert wait.over(now) == 30.0 and wait.over(now + 1) is None
    assert SchedulerWait(0).failed(1.0) is None, "a wait of 0 s gives up after the first try"


class Clock:
    def __init__(self):
        self.now = 0.0

    def sleep(self, seconds: float) -> None:
        self.now += seconds

    def __call__(self) -> float:
        return self.now


def test_reconnect_tries_until_a_scheduler_answers_or_the_wait_is_used_up():
    clock, tries = Clock(), []

    def back_after(seconds: float):
        def connect():
            tries.append(clock.now)
            if clock.now < seconds:
                raise UserError("cannot reach the Dask scheduler at tcp://127.0.0.1:8786: Connection refused")
            return "client"
        return connect

    client, lasted = reconnect(back_after(20), SchedulerWait(300), sleep=clock.sleep, clock=clock)
    assert client == "client" and lasted == 22.5 and tries[-2:] == [17.5, 22.5]  # 0.5 1 2 4 5 5 5: found within 5 s

    clock.now, tries[:] = 1000.0, []
    with pytest.raises(SchedulerGone, match=r"no Dask scheduler answered for 12 s \(cannot reach"):
        reconnect(back_after(float("inf")), SchedulerWait(12), sleep=clock.sleep, clock=clock)
    assert tries[-1] == 1012.0 and clock.now == 1012.0

    def broken():
        raise ValueError("a bug, not an absent scheduler")

    with pytest.raises(ValueError):
        reconnect(broken, SchedulerWait(60), sleep=lambda s: pytest.fail("it waited"), clock=clock)


def test_the_dispatcher_forgets_what_a_lost_scheduler_carried():
    dispatch = Dispatch(capacity=4, claimed=[(9, "/2/1")])
    dispatch.submitted("foldfarm-1-1-1", [(1, "/1", 1), (2, "/2", 1)])
    dispatch.submitted("foldfarm-1-3-2", [(3, "/3", 2)])
    dispatch.done.append("a result not yet recorded")
    assert dispatch.forget() == 4
    assert not dispatch.busy() and dispatch.room() == 4
    assert dispatch.done == ["a result not yet recorded"], "results in hand are recorded, not forgotten"


class Pool:
    """The part of Dask's ``as_completed`` that :func:`foldfarm.run._next_results` uses."""

    def __init__(self, ready=(), flying=0):
        self.ready, self.flying = list(ready), flying
        self.thread_condition = threading.Condition()
        self.waits = 0

    def next_batch(self, block=True):
        assert not block
        out, self.ready = self.ready, []
        return out

    def is_empty(self):
        return not self.ready and not self.flying

    def has_ready(self):
        return bool(self.ready)


class Client:
    def __init__(self, status: str):
        self.status = status


def test_waiting_for_results_ends_when_the_scheduler_is_lost():
    assert _next_results(Pool(ready=[("f", 1)]), Client("running")) == [("f", 1)]
    assert _next_results(Pool(), Client("running")) == [], "an empty pool never blocks"
    # Futures a closed client never settles: Dask's own wait would last for ever.
    assert _next_results(Pool(flying=3), Client("closed")) == []
    client, pool = Client("running"), Pool(flying=3)
    threading.Timer(0.3, lambda: setattr(client, "status", "connecting")).start()
    assert _next_results(pool, client, every=0.05) == []


def test_settings_and_job_files_carry_the_scheduler_wait(tmp_path):
    from foldfarm.job import load_job

    assert Settings().scheduler_wait == 300.0
    assert Settings.from_dict({"store_wait": 10}).scheduler_wait == 300.0, "a run stored before the setting"
    job = tmp_path / "tern.toml"
    job.write_text('shape = "3x8"\nscheduler_wait = 900\n')
    assert load_job(str(job)).settings == {"scheduler_wait": 900}
    job.write_text('shape = "3x8"\nscheduler_wait = "long"\n')
    with pytest.raises(UserError, match="scheduler_wait = 'long' has the wrong type"):
        load_job(str(job))


# ---- a real scheduler killed under a run -------------------------------------------------------

def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return s.getsockname()[1]


class Scheduler:
    """A ``dask scheduler`` on 127.0.0.1:``port`` and single-threaded workers, which can be killed and started again."""

    def __init__(self, port: int, workers: int = 2):
        self.address = f"tcp://127.0.0.1:{port}"
        quiet = {"stdout": subprocess.DEVNULL, "stderr": subprocess.DEVNULL}
        self.scheduler = subprocess.Popen(DASK + ["--host", "127.0.0.1", "--port", str(port), "--no-dashboard"],
                                          **quiet)
        deadline = time.monotonic() + 60
        while True:
            try:
                socket.create_connection(("127.0.0.1", port), timeout=1).close()
                break
            except OSError:
                assert time.monotonic() < deadline and self.scheduler.poll() is None, "scheduler did not start"
                time.sleep(0.1)
        self.workers = [subprocess.Popen(WORKER + [self.address, "--nthreads", "1", "--no-nanny", "--no-dashboard",
                                                   "--host", "127.0.0.1"], **quiet) for _ in range(workers)]
        from distributed import Client

        with Client(self.address, timeout="30s") as client:
            client.wait_for_workers(workers, timeout=60)

    def kill(self) -> None:
        """SIGKILL the scheduler (its workers close by themselves once they cannot reach it)."""
        self.scheduler.kill()
        self.scheduler.wait()

    def close(self) -> None:
        stop_processes(self.workers, self.scheduler, timeout=10)


@pytest.fixture
def port():
    return free_port()


def stderr_lines(text: str) -> list[str]:
    return [line for line in text.strip().splitlines() if line]


@pytest.mark.slow
def test_a_scheduler_back_after_20_s_is_reconnected_and_the_total_is_exact(tmp_path, port):
    first = Scheduler(port)
    second = None
    try:
        url = f"sqlite:///{tmp_path / 'back.sqlite'}"
        proc = start("run", LONG, "--scheduler", first.address, "--store", url, "--task-nodes", LONG_TASK_NODES,
                     "--json", "--quiet")
        wait_for_done(url, 1, 40, proc)
        before = snapshot(url, 1)
        first.kill()
        killed = time.monotonic()
        time.sleep(20)  # beyond Dask's own 10-second reconnect window
        assert proc.poll() is None, "the coordinator gave up within the wait"
        second = Scheduler(port)  # same address, new workers
        back = time.monotonic() - killed
        stdout, stderr = proc.communicate(timeout=300)
        assert proc.returncode == 0, stderr
        assert json.loads(stdout)["count"] == LONG_COUNT, f"{LONG}: OEIS A000136 publishes {LONG_COUNT}"
        lines = stderr_lines(stderr)
        assert len(lines) == 2, stderr
        assert lines[0].startswith(f"foldfarm: lost the Dask scheduler at {first.address}; ") and \
            "trying to reconnect for up to 300 s" in lines[0], stderr
        away = int(lines[1].split("answers again after ")[1].split()[0])
        assert lines[1] == f"foldfarm: the Dask scheduler at {first.address} answers again after {away} s; continuing"
        assert 15 <= away <= back + 10, (away, back)  # gone for 20 s; found within a pause or two of its return
        assert "Traceback" not in stdout + stderr
        assert_partition(url, 1, LONG_COUNT)
        after = snapshot(url, 1)
        assert all(after[p] == before[p] for p in before), "a task recorded before the loss was counted again"
        checked = foldfarm("verify", "1", "--store", url, "--audit", "0", "--json")
        verdict = json.loads(checked.stdout)
        assert checked.returncode == 0 and verdict["passed"] and verdict["total"] == LONG_COUNT, checked.stdout
    finally:
        first.close()
        if second is not None:
            second.close()


@pytest.mark.slow
def test_a_scheduler_not_back_within_the_wait_stops_cleanly_and_resume_gives_the_exact_total(tmp_path, port):
    first = Scheduler(port)
    second = None
    try:
        url = f"sqlite:///{tmp_path / 'gone.sqlite'}"
        proc = start("run", LONG, "--scheduler", first.address, "--store", url, "--task-nodes", LONG_TASK_NODES,
                     "--scheduler-wait", "3", "--json", "--quiet")
        wait_for_done(url, 1, 40, proc)
        first.kill()
        stdout, stderr = proc.communicate(timeout=120)
        assert proc.returncode == 130, stderr  # as Ctrl-C and a store gone for too long
        assert "Traceback" not in stdout + stderr and stdout == "", stdout + stderr
        lines = stderr_lines(stderr)
        assert len(lines) == 3 and all(line.startswith("foldfarm: ") for line in lines), stderr
        assert "lost the Dask scheduler" in lines[0] and "trying to reconnect for up to 3 s" in lines[0], stderr
        assert "no Dask scheduler answered for 3 s" in lines[1] and lines[1].endswith("stopping run 1"), stderr
        assert lines[2] == f"foldfarm: stopped run 1; resume with: foldfarm resume 1 --store {url} " \
                           f"--scheduler {first.address}", stderr
        with Store(url) as store:
            assert store.get_run(1).state == "stopped" and store.progress(1).tasks["running"] == 0
            assert store.lease(1) is None
        before = snapshot(url, 1)

        second = Scheduler(port)
        out = foldfarm("resume", "1", "--scheduler", second.address, "--store", url, "--json", "--quiet")
        assert out.returncode == 0, out.stderr
        assert json.loads(out.stdout)["count"] == LONG_COUNT, f"{LONG}: OEIS A000136 publishes {LONG_COUNT}"
        assert_partition(url, 1, LONG_COUNT)
        after = snapshot(url, 1)
        assert len(before) >= 40 and all(after[p] == before[p] for p in before), "a recorded task was counted again"
    finally:
        first.close()
        if second is not None:
            second.close()


def _drive_and_lose_the_local_scheduler(url: str) -> tuple[list[str], float]:
    """Drive LONG on a local cluster, close its scheduler once 40 tasks are done; the notices, the stop's delay."""
    from foldfarm import run as runner

    said, lost = [], []
    with Store(url, create=True) as store:
        client, cluster = runner.connect(None, 2)
        try:
            run = runner.create(store, LONG, Settings(task_nodes=int(LONG_TASK_NODES), audit=0.0), 2)

            def progress(tally) -> None:
                if tally.done >= 40 and not lost:
                    lost.append(time.monotonic())
                    cluster.sync(cluster.scheduler.close)

            with pytest.raises(runner.Stopped):
                runner.drive(store, client, run, on_progress=progress, on_notice=said.append)
            stopped = time.monotonic() - lost[0]
        finally:
            runner.disconnect(client, cluster)
    return said, stopped


@pytest.mark.slow
def test_a_local_cluster_that_loses_its_scheduler_stops_at_once_and_resumes(tmp_path):
    url = f"sqlite:///{tmp_path / 'local.sqlite'}"
    said, stopped = _drive_and_lose_the_local_scheduler(url)
    assert len(said) == 1, said
    assert said[0].startswith("foldfarm: lost the Dask scheduler of the cluster foldfarm started"), said
    assert said[0].endswith("stopping run 1") and stopped < 30, (said, stopped)  # no wait: nothing to reconnect to
    with Store(url) as store:
        assert store.get_run(1).state == "stopped" and store.progress(1).tasks["running"] == 0
        assert store.lease(1) is None
    out = foldfarm("resume", "1", "--workers", "2", "--store", url, "--json", "--quiet")
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout)["count"] == LONG_COUNT, f"{LONG}: OEIS A000136 publishes {LONG_COUNT}"
    assert_partition(url, 1, LONG_COUNT)



@pytest.mark.slow
def test_a_scheduler_lost_while_the_run_is_planned_is_one_line(tmp_path, port):
    """The plan is made on a worker: a scheduler lost meanwhile ends the command in one line, nothing half-stored."""
    first = Scheduler(port)
    try:
        url = f"sqlite:///{tmp_path / 'plan.sqlite'}"
        proc = start("run", "7x7", "--tasks", "200000", "--scheduler", first.address, "--store", url,
                     "--scheduler-wait", "0")
        time.sleep(3)
        first.kill()
        stdout, stderr = proc.communicate(timeout=120)
    finally:
        first.close()
    assert proc.returncode == 130 and "Traceback" not in stdout + stderr, stdout + stderr
    lines = stderr_lines(stderr)
    with Store(url) as store:
        runs = store.list_runs()
        if lines == [f"foldfarm: lost the Dask scheduler at {first.address} before the run was planned; "
                     "nothing was stored"]:
            assert runs == []
        else:  # planned before the scheduler went: the loop's clean stop
            assert "lost the Dask scheduler" in lines[0] and "resume with: foldfarm resume 1" in lines[-1], stderr
            assert store.progress(1).tasks["running"] == 0 and store.lease(1) is None

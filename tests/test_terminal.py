"""What a researcher sees in a terminal: Ctrl-C, a wrong port, the verdict of a run.

Real processes throughout: the command runs in a pseudo-terminal, and
Ctrl-C is the byte a keyboard sends (``\\x03``), which the terminal turns into
SIGINT for its whole foreground process group, local workers included.
"""

from __future__ import annotations

import http.server
import os
import pty
import signal
import socket
import sys
import threading
import time
from pathlib import Path

import pytest
from test_cluster import LONG, LONG_COUNT, LONG_TASK_NODES, Cluster, assert_partition, foldfarm, wait_for_done

from foldfarm.store import Store

pytestmark = pytest.mark.slow


class Terminal:
    """``foldfarm ARGS`` in a pseudo-terminal of its own, its output collected as it comes."""

    def __init__(self, *args: str):
        self.pid, self.fd = pty.fork()
        if self.pid == 0:  # the child: a session leader with the pty as its controlling terminal
            try:
                os.execv(sys.executable, [sys.executable, "-m", "foldfarm", *args])
            finally:
                os._exit(127)
        self.output = bytearray()
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()

    def _read(self) -> None:
        while True:
            try:
                chunk = os.read(self.fd, 65536)
            except OSError:  # EIO: the last process holding the terminal has gone
                return
            if not chunk:
                return
            self.output += chunk

    def ctrl_c(self) -> None:
        os.write(self.fd, b"\x03")

    def wait(self, timeout: float = 120) -> int:
        """The exit code (130 after SIGINT handled as a clean stop); kills the group on a hang."""
        deadline = time.monotonic() + timeout
        while time.monotonic() < deadline:
            pid, status = os.waitpid(self.pid, os.WNOHANG)
            if pid:
                self.reader.join(timeout=10)
                os.close(self.fd)
                return os.waitstatus_to_exitcode(status)
            time.sleep(0.05)
        os.killpg(self.pid, signal.SIGKILL)
        raise AssertionError(f"foldfarm did not end after Ctrl-C; it printed:\n{self.text}")

    @property
    def text(self) -> str:
        return self.output.decode(errors="replace")


class _Running:
    """What :func:`wait_for_done` needs of a process: whether it still runs."""

    def __init__(self, pid: int):
        self.pid = pid

    def poll(self) -> int | None:
        try:
            os.kill(self.pid, 0)
        except ProcessLookupError:
            return 1
        return None


def ctrl_c_then_resume(tmp_path: Path, *where: str) -> str:
    """Start LONG, press Ctrl-C once some tasks are done, check the screen, resume; return the screen."""
    url = f"sqlite:///{tmp_path / 'terminal.sqlite'}"
    term = Terminal("run", LONG, "--store", url, "--task-nodes", LONG_TASK_NODES, *where)
    wait_for_done(url, 1, 40, _Running(term.pid))
    term.ctrl_c()
    code = term.wait()
    screen = term.text
    assert code == 130, screen
    assert f"resume with: foldfarm resume 1 --store {url} {' '.join(where)}\r\n" in screen, screen  # same cluster
    assert "Traceback" not in screen and "warning" not in screen.lower() and "KeyboardInterrupt" not in screen, screen
    with Store(url) as store:
        assert store.get_run(1).state == "stopped" and store.progress(1).tasks["running"] == 0

    out = foldfarm("resume", "1", "--store", url, "--quiet", *where)
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == str(LONG_COUNT), f"{LONG}: OEIS A000136 publishes {LONG_COUNT}"
    assert_partition(url, 1, LONG_COUNT)
    return screen


def test_ctrl_c_in_a_terminal_stops_a_local_run_cleanly(tmp_path):
    ctrl_c_then_resume(tmp_path, "--workers", "2")


def test_ctrl_c_in_a_terminal_stops_a_run_on_a_scheduler_cleanly(tmp_path):
    from distributed import Client

    cluster = Cluster(tmp_path / "dask")
    try:
        ctrl_c_then_resume(tmp_path, "--scheduler", cluster.address)
        with Client(cluster.address, timeout="30s") as client:
            worker = sorted(client.scheduler_info()["workers"])[0]
        out = foldfarm("run", "3x3", "--scheduler", worker, "--store", f"sqlite:///{tmp_path / 'w.sqlite'}")
        assert out.returncode == 2 and out.stderr.strip().splitlines() == [
            f"foldfarm: {worker} does not answer as a Dask scheduler (it is a Dask worker, not the scheduler); "
            "check the address and port (a scheduler listens on 8786 unless told otherwise)"], out.stderr
    finally:
        cluster.close()


class _Quiet(http.server.SimpleHTTPRequestHandler):
    def log_message(self, *args) -> None:
        pass


def _http_server():
    """A real HTTP server (the standard library's), as on a port mistaken for the scheduler's."""
    server = http.server.ThreadingHTTPServer(("127.0.0.1", 0), _Quiet)
    threading.Thread(target=server.serve_forever, daemon=True).start()
    return server.shutdown, server.server_address[1]


def _hang_up_server():
    """A server that accepts every connection and closes it at once."""
    listener = socket.create_server(("127.0.0.1", 0))

    def serve() -> None:
        while True:
            try:
                conn, _ = listener.accept()
            except OSError:
                return
            conn.close()

    threading.Thread(target=serve, daemon=True).start()
    return listener.close, listener.getsockname()[1]


@pytest.mark.parametrize("server", [_http_server, _hang_up_server], ids=["http", "hang-up"])
def test_a_port_that_is_not_a_scheduler_is_one_line(tmp_path, server):
    stop, port = server()
    try:
        store = tmp_path / "never.sqlite"
        out = foldfarm("run", "3x3", "--scheduler", f"tcp://127.0.0.1:{port}", "--store", f"sqlite:///{store}",
                       timeout=60)
    finally:
        stop()
    assert out.returncode == 2, out.stderr
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and f"tcp://127.0.0.1:{port} does not answer as a Dask scheduler" in lines[0], out.stderr
    assert out.stdout == "" and not store.exists()  # nothing written: no store was even created


def test_a_finished_run_says_it_was_verified(tmp_path):
    out = foldfarm("run", "3x4", "--workers", "1", "--store", f"sqlite:///{tmp_path / 'ok.sqlite'}")
    assert out.returncode == 0, out.stderr
    assert out.stdout.strip() == "15552"  # OEIS A001416, 3x4
    assert out.stderr.strip().splitlines()[-1] == (
        "run 1: verified: total, completeness, divisibility, audit, published, certificate passed"), out.stderr


def test_a_run_whose_checks_fail_names_them_and_exits_1(tmp_path):
    """Half a run counted, one recorded count tampered with, the rest counted by ``foldfarm resume``."""
    from sqlalchemy import update

    from foldfarm import run as runner
    from foldfarm.store.models import Task
    from foldfarm.symmetry import tree_of
    from foldfarm.worker import work

    url = f"sqlite:///{tmp_path / 'tampered.sqlite'}"
    with Store(url) as store:
        run_id = runner.create(store, "3x4", runner.Settings(tasks=20, audit=0.0), threads=1)
        store.set_run_state(run_id, "running")
        half = store.next_pending(run_id, 10)
        store.mark_running([t.id for t in half])
        tree = tree_of(store.get_run(run_id).settings)
        for task, got in zip(half, work((3, 4), [t.prefix for t in half], 0, 0, tree=tree)):
            store.record_done(task.id, got["count"], got["nodes"], got["seconds"])
        store.set_run_state(run_id, "stopped")
        with store.engine.begin() as conn:  # a flipped bit in one recorded count
            conn.execute(update(Task).where(Task.id == half[0].id).values(count=Task.count + 1))
    out = foldfarm("resume", str(run_id), "--workers", "1", "--store", url)
    assert out.returncode == 1, out.stderr
    # The total is the one the store kept as results came in (OEIS A001416 publishes 15552 for 3x4); the
    # edited row sums to one more, and the checks, which add up the rows, say so.
    assert out.stdout.strip() == "15552"
    lines = out.stderr.strip().splitlines()
    verdict = lines.index(f"run {run_id}: suspect: total, divisibility, published failed")
    assert [line.split()[:2] for line in lines[verdict + 1:]] == \
        [["FAIL", "total"], ["FAIL", "divisibility"], ["FAIL", "published"]]


@pytest.mark.parametrize("after", [1.0, 3.0])
def test_ctrl_c_while_a_run_starts_is_one_line(tmp_path, after):
    """Whatever phase Ctrl-C meets (imports, the cluster's start, planning): one line, exit 130, nothing half-done."""
    url = f"sqlite:///{tmp_path / 'start.sqlite'}"
    term = Terminal("run", "7x7", "--tasks", "200000", "--store", url)
    time.sleep(after)
    term.ctrl_c()
    code = term.wait()
    said = [line.removeprefix("^C") for line in term.text.splitlines()]  # the terminal echoes the key as ^C
    lines = [line for line in said if line.startswith("foldfarm: ")]
    assert code == 130 and len(lines) == 1 and ("interrupted" in lines[0] or "stopped run 1" in lines[0]), term.text
    assert "Traceback" not in term.text and "warning" not in term.text.lower(), term.text
    if (tmp_path / "start.sqlite").exists():
        with Store(url) as store:
            assert all(store.progress(r.id).tasks["running"] == 0 for r in store.list_runs())

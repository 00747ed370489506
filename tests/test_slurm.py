"""Runs through a real SLURM: worker jobs through dask-jobqueue, and the coordinator as a batch job.

Needs a SLURM that takes jobs on this machine: ``bash deploy/slurm-single-node.sh``
(as root) starts a one-node one on loopback; ``.ci/run`` does, and sets
``FOLDFARM_TEST_SLURM=1``, which turns a missing SLURM into a failure
instead of a skip.  Every listener stays on 127.0.0.1: the scheduler and its
dashboard, and each worker, nanny and worker dashboard (set below through
dask-jobqueue's own configuration, as a user would).  Every run ends with
the published total (OEIS A000136, LONG of test_cluster) and a store whose done tasks
partition the tree.
"""

from __future__ import annotations

import json
import os
import shutil
import signal
import subprocess
import sys
import time
import uuid
from pathlib import Path

import pytest

from foldfarm.batch import generic_script
from test_cluster import LONG, LONG_COUNT, LONG_TASK_NODES, assert_partition, snapshot, wait_for_done

#: Long enough that a worker job cancelled after the first result is replaced before the run ends on a
#: busy machine (1x22 sometimes finished first): OEIS A000136 publishes 77692142980 for 1x23.
LONGER, LONGER_COUNT = "1x23", 77692142980

SLURM_ENV = "FOLDFARM_TEST_SLURM"
ROOT = Path(__file__).resolve().parent.parent
HOW = ("start a one-node SLURM on loopback with `sudo bash deploy/slurm-single-node.sh` "
       f"(set {SLURM_ENV}=1 to make a missing SLURM fail these tests instead)")


def slurm_takes_jobs() -> str | None:
    """None if a SLURM partition here has a node that takes jobs, else why not."""
    if shutil.which("sinfo") is None or shutil.which("sbatch") is None:
        return "SLURM is not installed"
    if not os.path.exists(os.environ.get("SLURM_CONF", "/etc/slurm/slurm.conf")):
        return "SLURM has no slurm.conf here"  # (without one, its commands would ask DNS where the controller is)
    try:
        import dask_jobqueue  # noqa: F401
    except ImportError:
        return "dask-jobqueue is not installed (pip install '.[slurm]')"
    out = subprocess.run(["sinfo", "--noheader", "--format", "%t"], capture_output=True, text=True)
    if out.returncode != 0:
        return f"SLURM does not answer ({out.stderr.strip()[:80]})"
    if not any(state.startswith(("idle", "mix", "alloc")) for state in out.stdout.split()):
        return f"no SLURM node takes jobs (states: {' '.join(out.stdout.split()) or 'none'})"
    return None


@pytest.fixture(scope="module")
def slurm():
    why = slurm_takes_jobs()
    if why is not None:
        if os.environ.get(SLURM_ENV):
            pytest.fail(f"{why}; {SLURM_ENV} is set, so these tests must run: {HOW}")
        pytest.skip(f"{why}: {HOW}")


@pytest.fixture
def slurm_env(tmp_path):
    """The environment of a user whose Dask config keeps every listener on loopback; a job name of this test's own."""
    name = f"ff-test-{uuid.uuid4().hex[:6]}"
    logs = tmp_path / "logs"
    logs.mkdir()
    env = dict(os.environ)
    env.update({
        "DASK_JOBQUEUE__SLURM__NAME": name,
        "DASK_JOBQUEUE__SLURM__CORES": "1",
        "DASK_JOBQUEUE__SLURM__WALLTIME": "00:10:00",
        "DASK_JOBQUEUE__SLURM__LOG_DIRECTORY": str(logs),
        "DASK_JOBQUEUE__SLURM__LOCAL_DIRECTORY": str(tmp_path),
        "DASK_JOBQUEUE__SLURM__SHARED_TEMP_DIRECTORY": str(tmp_path),
        "DASK_JOBQUEUE__SLURM__SCHEDULER_OPTIONS": '{"host": "127.0.0.1", "dashboard_address": "127.0.0.1:0"}',
        "DASK_JOBQUEUE__SLURM__WORKER_EXTRA_ARGS": '["--host", "127.0.0.1", "--dashboard-address", "127.0.0.1:0"]',
        # A worker job that ends is replaced this long after its worker left (Dask's default is 15 s).
        "DASK_DISTRIBUTED__DEPLOY__LOST_WORKER_TIMEOUT": "2s",
    })
    env["FOLDFARM_TEST_JOB_NAME"] = name
    return env


def jobs_named(name: str, states: str = "PENDING,RUNNING") -> list[int]:
    out = subprocess.run(["squeue", "--noheader", "--name", name, "--states", states, "--format", "%i"],
                         capture_output=True, text=True, check=True)
    return sorted(int(j) for j in out.stdout.split())


def foldfarm(*args: str, env: dict, cwd=None, timeout: float = 120) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "foldfarm", *args], capture_output=True, text=True, env=env,
                          cwd=cwd, timeout=timeout)


@pytest.mark.slow
def test_a_cancelled_worker_job_is_replaced_and_the_total_is_exact(slurm, slurm_env, tmp_path):
    name = slurm_env["FOLDFARM_TEST_JOB_NAME"]
    url = f"sqlite:///{tmp_path / 'slurm.sqlite'}"
    proc = subprocess.Popen([sys.executable, "-m", "foldfarm", "run", LONGER, "--cluster", "slurm", "--jobs", "2",
                             "--job-memory", "1GB", "--store", url, "--task-nodes", LONG_TASK_NODES, "--json", "--quiet"],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True, env=slurm_env, cwd=tmp_path)
    try:
        wait_for_done(url, 1, 40, proc)
        first = jobs_named(name)
        assert len(first) == 2, first
        subprocess.run(["scancel", str(first[0])], check=True)
        deadline = time.monotonic() + 60
        while not (replacements := [j for j in jobs_named(name) if j not in first]):
            assert time.monotonic() < deadline, "SLURM was never asked for a replacement job"
            assert proc.poll() is None, "the run ended before a replacement was asked for"
            time.sleep(0.2)
        stdout, stderr = proc.communicate(timeout=300)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
    assert proc.returncode == 0, stderr
    assert json.loads(stdout)["count"] == LONGER_COUNT, f"{LONGER}: OEIS A000136 publishes {LONGER_COUNT}"
    assert replacements[0] > first[1]
    assert_partition(url, 1, LONGER_COUNT)
    deadline = time.monotonic() + 30
    while jobs_named(name):  # the coordinator ended its worker jobs on the way out
        assert time.monotonic() < deadline, jobs_named(name)
        time.sleep(0.2)


@pytest.mark.slow
def test_the_coordinator_job_stops_before_its_walltime_and_its_requeued_job_finishes_the_run(slurm, slurm_env,
                                                                                             tmp_path):
    url = f"sqlite:///{tmp_path / 'requeue.sqlite'}"
    script = tmp_path / "tern.sbatch"
    made = foldfarm("run", LONG, "--cluster", "slurm", "--jobs", "2", "--job-memory", "1GB", "--store", url,
                    "--task-nodes", LONG_TASK_NODES, "--json", "--quiet", "--sbatch", str(script), env=slurm_env,
                    cwd=tmp_path)
    assert made.returncode == 0, made.stderr
    assert "sbatch" in made.stderr and not made.stdout
    text = script.read_text()
    assert "#SBATCH --requeue" in text and "#SBATCH --signal=B:TERM@300" in text and "--sbatch" not in text
    name = f"ff-coord-{uuid.uuid4().hex[:6]}"
    submitted = subprocess.run(["sbatch", "--parsable", f"--job-name={name}", str(script)], capture_output=True,
                               text=True, env=slurm_env, cwd=tmp_path, check=True)
    job = int(submitted.stdout.strip().split(";")[0])
    try:
        deadline = time.monotonic() + 60
        while not (tmp_path / f"foldfarm-job-{job}.run").exists():  # planned: the run has its id
            assert time.monotonic() < deadline, (tmp_path / f"{name}-{job}.out").read_text()
            time.sleep(0.2)
        run_id = int((tmp_path / f"foldfarm-job-{job}.run").read_text())
        wait_for_done(url, run_id, 40, _Running(job))
        before = snapshot(url, run_id)
        # What SLURM does minutes before the walltime: SIGTERM to the batch shell alone.
        subprocess.run(["scancel", "--signal=TERM", "--batch", str(job)], check=True)
        deadline = time.monotonic() + 180
        while _state(job) not in ("COMPLETED", "FAILED", "CANCELLED", "TIMEOUT"):
            assert time.monotonic() < deadline, _state(job)
            time.sleep(0.5)
    finally:
        subprocess.run(["scancel", str(job)], capture_output=True)
    log = (tmp_path / f"{name}-{job}.out").read_text()
    assert _state(job) == "COMPLETED", log
    assert "start 1 on" in log and "start 2 on" in log and "requeued" in log, log
    assert f"resume with: foldfarm resume {run_id}" in log, log
    assert json.loads(log.strip().splitlines()[-1])["count"] == LONG_COUNT, log  # OEIS A000136
    assert_partition(url, run_id, LONG_COUNT)
    after = snapshot(url, run_id)
    assert all(after[p] == before[p] for p in before), "a task recorded done was counted again"


class _Running:
    """Stands in for a Popen in wait_for_done: "running" while the SLURM job is not finished."""

    def __init__(self, job: int):
        self.job = job

    def poll(self):
        return None if _state(self.job) in ("PENDING", "RUNNING", "REQUEUED", "CONFIGURING") else 0


def _state(job: int) -> str:
    out = subprocess.run(["scontrol", "show", "job", str(job)], capture_output=True, text=True)
    for field in out.stdout.split():
        if field.startswith("JobState="):
            return field.split("=", 1)[1]
    return "GONE"


# ---- bad values: one line, exit 2 -------------------------------------------------------------

def one_line(out: subprocess.CompletedProcess, *words: str) -> None:
    assert out.returncode == 2, (out.returncode, out.stderr)
    assert out.stderr.count("\n") == 1 and "Traceback" not in out.stderr, out.stderr
    for word in words:
        assert word in out.stderr, out.stderr


def test_an_unknown_partition_is_one_line(slurm, slurm_env, tmp_path):
    out = foldfarm("run", "2x3", "--cluster", "slurm", "--jobs", "1", "--job-memory", "1GB", "--partition",
                   "no-such-partition", "--store", f"sqlite:///{tmp_path / 'x.sqlite'}", env=slurm_env, cwd=tmp_path)
    one_line(out, "no partition 'no-such-partition'")
    assert not (tmp_path / "x.sqlite").exists(), "checked before the store opens"


def test_no_slurm_on_the_machine_is_one_line(tmp_path):
    pytest.importorskip("dask_jobqueue")
    env = {**os.environ, "PATH": str(tmp_path), "DASK_JOBQUEUE__SLURM__CORES": "1"}
    out = foldfarm("run", "2x3", "--cluster", "slurm", "--jobs", "1", "--job-memory", "1GB",
                   "--store", f"sqlite:///{tmp_path / 'x.sqlite'}", env=env, cwd=tmp_path)
    one_line(out, "no sbatch")
    assert not (tmp_path / "x.sqlite").exists(), "checked before the store opens"


@pytest.mark.parametrize("args, words", [
    (["--cluster", "slurm", "--jobs", "0"], ["--jobs must be N or MIN:MAX"]),
    (["--cluster", "slurm", "--jobs", "3:1"], ["--jobs must be N or MIN:MAX"]),
    (["--cluster", "slurm"], ["--cluster slurm needs --jobs"]),
    (["--jobs", "2"], ["--jobs", "--cluster slurm"]),
    (["--cluster", "pbs"], ["--cluster must be local or slurm"]),
    (["--cluster", "slurm", "--jobs", "1", "--workers", "2"], ["--workers"]),
    (["--cluster", "slurm", "--jobs", "1", "--scheduler", "tcp://127.0.0.1:1"], ["--scheduler"]),
    (["--cluster", "slurm", "--jobs", "1", "--job-cores", "0"], ["--job-cores"]),
])
def test_bad_cluster_options_are_one_line(args, words, tmp_path):
    out = foldfarm("run", "2x3", *args, "--store", f"sqlite:///{tmp_path / 'x.sqlite'}", env=dict(os.environ))
    one_line(out, *words)
    assert not (tmp_path / "x.sqlite").exists(), "nothing is stored for a command that fails its arguments"


def test_plain_tcp_beyond_loopback_is_refused_before_anything_listens(tmp_path):
    pytest.importorskip("dask_jobqueue")
    env = {**os.environ, "DASK_JOBQUEUE__SLURM__CORES": "1", "DASK_JOBQUEUE__SLURM__MEMORY": "1GB",
           "DASK_JOBQUEUE__SLURM__SCHEDULER_OPTIONS": '{"protocol": "tcp://", "host": "0.0.0.0"}'}
    out = foldfarm("run", "2x3", "--cluster", "slurm", "--jobs", "1", "--store",
                   f"sqlite:///{tmp_path / 'x.sqlite'}", env=env)
    one_line(out, "will not start a scheduler without TLS on 0.0.0.0", "--insecure-plain-tcp")
    assert not (tmp_path / "x.sqlite").exists(), "checked before the store opens"


def test_the_deploy_script_is_the_generic_coordinator_script():
    assert (ROOT / "deploy" / "slurm-coordinator.sh").read_text() == generic_script()
    assert subprocess.run(["bash", "-n", str(ROOT / "deploy" / "slurm-coordinator.sh")]).returncode == 0


def test_the_batch_script_forwards_the_stop_and_requeues_only_after_a_clean_stop(tmp_path):
    """The script's own logic, without SLURM: a stand-in coordinator, and scontrol recorded instead of run."""
    bin_dir = tmp_path / "bin"
    bin_dir.mkdir()
    (bin_dir / "scontrol").write_text(f"#!/bin/sh\necho \"$@\" >> {tmp_path / 'scontrol.log'}\n")
    (bin_dir / "scontrol").chmod(0o755)
    stand_in = tmp_path / "stand_in.py"
    stand_in.write_text("import signal, sys, time\n"
                        "signal.signal(signal.SIGTERM, lambda *a: sys.exit(130))\n"
                        "print('args', sys.argv[1:], flush=True)\n"
                        "time.sleep(float(sys.argv[1]))\n")
    env = {**os.environ, "PATH": f"{bin_dir}:{os.environ['PATH']}", "SLURM_JOB_ID": "77"}
    script = generic_script().replace('"${FOLDFARM_PYTHON:-python3}" -m foldfarm run', f"{sys.executable} {stand_in}")

    finished = subprocess.run(["bash", "-c", script, "batch", "0"], capture_output=True, text=True, env=env,
                              cwd=tmp_path, timeout=30)
    assert finished.returncode == 0 and "--run-file" in finished.stdout and "foldfarm-job-77.run" in finished.stdout
    assert not (tmp_path / "scontrol.log").exists()

    stopped = subprocess.Popen(["bash", "-c", script, "batch", "30"], stdout=subprocess.PIPE, text=True, env=env,
                               cwd=tmp_path)
    time.sleep(1.0)
    stopped.send_signal(signal.SIGTERM)
    out, _ = stopped.communicate(timeout=30)
    assert stopped.returncode == 130, out
    assert (tmp_path / "scontrol.log").read_text().split() == ["requeue", "77"]

"""The coordinator's decisions, without a cluster or a database."""

from __future__ import annotations

import pytest
from hypothesis import given
from hypothesis import strategies as st

from foldfarm.job import JobError, is_job_file, load_job
from foldfarm.run import (BUNDLE_MAX, Dispatch, Settings, Tally, bundle_size, classify_failure, eta_seconds,
                          in_order, needs_plan, plan_jobs, stale_lease, target_tasks)
from foldfarm.store import Progress


class KilledWorker(Exception):  # same name as distributed's: classified by name
    pass


def test_lost_worker_is_retried_until_attempts_run_out():
    assert classify_failure(KilledWorker("x"), attempts=1, max_attempts=3) == "retry"
    assert classify_failure(KilledWorker("x"), attempts=3, max_attempts=3) == "fail"
    assert classify_failure(ValueError("bug"), attempts=1, max_attempts=3) == "fail"


def test_stale_lease_only_for_a_dead_process_on_this_host():
    alive = {100}
    assert stale_lease("node7:200", "node7", lambda pid: pid in alive)
    assert not stale_lease("node7:100", "node7", lambda pid: pid in alive)
    assert not stale_lease("node8:200", "node7", lambda pid: pid in alive)  # another host: cannot tell
    assert not stale_lease("node7", "node7", lambda pid: False)


def test_plan_is_stored_again_only_when_it_never_landed():
    assert needs_plan("planned", 0)
    assert not needs_plan("planned", 10)
    assert not needs_plan("running", 0)


class FakeJob:
    """A planning job with a future's result() and cancel(), logging what the coordinator does."""

    def __init__(self, job, log):
        self.job, self.log = job, log
        log.append(("submit", job[0][0]))

    def result(self):
        self.log.append(("result", self.job[0][0]))
        return [f"{root}/{i + 1}" for root, n in self.job for i in range(n)]

    def cancel(self):
        self.log.append(("cancel", self.job[0][0]))


@given(st.lists(st.integers(1, 30), min_size=1, max_size=40), st.integers(1, 100), st.integers(1, 6))
def test_plan_jobs_stream_in_order_with_few_out(sizes, job_tasks, inflight):
    pieces = [(f"/{i + 1}", n) for i, n in enumerate(sizes)]
    jobs = plan_jobs(pieces, job_tasks)
    assert [p for job in jobs for p in job] == pieces and all(jobs)
    assert all(sum(n for _, n in job[:-1]) < job_tasks for job in jobs)  # a job closes once it has enough
    log = []
    got = list(in_order(jobs, lambda job: FakeJob(job, log), inflight))
    assert got == [f"{root}/{i + 1}" for root, n in pieces for i in range(n)]
    out = 0
    for event, _ in log:  # never more than `inflight` jobs submitted and not yet taken
        out += 1 if event == "submit" else -1
        assert 0 <= out <= inflight


def test_plan_stream_closed_early_cancels_what_is_out():
    log = []
    jobs = plan_jobs([(f"/{i + 1}", 2) for i in range(10)], job_tasks=2)
    stream = in_order(jobs, lambda job: FakeJob(job, log), 3)
    assert next(stream) == "/1/1"
    stream.close()
    assert [e for e in log if e[0] == "cancel"] == [("cancel", "/2"), ("cancel", "/3"), ("cancel", "/4")]


def test_target_tasks():
    assert target_tasks(Settings(tasks=10), threads=2) == 10
    assert target_tasks(Settings(), threads=2) == 256
    assert target_tasks(Settings(), threads=100) == 6400


def test_settings_round_trip_ignores_unknown_keys():
    s = Settings(task_seconds=5, task_nodes=7, tasks=9)
    assert Settings.from_dict({**s.to_dict(), "estimated_nodes": 1e9}) == s


@given(st.one_of(st.none(), st.floats(min_value=0, max_value=1e4, allow_nan=False)))
def test_bundle_size_is_bounded(mean):
    size = bundle_size(mean)
    assert 1 <= size <= BUNDLE_MAX
    if mean is not None and mean >= 1:
        assert size == 1  # real tasks travel alone


@given(st.floats(min_value=1e-6, max_value=10.0), st.integers(1, 10**6), st.integers(1, 64))
def test_no_bundle_takes_more_than_its_share_of_the_unsent_work(mean, unsent, capacity):
    d = Dispatch(capacity=capacity, mean_seconds=mean)
    d.claimed = [(i, f"/{i}") for i in range(1, min(unsent, 5000) + 1)]
    share = -(-unsent // capacity)
    sizes = [len(b) for b in d.bundles(unsent)]
    assert sizes and all(1 <= n <= min(share, bundle_size(mean)) for n in sizes)


def test_last_bundles_shrink_so_the_threads_finish_together():
    def sizes(unsent: int) -> list[int]:
        d = Dispatch(capacity=8, mean_seconds=0.01)  # a bundle of BUNDLE_SECONDS would hold 100 of these
        d.claimed = [(i, f"/{i}") for i in range(1, unsent + 1)]
        return [len(b) for b in d.bundles(unsent)]

    assert sizes(1000) == [100] * 8  # plenty left: bundles of BUNDLE_SECONDS of work
    assert sizes(200) == [25] * 8  # the last 200 spread over every slot of the window
    assert sizes(5) == [1] * 5  # the very last ones travel alone


@given(st.lists(st.integers(0, 5), max_size=40), st.integers(1, 6))
def test_dispatch_never_exceeds_capacity_and_loses_no_task(answers, capacity):
    d = Dispatch(capacity=capacity, mean_seconds=0.01)
    d.claimed = [(i, f"/{i}") for i in range(1, 200)]
    seen = set()
    key = 0
    for a in answers:
        for bundle in d.bundles():
            key += 1
            d.submitted(str(key), bundle)
        assert len(d.flying) <= capacity
        for k in list(d.flying)[:a]:
            for task_id, _, _ in d.answered(k):
                assert task_id not in seen
                seen.add(task_id)
    in_flight = {t for b in d.flying.values() for t, _, _ in b}
    claimed = {t for t, _ in d.claimed}
    assert seen | in_flight | claimed == set(range(1, 200))
    assert not (seen & in_flight) and not (in_flight & claimed) and not (seen & claimed)


def test_flush_policy():
    d = Dispatch(capacity=2, last_flush=100.0)
    assert not d.should_flush(1000.0, idle=True)  # nothing to record
    d.done = [object()]
    assert d.should_flush(100.1, idle=True)
    assert not d.should_flush(100.1, idle=False)
    assert d.should_flush(100.6, idle=False)


def test_tally_and_eta():
    p = Progress(run_id=1, shape="3x8", state="running", tasks={"pending": 3, "running": 0, "done": 1, "split": 0,
                                                                    "failed": 0}, counted=10, nodes=100)
    t = Tally.start(p, estimated_nodes=1100.0)
    t.started -= 10.0
    t.answered({"count": 5, "nodes": 100, "remainder": ["/1/2", "/1/3"]})
    assert (t.known, t.done, t.counted, t.nodes) == (6, 2, 15, 200)
    assert t.open() == 4  # the 3 pending and the 2 remainder tasks, less the one answered
    assert t.rate() == pytest.approx(10.0, rel=0.01)
    assert t.eta() == pytest.approx(90.0, rel=0.01)
    assert eta_seconds(None, 0, 5.0) is None and eta_seconds(10.0, 0, 0.0) is None


# ---- job files ---------------------------------------------------------------------------

def test_job_file(tmp_path):
    path = tmp_path / "tern.toml"
    path.write_text('name = "tern"\nshape = "3x8"\ntask_seconds = 30\nworkers = 2\n')
    job = load_job(str(path))
    assert is_job_file(str(path)) and not is_job_file("3x8")
    assert (job.shape, job.name, job.workers, job.settings) == ("3x8", "tern", 2, {"task_seconds": 30})


@pytest.mark.parametrize("text, why", [
    ("shape = ", "not valid TOML"),
    ('shape = "3x"', "side is missing"),
    ('name = "x"', "has no shape"),
    ('shape = "3x8"\nbudget = 5', "unknown key 'budget'"),
    ('shape = "3x8"\nworkers = "two"', "wrong type"),
    ('shape = "3x8"\ntask_seconds = true', "wrong type"),
])
def test_bad_job_files(tmp_path, text, why):
    path = tmp_path / "bad.toml"
    path.write_text(text)
    with pytest.raises(JobError, match=why):
        load_job(str(path))


def test_missing_job_file(tmp_path):
    with pytest.raises(JobError, match="does not exist"):
        load_job(str(tmp_path / "nope.toml"))


def test_shipped_job_files_load():
    from pathlib import Path

    jobs = sorted(Path(__file__).resolve().parents[1].joinpath("jobs").glob("*.toml"))
    assert jobs
    for path in jobs:
        assert load_job(str(path)).shape


def test_heartbeat_beats_and_reports_a_lost_lease():
    import time

    from foldfarm.run import Heartbeat
    from foldfarm.store import LeaseLost

    class FakeStore:
        beats = 0

        def heartbeat(self, run_id, holder):
            self.beats += 1
            if self.beats >= 3:
                raise LeaseLost(f"run {run_id} is now driven by someone else")

    fake = FakeStore()
    heart = Heartbeat(fake, 7, "here:1", every=0.01)
    deadline = time.monotonic() + 5
    while heart.lost is None and time.monotonic() < deadline:
        time.sleep(0.01)
    heart.stop()
    assert fake.beats == 3
    with pytest.raises(LeaseLost, match="run 7"):
        heart.check()

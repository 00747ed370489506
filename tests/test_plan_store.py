"""A run's plan lands in the store streamed, in one transaction: all of it, or none and resume plans again.

Planned in this process (no cluster): :func:`foldfarm.run.create` runs the
same piecewise plan and job stream a cluster does, the jobs computed here.
"""

from __future__ import annotations

import pytest

from foldfarm import run, worker
from foldfarm.kernel import count_below, prepare
from foldfarm.plan import COARSE, plan_stream
from foldfarm.prefix import parse_prefix
from foldfarm.published import published

TARGET = COARSE + 2000  # past one frontier: a coarse plan shared out in pieces


@pytest.fixture
def small_jobs(monkeypatch):
    monkeypatch.setattr(run, "PLAN_JOB_TASKS", 500)  # many jobs, a few out at a time


def stored_prefixes(store, run_id: int) -> list[str]:
    return [t.prefix for t in store.next_pending(run_id, 10**6)]


def test_a_plan_in_pieces_lands_whole_and_counts_the_published_total(store, small_jobs):
    run_id = run.create(store, "5x5", run.Settings(tasks=TARGET), threads=2)
    tables = prepare("5x5")
    expected = list(plan_stream(tables, TARGET))
    stored = sorted(parse_prefix(p) for p in stored_prefixes(store, run_id))
    assert stored == expected and len(stored) >= TARGET
    assert store.get_run(run_id).settings["estimated_nodes"] > 0
    value = published("5x5")[0]
    assert sum(count_below(tables, t).count for t in stored) == value.count, f"{value.source}: {value.count}"


def test_an_interrupted_plan_leaves_nothing_and_is_planned_again(store, small_jobs, monkeypatch):
    calls = []
    real = worker.plan_pieces

    def interrupted(*args, **kwargs):
        calls.append(1)
        if len(calls) == 3:  # Ctrl-C while the third job is planned: two have been inserted already
            raise KeyboardInterrupt
        return real(*args, **kwargs)

    monkeypatch.setattr(worker, "plan_pieces", interrupted)
    with pytest.raises(run.Stopped) as stopped:
        run.create(store, "5x5", run.Settings(tasks=TARGET), threads=1)
    run_id = stopped.value.run
    info = store.get_run(run_id)
    assert info.state == "planned" and store.progress(run_id).tasks["pending"] == 0
    assert run.needs_plan(info.state, sum(store.progress(run_id).tasks.values()))
    monkeypatch.setattr(worker, "plan_pieces", real)
    settings = run.Settings.from_dict(info.settings)
    store.add_tasks(run_id, run.planned((5, 5), settings, 2, threads=1)[0])  # what drive does on resume
    assert sorted(parse_prefix(p) for p in stored_prefixes(store, run_id)) == list(plan_stream(prepare("5x5"), TARGET))

"""The store at scale (foldfarm.store): maintained tallies, per-run task numbers, tree order, index-backed listings.

Counts here are numbers the tests insert themselves; no folding is counted.
"""

from __future__ import annotations

import math
from dataclasses import replace

import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from sqlalchemy import delete, select

from foldfarm.prefix import parse_prefix
from foldfarm.store import Store, StoreError, TaskResult
from foldfarm.store.models import TASK_ID_SPAN, RunTally, Task

WORKER = "tcp://127.0.0.1:9"


def same_tallies(kept, recount) -> None:
    """Equal in every number; seconds are float sums added in another order, so equal to rounding."""
    assert math.isclose(kept.seconds, recount.seconds, rel_tol=1e-9, abs_tol=1e-9), (kept, recount)
    assert replace(kept, seconds=0.0) == replace(recount, seconds=0.0)


# Operations on a run: (name, a number picking a task or a size).
operation = st.tuples(
    st.sampled_from(["add", "claim", "done", "done_many", "split", "fail", "reset", "reset_failed", "audit"]),
    st.integers(0, 10**6),
)


@settings(max_examples=40, deadline=None, suppress_health_check=[HealthCheck.function_scoped_fixture])
@given(ops=st.lists(operation, min_size=1, max_size=25), big=st.booleans())
def test_tallies_equal_a_recount_after_any_operations(store, ops, big):
    """After any sequence of the store's writes (repeats and refusals included) the kept tallies, the
    runs list and the progress equal a full recount from the tasks; a second run is never touched."""
    run = store.create_run("3x4", "4x3", {})
    store.set_run_state(run, "running")
    bystander = store.create_run("2x5", "5x2", {})
    store.add_tasks(bystander, ["/1", "/2"])
    count = (2**63 - 1) if big else 48  # big: sums far past 64 bits
    fresh = iter(range(1, 10**6))
    store.add_tasks(run, [f"/{next(fresh)}" for _ in range(3)])

    def tasks(*states):
        with store.engine.connect() as conn:
            stmt = select(Task.id, Task.prefix, Task.state).where(Task.run_id == run).order_by(Task.id)
            return [r for r in conn.execute(stmt) if not states or r.state in states]

    for name, pick in ops:
        every = tasks()
        chosen = every[pick % len(every)]
        if name == "add":
            store.add_tasks(run, [f"/{next(fresh)}" for _ in range(pick % 4)])
        elif name == "claim":
            store.mark_running([t.id for t in every[: 1 + pick % 5]], WORKER)
        elif name == "done":
            try:
                store.record_done(chosen.id, count - pick % 7, pick, 0.25, WORKER)
            except StoreError:  # a conflict: done with another count, or split
                pass
        elif name == "done_many":
            store.record_done_many([TaskResult(t.id, count, 3, 0.5, WORKER) for t in every[pick % 3::2]],
                                   batch_size=2)
        elif name == "split":
            try:
                store.record_split(chosen.id, count - 1, pick, 1.5, WORKER, [chosen.prefix + "/1", chosen.prefix + "/2"])
            except StoreError:
                pass
        elif name == "fail":
            store.mark_failed(chosen.id, "worker lost")
        elif name in ("reset", "reset_failed"):
            store.reset_running(run, failed=name == "reset_failed")
        elif name == "audit" and chosen.state == "done":
            store.record_audit(chosen.id, count if pick % 2 else 0)
    kept, recount = store.tallies(run), store.recount_tallies(run)
    same_tallies(kept, recount)
    assert recount.tasks_numbered == len(tasks())
    progress = store.progress(run)
    assert (progress.tasks, progress.counted, progress.nodes) == (recount.tasks, recount.counted, recount.nodes)
    summary = next(r for r in store.list_runs() if r.id == run)
    assert (summary.done, summary.pending, summary.split, summary.counted) == \
        (recount.tasks["done"], recount.tasks["pending"], recount.tasks["split"], recount.counted)
    assert store.audit_summary(run) == (recount.audits, recount.mismatches)
    same_tallies(store.tallies(bystander), store.recount_tallies(bystander))
    assert store.tallies(bystander).tasks["pending"] == 2


def test_a_rolled_back_write_leaves_the_tallies_as_they_were(store):
    run = store.create_run("3x4", "4x3", {})
    store.add_tasks(run, ["/1", "/2"])
    before = store.tallies(run)
    with pytest.raises(StoreError, match="already has a task"):
        store.add_tasks(run, ["/3", "/1"])
    with pytest.raises(StoreError, match="not a prefix"):
        store.add_tasks(run, ["/4", "/x"], chunk_size=1)
    (first, second) = store.next_pending(run, 2)
    with pytest.raises(StoreError, match="no task"):
        store.record_done_many([TaskResult(first.id, 5, 1, 0.1), TaskResult(10**15, 5, 1, 0.1)])
    assert store.tallies(run) == before
    # Numbers were rolled back with the inserts: the next task takes the next number, no hole.
    store.add_tasks(run, ["/3"])
    ids = [t.id for t in store.tasks(run)]
    assert ids == [run * TASK_ID_SPAN + k for k in (1, 2, 3)]
    assert store.missing_task_ids(run) == []


def test_task_ids_are_numbered_per_run(store):
    a = store.create_run("3x4", "4x3", {})
    b = store.create_run("2x5", "5x2", {})
    store.add_tasks(a, ["/1", "/2"])
    store.add_tasks(b, ["/1"])
    store.add_tasks(a, ["/3"])
    assert [t.id for t in store.tasks(a)] == [a * TASK_ID_SPAN + k for k in (1, 2, 3)]
    assert [t.id for t in store.tasks(b)] == [b * TASK_ID_SPAN + 1]
    parent = store.tasks(a)[0]
    store.record_split(parent.id, 6, 1, 0.1, None, ["/1/1", "/1/3"])
    assert [t.id for t in store.tasks(a)][-2:] == [a * TASK_ID_SPAN + 4, a * TASK_ID_SPAN + 5]
    assert store.tallies(a).tasks_numbered == 5


def test_deleted_tasks_are_found_by_their_numbers(store):
    run = store.create_run("3x4", "4x3", {})
    store.add_tasks(run, [f"/{k}" for k in range(1, 8)])
    ids = [t.id for t in store.tasks(run)]
    with store.engine.begin() as conn:
        conn.execute(delete(Task).where(Task.id.in_([ids[1], ids[2], ids[6]])))
    gaps = [(g.first, g.last, g.run_before, g.run_after) for g in store.missing_task_ids(run)]
    assert gaps == [(ids[1], ids[2], run, run), (ids[6], ids[6], run, run)]  # the last one too
    assert [(g.first, g.last) for g in store.task_id_gaps(ids[0], ids[-1])] == [(ids[1], ids[2]), (ids[6], ids[6])]
    # The tallies no longer match a recount either.
    assert store.tallies(run).tasks["pending"] == 7 and store.recount_tallies(run).tasks["pending"] == 4


def test_check_rows_stream_in_tree_order(store):
    run = store.create_run("5x5", "5x5", {})
    prefixes = ["/2", "/1/10", "/1/2/3", "/1/2", "/10/1", "/1/9", "/3/12/1", "/3/2", "/"]
    store.add_tasks(run, prefixes)
    rows = list(store.check_rows(run))
    assert [r.prefix for r in rows] == sorted(prefixes, key=parse_prefix)
    assert [r.prefix for r in rows][:4] == ["/", "/1/2", "/1/2/3", "/1/9"]  # not text order: /1/10 after /1/9


def test_top_listings_put_tasks_without_the_value_last(store):
    run = store.create_run("3x4", "4x3", {})
    store.add_tasks(run, [f"/{k}" for k in range(1, 9)])
    ids = [t.id for t in store.tasks(run)]
    store.record_done(ids[5], 480, 10, 2.0)
    store.record_done(ids[2], 960, 10, 1.0)
    store.record_split(ids[7], 480, 10, 3.0, None, ["/8/1"])
    by_count = store.tasks(run, order="count", limit=5)
    assert [t.id for t in by_count] == [ids[2], ids[5], ids[7], ids[0], ids[1]]  # ties: lower id first
    assert [t.id for t in store.tasks(run, order="time", limit=2)] == [ids[7], ids[5]]
    assert [t.id for t in store.tasks(run, ["pending"], order="count", limit=2)] == [ids[0], ids[1]]
    assert len(store.tasks(run, order="finished")) == 9
    assert store.tasks(run, order="count", limit=0) == []


def test_listings_use_the_indexes(store):
    """The claims, the top-N listings and tree order are answered through an index, not a sort of the run."""
    run = store.create_run("3x4", "4x3", {})
    store.add_tasks(run, [f"/{k}" for k in range(1, 50)])
    from foldfarm.store import queries

    statements = [
        ("ix_tasks_run_count", select(Task.id).where(Task.run_id == run, Task.count.is_not(None))
         .order_by(Task.count.desc(), Task.id).limit(20)),
        ("ix_tasks_run_seconds", select(Task.id).where(Task.run_id == run, Task.seconds.is_not(None))
         .order_by(Task.seconds.desc(), Task.id).limit(20)),
        ("ix_tasks_run_finished", select(Task.id).where(Task.run_id == run, Task.finished_at.is_not(None))
         .order_by(Task.finished_at.desc(), Task.id).limit(20)),
        ("ix_tasks_run_state", select(Task.id).where(Task.run_id == run, Task.state == "pending")
         .order_by(Task.id).limit(20)),
        # The tasks without a count, after those with one: open tasks, one state at a time.
        ("ix_tasks_run_state", select(Task.id).where(Task.run_id == run, Task.state == "pending", Task.count.is_(None))
         .order_by(Task.id).limit(20)),
        ("uq_tasks_run_sort_key sqlite_autoindex_tasks_2", queries.check_rows(run)),  # (SQLite names it by place)
        # A listing or export in id order walks the primary key over the run's own range.
        ("tasks_pkey sqlite_autoindex_tasks_1", queries.task_records(run).limit(20)),
    ]
    with store.engine.connect() as conn:
        postgres = conn.dialect.name == "postgresql"
        if postgres:
            conn.exec_driver_sql("SET enable_seqscan = off")  # a tiny table: ask whether the index CAN serve
            conn.exec_driver_sql("SET enable_sort = off")
        for index, stmt in statements:
            compiled = stmt.compile(conn, compile_kwargs={"literal_binds": True})
            prefix = "EXPLAIN " if postgres else "EXPLAIN QUERY PLAN "
            plan = " ".join(str(row) for row in conn.exec_driver_sql(prefix + str(compiled)))
            assert any(name in plan for name in index.split()), (index, plan)
            assert "TEMP B-TREE" not in plan and " Sort " not in plan, (index, plan)


def test_the_tallies_row_is_changed_with_the_tasks_only(store):
    """A run with no tallies row (made behind the store's back) is refused in one line, not miscounted."""
    run = store.create_run("3x4", "4x3", {})
    with store.engine.begin() as conn:
        conn.execute(delete(RunTally).where(RunTally.run_id == run))
    with pytest.raises(StoreError, match="no tallies row"):
        store.add_tasks(run, ["/1"])
    with pytest.raises(StoreError, match="no tallies row"):
        store.progress(run)
    with pytest.raises(StoreError, match=f"run {run} has no tallies row"):
        store.list_runs()

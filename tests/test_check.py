"""The aggregator's checks (foldfarm.check): plain functions, runs tampered with in the store, audits on a cluster.

Counts come from the kernel (through real runs) and are compared with the
published table (OEIS, named beside each value); nothing is hand-typed.
"""

from __future__ import annotations

import dataclasses
import itertools
import math
import subprocess
import sys

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st
import reference_check as reference
from local_driver import HERE, count_here, count_pending
from sqlalchemy import delete, select, update

from foldfarm import check
from foldfarm import run as runner
from foldfarm.errors import UserError
from foldfarm.kernel import count_below, expand, prepare, tables_for
from foldfarm.plan import plan
from foldfarm.prefix import PrefixError, parse_prefix, prefix_text
from foldfarm.published import published, table
from foldfarm.shape import parse_shape
from foldfarm.store import CheckRow, Store, StoreError
from foldfarm.store.models import Audit, Run, Task
from foldfarm.symmetry import LEGACY_TREE, TREES, reduction
from foldfarm.worker import ReadyWorker

SHAPE = "3x4"
SHAPE_COUNT = published(SHAPE)[0].count  # OEIS A001416
SHAPE_SOURCE = published(SHAPE)[0].source
#: Foldings per leaf of 3x4's tree 2: 12 rotations x 2 (turning over) x 2 (reflecting the side of 3).
FACTOR = reduction((3, 4)).factor


def kids_of(tables):
    return check.TreeChildren(tables.sides, tables.tree)


# -- plain functions --------------------------------------------------------------------------


@pytest.mark.parametrize("shape", ["1x1", "2x1", "2x2", "2x3", "3x4", "2x2x2", "1x7", "5x5", "4x4"])
@pytest.mark.parametrize("tree", TREES)
def test_symmetry_factor_is_the_kernels_multiplier(shape, tree):
    tables = prepare(shape, tree=tree)
    assert check.symmetry_factor(tables.sides, tree) == tables.factor


def test_every_published_count_is_divisible_by_the_symmetry_factor():
    """The published values, up to 7x7 and 3x14, are multiples of every factor the trees claim, in both side orders."""
    assert FACTOR == 48
    for row in table():
        shape = parse_shape(row.shape)
        for sides in {shape.key, tuple(reversed(shape.key))}:
            for tree in TREES:
                factor = check.symmetry_factor(sides, tree)
                assert row.count % factor == 0, f"{row.shape} ({row.source}) tree {tree}: factor {factor}"


def rows_of(tasks) -> list[CheckRow]:
    """Check rows, in tree order, of ``(steps, state, count, parent index or None)`` (ids are 1 + the index)."""
    rows = [CheckRow(i + 1, prefix_text(s), state, count, None if p is None else p + 1, HERE)
            for i, (s, state, count, p) in enumerate(tasks)]
    return sorted(rows, key=lambda r: parse_prefix(r.prefix))


def problems(tasks, tables, kind: str) -> list[str]:
    """Every completeness problem of ``kind`` a pass over ``tasks`` (see :func:`rows_of`) finds."""
    scan = check.scan_tasks(rows_of(tasks), 1, kids_of(tables), tables.n, keep=None)
    return scan.problems.kept[kind]


def cover_problems(tops, tables) -> list[str]:
    return problems([(t, "done", 0, None) for t in tops], tables, "cover")


def split_problems(prefix, children, tables) -> list[str]:
    return problems([(prefix, "split", 0, None)] + [(c, "done", 0, 0) for c in children], tables, "splits")


def test_plan_covers_the_tree_and_damage_is_named():
    tables = prepare("4x4")
    tasks = list(plan(tables, 40))
    assert cover_problems(tasks, tables) == []
    missing = tasks[len(tasks) // 2]
    found = cover_problems([t for t in tasks if t != missing], tables)
    assert found and prefix_text(missing) in " ".join(found)
    inside = missing + (expand(tables, missing)[0][0],) if len(missing) + 2 < tables.n else missing[:-1]
    assert "overlap" in cover_problems(tasks + [inside], tables)[0]
    assert cover_problems([], tables) == ["no task covers the tree"]
    bogus = tasks[0][:-1] + (99,)
    assert any("not a node" in p for p in cover_problems(tasks + [bogus], tables))


@settings(max_examples=60, deadline=None)
@given(shape=st.sampled_from(["3x4", "2x2x3", "2x6", "1x9", "4x4"]), budget=st.integers(1, 300),
       depth=st.integers(0, 3), pick=st.integers(0, 10**6))
def test_a_real_remainder_passes_and_any_child_but_the_stopping_node_is_missed(shape, budget, depth, pick):
    tables = prepare(shape)
    prefix: tuple[int, ...] = ()
    for _ in range(depth):  # walk down a random legal path
        if len(prefix) + 3 >= tables.n:
            break
        children = expand(tables, prefix)[0]
        if not children:
            break
        prefix += (children[pick % len(children)],)
    out = count_below(tables, prefix, budget=budget)
    if out.complete:
        return
    assert split_problems(prefix, out.remainder, tables) == []
    if len(out.remainder) > 1:
        lost = out.remainder[1 + pick % (len(out.remainder) - 1)]
        rest = [r for r in out.remainder if r != lost]
        found = split_problems(prefix, rest, tables)
        assert found and prefix_text(lost) in found[0]
    deepest = max(len(r) for r in out.remainder)
    last = [r for r in out.remainder if len(r) == deepest]
    stop = max(last, key=lambda r: expand(tables, r[:-1])[0].index(r[-1]))
    # Siblings the search finished, above the deepest level (a finished sibling of the stopping node looks like
    # a search that stopped there instead: the total and the certificate see that, not the structure).
    done = [stop[:j] + (k,) for j in range(len(prefix), len(stop) - 1)
            for k in expand(tables, stop[:j])[0][expand(tables, stop[:j])[0].index(stop[j]) + 1:]]
    if done:
        found = split_problems(prefix, out.remainder + done[pick % len(done):][:1], tables)
        assert found and "outside its remainder" in found[0]
    twice = problems([(prefix, "split", 0, None), (prefix, "done", 0, 0)] + [(c, "done", 0, 0) for c in out.remainder],
                     tables, "parents")
    assert twice and "name task 1 as parent, which is not the split task they lie in" in twice[0]


def test_nodes_outside_the_tree_are_reported_not_expanded():
    tables = prepare("3x4")
    kids = kids_of(tables)
    assert kids([(1, 3), (9,), (1, 2, 1, 1, 1, 1, 1, 1, 1, 1)]) == [None, None, None]  # illegal, illegal, too deep
    assert split_problems((1, 3), [(1, 3, 1)], tables) == \
        ["split task /1/3: /1/3 is not a node of the tree with nodes below it"]
    legal = (1, 2, expand(tables, (1, 2))[0][0])
    assert split_problems((1, 2), [legal[:2] + (12,)], tables) == \
        ["a deepest remainder task of split task /1/2 is not a node of the tree"]


def test_the_memo_of_the_trees_children_stays_bounded_and_answers_alike(monkeypatch):
    tables = prepare("3x4")
    nodes = [(1, 2) + tail for tail in itertools.product(range(1, 5), repeat=3)] + [(1,), (1, 2)]
    everything = kids_of(tables)(nodes)
    monkeypatch.setattr(check.TreeChildren, "KEEP", 5)
    small = kids_of(tables)
    assert [small([n])[0] for n in nodes] == everything and small(nodes) == everything
    assert len(small.memo) == 5


def test_certificate_depends_on_every_pair_and_nothing_else():
    entries = [((1, 2), "done", 24), ((1, 1), "split", 48), ((1, 3), "done", 0)]
    a = check.certificate("4x3", entries)
    assert a == check.certificate("4x3", list(reversed(entries)))
    assert a != check.certificate("3x4", entries)
    assert a != check.certificate("4x3", [((1, 2), "done", 48)] + entries[1:])
    assert a != check.certificate("4x3", [((1, 2), "split", 24)] + entries[1:])
    assert a != check.certificate("4x3", entries[:2])


def test_scan_sums_exactly_and_flags_counts_off_the_factor():
    big = 2**62  # far above 2**53: sums must stay exact
    rows = [CheckRow(1, "/1", "done", big, None, HERE), CheckRow(2, "/2", "split", 24, None, HERE),
            CheckRow(5, "/9//", "done", 24, None, HERE), CheckRow(3, "/2/1", "done", big + 24, 2, HERE),
            CheckRow(4, "/3", "pending", None, None, None)]
    scan = check.scan_tasks(rows, 24, kids_of(prepare("3x4")), 12, [0, 1])
    assert scan.total == 2 * big + 48
    assert scan.states == {"done": 3, "split": 1, "pending": 1}
    assert (scan.first_id, scan.last_id) == (1, 5)
    assert [r.id for r in scan.sample] == [1, 3]
    assert scan.not_multiple == [("/1", big), ("/2/1", big + 24)]  # 2**62 is not a multiple of 24
    assert scan.malformed == 1 and "/9//" in scan.problems.kept["malformed"][0]


def test_rows_out_of_tree_order_or_off_their_sort_key_are_reported():
    """A store orders the rows by a sort key written with each task; a prefix changed afterwards shows."""
    kids = kids_of(prepare("3x4"))
    rows = [CheckRow(1, "/1", "done", 0, None, HERE), CheckRow(3, "/2", "done", 0, None, HERE),
            CheckRow(2, "/1/2", "done", 0, None, HERE)]
    scan = check.scan_tasks(rows, 1, kids, 12)
    assert scan.problems.kept["order"] == ["task 2 (/1/2) comes after /2, out of tree order"]

    keyed = [CheckRow(1, "/1", "done", 0, None, HERE, "00001"), CheckRow(2, "/3", "done", 0, None, HERE, "00002")]
    scan = check.scan_tasks(keyed, 1, kids, 12)
    assert scan.problems.kept["order"] == ["task 2 (/3) does not match its sort key: its prefix changed after it "
                                           "was stored"]
    assert scan.total == 0 and check.completeness_check(scan)["ok"] is False


def simulated_run(tables, tasks: int, budget: int, most: int = 300) -> list[CheckRow]:
    """The rows of a run counted in id order as a store holds them: planned tasks, then remainders (ids
    consecutive); a task is counted whole once ``most`` tasks exist."""
    rows: list[CheckRow] = []
    queue = [(steps, None) for steps in plan(tables, tasks)]
    while len(rows) < len(queue):
        steps, parent = queue[len(rows)]
        out = count_below(tables, steps, budget=budget if len(queue) < most else None)
        row_id = len(rows) + 1
        rows.append(CheckRow(row_id, prefix_text(steps), "done" if out.complete else "split", out.count, parent, HERE))
        queue += [(r, row_id) for r in ([] if out.complete else out.remainder)]
    return rows


def tampered(rows: list[CheckRow], damage: str, pick: int, factor: int) -> list[CheckRow]:
    """``rows`` with one change a careless or dishonest hand might make (the store keeps prefixes unique in a run)."""
    rows = list(rows)
    i = pick % len(rows)
    row = rows[i]
    steps = parse_prefix(row.prefix)
    taken = {r.prefix for r in rows}
    above = [steps[:j] for j in range(len(steps)) if prefix_text(steps[:j]) not in taken]
    if damage == "count":
        rows[i] = dataclasses.replace(row, count=row.count + (1 if pick % 2 else factor))
    elif damage == "delete":
        del rows[i]
    elif damage == "pending":
        rows[i] = dataclasses.replace(row, state="pending", count=None)
    elif damage == "overlap" and above:
        rows.append(CheckRow(len(rows) + 1, prefix_text(above[-1]), "done", factor, row.parent_id, HERE))
    elif damage == "parent":
        other = rows[(pick // len(rows)) % len(rows)].id
        rows[i] = dataclasses.replace(row, parent_id=None if row.parent_id is not None and pick % 3 == 0 else other)
    elif damage == "prefix":
        moved = {0: prefix_text(steps + (99,)), 1: prefix_text(above[-1]) if above else "", 2: row.prefix + "//"}
        text = moved[pick % 3]
        rows[i] = dataclasses.replace(row, prefix=text if text and text not in taken else row.prefix + "//")
    return rows


def well_formed(prefix: str) -> bool:
    try:
        parse_prefix(prefix)
    except PrefixError:
        return False
    return True


def tree_order(rows: list[CheckRow]) -> list[CheckRow]:
    """Rows as the store streams them to the checks: malformed prefixes first, then tuple order of prefixes."""
    return sorted(rows, key=lambda r: (1, parse_prefix(r.prefix)) if well_formed(r.prefix) else (0, ()))


@settings(max_examples=150, deadline=None)
@given(shape=st.sampled_from(["3x4", "2x2x3", "2x5", "1x8", "3x3", "2x2x2", "4x4"]), tasks=st.integers(1, 40),
       budget=st.integers(3, 80), damage=st.sampled_from(["none", "count", "delete", "pending", "overlap", "parent",
                                                          "prefix"]),
       pick=st.integers(0, 10**6), fraction=st.sampled_from([0.0, 0.1, 1.0]))
def test_the_streamed_checks_agree_with_the_previous_implementation(shape, tasks, budget, damage, pick, fraction):
    """Same totals, verdicts, certificate and (but where parents were changed) the same completeness problems as
    the list-based implementation before streaming (tests/reference_check.py)."""
    tables = prepare(shape)
    factor = check.symmetry_factor(tables.sides, tables.tree)
    rows = tampered(simulated_run(tables, tasks, budget), damage, pick, factor)
    ids = sorted(r.id for r in rows)
    gaps = [(a + 1, b - 1) for a, b in itertools.pairwise(ids) if b > a + 1]
    side_order = "x".join(map(str, tables.sides))
    done = sum(1 for r in rows if r.state == "done")
    positions = check.sample_positions(done, fraction, pick)

    old = reference.scan_tasks(rows, factor, positions)
    new = check.scan_tasks(tree_order(rows), factor, kids_of(tables), tables.n, positions,
                           check.Certificate(side_order, tables.tree), keep=None)
    assert (new.total, new.done_sum, new.split_sum, new.states) == (old.total, old.done_sum, old.split_sum, old.states)
    assert (new.first_id, new.last_id) == (old.first_id, old.last_id)
    stored = old.total if damage == "none" else old.total - factor
    assert check.total_check(new, stored, True) == check.total_check(old, stored, True)
    old_div, new_div = check.divisibility_check(old, tables.sides, tables.tree), \
        check.divisibility_check(new, tables.sides, tables.tree)
    assert new_div["ok"] == old_div["ok"]
    assert sorted(new.not_multiple) == sorted(old.not_multiple) or old.not_multiple_more
    assert new.digest.digest() == reference.certificate(side_order, old.entries, tables.tree)
    in_order = [r for r in tree_order(rows) if r.state == "done" and well_formed(r.prefix)]
    assert new.sample == [in_order[p] for p in positions if p < len(in_order)]

    old_problems = reference.completeness_problems(old, kids_of(tables), tables.n, gaps)
    old_check = reference.completeness_check(old, kids_of(tables), tables.n, gaps)
    new_check = check.completeness_check(new, gaps)
    assert new_check["ok"] == old_check["ok"], (old_problems, check.completeness_problems(new, gaps).messages())
    if damage in ("none", "count"):
        assert new_check == old_check
    if damage in ("parent", "prefix"):  # a task under another split than its parent: other messages, same verdict
        return
    # Tasks that name a parent other than the split they lie in (a deleted split, a task added beside a split's
    # remainder with the split as parent) are reported where they lie, not per parent id.
    new_problems = check.completeness_problems(new, gaps).messages()
    old_parents, new_parents = ([p for p in problems if " as parent, which is not " in p or "is not inside split" in p]
                                for problems in (old_problems, new_problems))
    assert bool(new_parents) == bool(old_parents), (old_problems, new_problems)
    assert sorted(set(new_problems) - set(new_parents)) == sorted(set(old_problems) - set(old_parents))


def test_published_check_names_its_source():
    good = check.published_check(SHAPE, SHAPE_COUNT, True)
    assert good["ok"] is True and SHAPE_SOURCE in good["detail"]
    bad = check.published_check(SHAPE, SHAPE_COUNT + 24, True)
    assert bad["ok"] is False and SHAPE_SOURCE in bad["detail"] and str(SHAPE_COUNT) in bad["detail"]
    assert check.published_check("2x2x2", 96, True)["ok"] is None  # none carried for hypercubes
    assert check.published_check(SHAPE, 0, False)["ok"] is None


def test_audit_decisions():
    assert check.sample_positions(10_000, 0.01, 3) == check.sample_positions(10_000, 0.01, 3)
    assert len(check.sample_positions(10_000, 0.01, 3)) == 100
    assert check.sample_positions(10_000, 0.01, 3) != check.sample_positions(10_000, 0.01, 4)
    assert len(check.sample_positions(7, 0.01, 0)) == 1
    assert check.pick_worker(["a", "b"], [None]) == "a"
    assert check.pick_worker(["a", "b"], ["a", "b"]) is None
    assert check.judge_audit(5, 5, None) == "none"
    mismatch = {"task": 7, "prefix": "/1/2", "recorded": 24, "recorded_by": "tcp://a:1", "audit": 48,
                "audited_by": "tcp://b:1", "third": 24, "third_by": "tcp://c:1", "verdict": "second",
                "disagreeing_worker": "tcp://b:1"}
    out = check.audit_outcome(3, 0.5, 1, [mismatch], [])
    assert out["ok"] is False and "tcp://b:1 (the auditor) disagrees" in out["detail"]
    assert check.audit_outcome(3, 0.5, 1, [], [])["ok"] is True
    for bad in ("-0.1", "1.5", "half", None):
        with pytest.raises(UserError):
            check.parse_fraction(bad)


def test_other_order_is_another_tree():
    for sides in [(3, 8), (2, 3, 2), (2, 2, 3), (5,), (4, 4), (2, 2, 2)]:
        other = check.other_order(sides)
        if len(set(sides)) == 1:
            assert other is None
        else:
            assert other != sides and sorted(other) == sorted(sides)


def test_passed_ignores_skipped_checks_only():
    assert check.passed({"a": check.outcome(True, ""), "b": check.outcome(None, "skipped")})
    assert not check.passed({"a": check.outcome(True, ""), "b": check.outcome(False, "")})


# -- runs in a store (SQLite, and PostgreSQL when configured) ---------------------------------------


@pytest.fixture
def counted(new_store_url):
    """A store holding a finished, verified run of SHAPE with splits; yields (store, run id)."""
    store = Store(new_store_url())
    run_id = count_here(store, SHAPE)
    yield store, run_id
    store.close()


def tasks_where(store, *where):
    with store.engine.connect() as conn:
        return conn.execute(select(Task.id, Task.prefix, Task.state, Task.count, Task.parent_id)
                            .where(*where).order_by(Task.id)).all()


def change(store, *statements):
    with store.engine.begin() as conn:
        for statement in statements:
            conn.execute(statement)


def test_a_clean_run_passes_every_check(counted):
    store, run_id = counted
    info = store.get_run(run_id)
    assert info.state == "verified" and info.verification == "passed"
    assert info.total == SHAPE_COUNT, f"{SHAPE}: {SHAPE_SOURCE} publishes {SHAPE_COUNT}"
    checks = info.checks
    assert set(checks) == set(check.CHECKS)
    for name in ("total", "completeness", "divisibility", "published", "certificate"):
        assert checks[name]["ok"] is True, (name, checks[name])
    assert checks["audit"]["ok"] is None and checks["audit"]["detail"] == "skipped: no cluster"
    assert checks["published"]["detail"] == f"{SHAPE_COUNT} equals the published value ({SHAPE_SOURCE})"
    assert checks["total"]["value"] == SHAPE_COUNT
    assert checks["divisibility"]["factor"] == FACTOR and SHAPE_COUNT % FACTOR == 0
    assert info.certificate == checks["certificate"]["digest"]
    splits = tasks_where(store, Task.run_id == run_id, Task.state == "split")
    assert splits, "the fixture run must have split tasks"
    again = check.verify_run(store, run_id)
    assert again["certificate"]["ok"] is True and "same as stored" in again["certificate"]["detail"]


def _failed(store, run_id, **kw) -> dict:
    checks = check.verify_run(store, run_id, **kw)
    info = store.get_run(run_id)
    assert info.state == "suspect" and info.verification == "failed"
    return checks


def test_a_changed_count_fails_total_divisibility_published_and_certificate(counted):
    store, run_id = counted
    victim = tasks_where(store, Task.run_id == run_id, Task.state == "done")[3]
    change(store, update(Task).where(Task.id == victim.id).values(count=Task.count + 1))
    checks = _failed(store, run_id)
    assert checks["total"]["ok"] is False and str(SHAPE_COUNT) in checks["total"]["detail"]
    assert checks["divisibility"]["ok"] is False and victim.prefix in checks["divisibility"]["detail"]
    assert checks["published"]["ok"] is False and SHAPE_SOURCE in checks["published"]["detail"]
    assert checks["certificate"]["ok"] is False
    assert checks["completeness"]["ok"] is True
    # Undoing the change makes the run pass again: suspect -> verified.
    change(store, update(Task).where(Task.id == victim.id).values(count=victim.count))
    assert check.passed(check.verify_run(store, run_id)) and store.get_run(run_id).state == "verified"


def test_a_count_changed_by_the_factor_still_fails_total_published_certificate(counted):
    store, run_id = counted
    victim = tasks_where(store, Task.run_id == run_id, Task.state == "split")[0]
    change(store, update(Task).where(Task.id == victim.id).values(count=Task.count + FACTOR))
    checks = _failed(store, run_id)
    assert checks["divisibility"]["ok"] is True  # a multiple of the factor: only the other checks see it
    assert checks["total"]["ok"] is False and checks["published"]["ok"] is False
    assert checks["certificate"]["ok"] is False and checks["certificate"]["stored"] == store.get_run(run_id).certificate


def test_a_deleted_task_fails_completeness(counted):
    store, run_id = counted
    victim = tasks_where(store, Task.run_id == run_id, Task.parent_id.is_(None), Task.state == "done")[0]
    change(store, delete(Task).where(Task.id == victim.id))
    checks = _failed(store, run_id)
    detail = checks["completeness"]["detail"]
    assert checks["completeness"]["ok"] is False
    assert f"task id {victim.id} is missing" in detail and f"{victim.prefix} belongs to no task" in detail


@pytest.mark.parametrize("which", ["stopping node", "sibling"])
def test_a_missing_child_fails_completeness(counted, which):
    store, run_id = counted
    parents = {t.parent_id for t in tasks_where(store, Task.run_id == run_id, Task.parent_id.is_not(None))}
    for parent in sorted(parents):
        children = tasks_where(store, Task.parent_id == parent)
        done = [c for c in children if c.state == "done"]
        victim = children[0] if which == "stopping node" else (done[-1] if done and done[-1] != children[0] else None)
        if victim is not None and victim.state == "done":
            break
    else:
        pytest.fail("no split task with a done child to remove")
    change(store, delete(Task).where(Task.id == victim.id))
    checks = _failed(store, run_id)
    assert checks["completeness"]["ok"] is False
    if which == "sibling":
        assert f"lacks remainder task(s) {victim.prefix}" in checks["completeness"]["detail"]
    else:  # the structure alone cannot tell; the id left behind can
        assert f"task id {victim.id} is missing" in checks["completeness"]["detail"]


def test_a_prefix_edited_in_the_store_fails_completeness(counted):
    """The store writes each task's sort key beside its prefix; a prefix changed afterwards no longer matches."""
    store, run_id = counted
    a, b = tasks_where(store, Task.run_id == run_id, Task.parent_id.is_(None), Task.state == "done")[:2]
    change(store, update(Task).where(Task.id == a.id).values(prefix=a.prefix + "/1"))
    checks = _failed(store, run_id)
    assert checks["completeness"]["ok"] is False
    assert f"task {a.id} ({a.prefix}/1) does not match its sort key" in checks["completeness"]["detail"]
    assert checks["certificate"]["ok"] is False


def test_a_duplicate_task_fails_completeness(counted):
    """An overlapping task added and counted through the store's own API (an exact duplicate prefix is refused
    by the store's unique key)."""
    store, run_id = counted
    info = store.get_run(run_id)
    tables = tables_for(tuple(int(p) for p in info.side_order.split("x")), info.settings["tree"])
    original = tasks_where(store, Task.run_id == run_id, Task.state == "done", Task.parent_id.is_not(None))[0]
    around = parse_prefix(original.prefix)[:-1]  # its parent node: a subtree that contains it
    store.add_tasks(run_id, [prefix_text(around)])
    (dup,) = tasks_where(store, Task.run_id == run_id, Task.prefix == prefix_text(around))
    store.mark_running([dup.id], HERE)
    store.record_done(dup.id, count_below(tables, around).count, 1, 0.0, HERE)
    checks = _failed(store, run_id)
    assert checks["completeness"]["ok"] is False and "overlap" in checks["completeness"]["detail"]
    assert checks["total"]["ok"] is False


def test_a_child_of_a_done_task_fails_completeness(counted):
    store, run_id = counted
    child = tasks_where(store, Task.run_id == run_id, Task.parent_id.is_not(None), Task.state == "done")[0]
    other = tasks_where(store, Task.run_id == run_id, Task.parent_id.is_(None), Task.state == "done")[0]
    change(store, update(Task).where(Task.id == child.id).values(parent_id=other.id))
    checks = _failed(store, run_id)
    assert f"name task {other.id} as parent" in checks["completeness"]["detail"]


def test_an_unfinished_run_is_checked_but_nothing_is_stored(new_store_url):
    with Store(new_store_url()) as store:
        run_id = runner.create(store, SHAPE, runner.Settings(tasks=8, task_seconds=0), 1)
        checks = check.verify_run(store, run_id)
        pending = store.progress(run_id).tasks["pending"]
        assert checks["completeness"]["ok"] is False and f"{pending} pending" in checks["completeness"]["detail"]
        assert checks["total"]["ok"] is None and checks["published"]["ok"] is None
        info = store.get_run(run_id)
        assert info.state == "planned" and info.checks is None and info.certificate is None


def test_the_same_plan_counted_twice_has_the_same_certificate(new_store_url):
    with Store(new_store_url()) as one, Store(new_store_url()) as two:
        a, b = count_here(one, SHAPE), count_here(two, SHAPE)
        c = count_here(two, SHAPE)
        assert one.get_run(a).certificate == two.get_run(b).certificate == two.get_run(c).certificate
        d = count_here(two, SHAPE, task_nodes=50)  # other budgets split elsewhere: same total, other tasks
        assert two.get_run(d).total == SHAPE_COUNT and two.get_run(d).certificate != two.get_run(c).certificate
        victim = tasks_where(two, Task.run_id == c, Task.state == "done")[0]
        change(two, update(Task).where(Task.id == victim.id).values(count=Task.count + 24))
        changed = check.verify_run(two, c)["certificate"]
        assert changed["ok"] is False and changed["digest"] != one.get_run(a).certificate


# -- store queries added for the checks and the query commands ------------------------------------


def test_store_task_queries(counted):
    store, run_id = counted
    everything = store.tasks(run_id)
    assert [t.id for t in everything] == sorted(t.id for t in everything)
    by_count = store.tasks(run_id, ["done", "split"], "count", 5)
    assert len(by_count) == 5 and [t.count for t in by_count] == sorted((t.count for t in by_count), reverse=True)
    assert by_count[0].count == max(t.count for t in everything if t.count is not None)
    assert {t.state for t in store.tasks(run_id, ["split"])} == {"split"}
    assert store.tasks(run_id, ["pending"]) == []
    by_time = store.tasks(run_id, order="time", limit=3)
    assert [t.seconds for t in by_time] == sorted((t.seconds for t in by_time), reverse=True)
    assert len(store.tasks(run_id, order="finished")) == len(everything)
    for bad in ({"states": ["done", "finished"]}, {"order": "size"}, {"limit": -1}):
        with pytest.raises(StoreError):
            store.tasks(run_id, **bad)
    with pytest.raises(StoreError, match="no run 999"):
        store.tasks(999)
    streamed = list(store.iter_tasks(run_id))
    assert streamed == everything
    rows = list(store.check_rows(run_id))  # in tree order: prefixes as tuples of steps
    in_tree_order = sorted(everything, key=lambda t: parse_prefix(t.prefix))
    assert [(r.id, r.prefix, r.state, r.count, r.parent_id) for r in rows] == \
        [(t.id, t.prefix, t.state, t.count, t.parent_id) for t in in_tree_order]
    assert sum(r.count for r in rows if r.state in ("done", "split")) == SHAPE_COUNT  # OEIS A001416
    assert store.runs_of_shape(SHAPE) == [(run_id, "verified")] and store.runs_of_shape("5x5") == []
    assert store.audits(run_id) == []
    with pytest.raises(StoreError):
        store.iter_tasks(999)


def test_store_id_gaps(counted):
    store, run_id = counted
    ids = [t.id for t in store.tasks(run_id)]
    assert store.task_id_gaps(ids[0], ids[-1]) == []
    done = [t.id for t in store.tasks(run_id, ["done"])]  # done tasks have no children: free to delete
    pair = next(a for a, b in itertools.pairwise(done) if b == a + 1)
    single = next(t for t in done if t > pair + 2)
    change(store, delete(Task).where(Task.id.in_([pair, pair + 1, single])))
    gaps = store.task_id_gaps(ids[0], ids[-1])
    assert [(g.first, g.last, g.run_before, g.run_after) for g in gaps] == \
        [(pair, pair + 1, run_id, run_id), (single, single, run_id, run_id)]
    assert store.task_id_gaps(ids[-1] + 1, ids[-1] + 3) == []  # ids not handed out yet are no gap
    assert [(g.first, g.last) for g in store.missing_task_ids(run_id)] == [(pair, pair + 1), (single, single)]
    change(store, delete(Task).where(Task.id == ids[-1]))  # the last task: no neighbour after it, still found
    assert [(g.first, g.last) for g in store.missing_task_ids(run_id)][-1] == (ids[-1], ids[-1])


# -- audits and the other side order on a real cluster -----------------------------------------------


@pytest.fixture(scope="module")
def client():
    from distributed import Client, LocalCluster

    cluster = LocalCluster(n_workers=2, threads_per_worker=1, processes=True, host="127.0.0.1",
                           dashboard_address=None)
    with Client(cluster) as c:
        c.register_plugin(ReadyWorker())
        yield c
    cluster.close()


def _lie(offset: int) -> None:
    """Make this worker process's kernel add ``offset`` to every count (the test's injected fault)."""
    from foldfarm import kernel

    honest = getattr(kernel, "_honest_count_below", kernel.count_below)
    kernel._honest_count_below = honest

    def wrong(*args, **kwargs):
        out = honest(*args, **kwargs)
        out.count += offset
        return out

    kernel.count_below = wrong


def _tell_the_truth() -> None:
    from foldfarm import kernel

    kernel.count_below = getattr(kernel, "_honest_count_below", kernel.count_below)


def cluster_run(store, client, shape=SHAPE) -> int:
    settings = runner.Settings(task_nodes=30, task_seconds=0, tasks=8)
    run_id = runner.create(store, shape, settings, threads=2)
    runner.drive(store, client, run_id)
    return run_id


@pytest.mark.slow
def test_a_cluster_run_is_audited_on_other_workers(client, new_store_url):
    with Store(new_store_url()) as store:
        run_id = cluster_run(store, client)
        info = store.get_run(run_id)
        assert info.state == "verified" and info.total == SHAPE_COUNT, f"{SHAPE_SOURCE}: {SHAPE_COUNT}"
        assert info.checks["audit"]["ok"] is True and info.checks["audit"]["audited"] >= 1
        checks = check.verify_run(store, run_id, client=client, audit_fraction=0.25, seed=5)
        assert checks["audit"]["ok"] is True
        done = store.progress(run_id).tasks["done"]
        assert checks["audit"]["audited"] == math.ceil(0.25 * done)
        recorded = {t.id: t.worker for t in store.tasks(run_id, ["done"])}
        audits = store.audits(run_id)
        assert len(audits) == info.checks["audit"]["audited"] + checks["audit"]["audited"]
        assert all(a.matched and a.count == a.recorded for a in audits)
        assert all(a.worker != recorded[a.task_id] for a in audits)  # never the worker that recorded it


@pytest.mark.slow
def test_the_audit_names_a_worker_that_counts_wrong(client, tmp_path):
    liar = sorted(client.scheduler_info()["workers"])[1]
    tables = prepare(SHAPE)
    client.run(_lie, tables.factor, workers=[liar])  # wrong by a multiple of the factor: divisibility cannot see it
    try:
        with Store(f"sqlite:///{tmp_path / 'liar.sqlite'}") as store:
            run_id = cluster_run(store, client)
            info = store.get_run(run_id)
            assert info.state == "suspect"
            audit = info.checks["audit"]
            assert audit["ok"] is False and liar in audit["detail"]
            assert [m["disagreeing_worker"] for m in audit["mismatches"]] == [liar] * len(audit["mismatches"])
            everything = check.verify_run(store, run_id, client=client, audit_fraction=1.0)
            assert everything["divisibility"]["ok"] is True
            assert {m["disagreeing_worker"] for m in everything["audit"]["mismatches"]} == {liar}
            assert store.audit_summary(run_id)[1] >= len(everything["audit"]["mismatches"])
    finally:
        client.run(_tell_the_truth, workers=[liar])


@pytest.mark.slow
def test_a_changed_count_is_caught_by_the_audit(client, tmp_path):
    with Store(f"sqlite:///{tmp_path / 'edited.sqlite'}") as store:
        run_id = cluster_run(store, client)
        victim = tasks_where(store, Task.run_id == run_id, Task.state == "done")[0]
        worker = store.tasks(run_id, ["done"], limit=1)[0].worker
        with store.engine.begin() as conn:
            conn.execute(delete(Audit))
            conn.execute(update(Task).where(Task.id == victim.id).values(count=Task.count + 24))
        checks = check.verify_run(store, run_id, client=client, audit_fraction=1.0)
        (mismatch,) = checks["audit"]["mismatches"]
        assert mismatch["task"] == victim.id and mismatch["verdict"] == "first"
        assert mismatch["disagreeing_worker"] == worker and mismatch["audit"] == mismatch["third"] == victim.count


@pytest.mark.slow
def test_the_other_side_order_gives_the_same_total(client, tmp_path):
    with Store(f"sqlite:///{tmp_path / 'transpose.sqlite'}") as store:
        run_id = cluster_run(store, client)
        checks = check.verify_run(store, run_id, client=client, audit_fraction=0,
                                  recount=runner.recounter(store, client))
        other = checks["transpose"]
        assert other["ok"] is True and other["side_order"] == "4x3" and other["value"] == SHAPE_COUNT
        assert store.get_run(other["run"]).side_order == "4x3" and store.progress(other["run"]).tasks["done"] > 0
        again = check.verify_run(store, run_id)  # no cluster: the recorded run is compared again, not recounted
        assert again["transpose"]["ok"] is True and again["transpose"]["run"] == other["run"]
        assert [r[0] for r in store.runs_of_shape("4x3")] == [other["run"]]


@pytest.mark.slow
@pytest.mark.parametrize("damage", ["none", "deleted plan task", "missing remainder task", "no node"])
def test_completeness_checked_on_a_worker_agrees_with_the_check_here(client, counted, damage):
    """With a cluster the kernel's part of the completeness check runs on a worker, in one batch a walk."""
    store, run_id = counted
    tops = tasks_where(store, Task.run_id == run_id, Task.parent_id.is_(None), Task.state == "done")
    if damage == "deleted plan task":
        change(store, delete(Task).where(Task.id == tops[0].id))
    elif damage == "missing remainder task":
        split = tasks_where(store, Task.run_id == run_id, Task.state == "split")[0]
        last = [c for c in tasks_where(store, Task.parent_id == split.id) if c.state == "done"][-1]
        change(store, delete(Task).where(Task.id == last.id))
    elif damage == "no node":
        change(store, update(Task).where(Task.id == tops[0].id).values(prefix=tops[0].prefix + "/99"))
    here = check.verify_run(store, run_id)["completeness"]
    there = check.verify_run(store, run_id, client=client, audit_fraction=0)["completeness"]
    assert there == here
    assert here["ok"] is (damage == "none"), here


# -- runs planned before tree 2 ------------------------------------------------------------------


def _as_made_before_tree_two(store, run_id) -> None:
    """Drop the "tree" key: the settings of a run made before the map's symmetries were used have none."""
    settings = {k: v for k, v in store.get_run(run_id).settings.items() if k != "tree"}
    change(store, update(Run).where(Run.id == run_id).values(settings=settings))


def _tree_total(tables, prefixes) -> int | None:
    """What the prefixes count on ``tables``'s tree (None if one of them is not a node of it)."""
    try:
        return sum(count_below(tables, parse_prefix(p)).count for p in prefixes)
    except PrefixError:
        return None


@pytest.mark.slow
def test_a_run_made_before_tree_two_resumes_on_its_own_tree(client, new_store_url):
    """A run planned on tree 1 and stopped partway, with settings as an older foldfarm wrote them, is finished
    on tree 1 by resume: the published total, every check passing, divisibility by tree 1's factor."""
    with Store(new_store_url()) as store:
        settings = runner.Settings(task_nodes=30, task_seconds=0, tasks=8)
        run_id = runner.create(store, SHAPE, settings, 1, tree=LEGACY_TREE)
        _as_made_before_tree_two(store, run_id)
        store.set_run_state(run_id, "running")
        count_pending(store, run_id, settings.task_nodes, most=6)
        store.set_run_state(run_id, "stopped")  # as Ctrl-C leaves it
        info = store.get_run(run_id)
        assert "tree" not in info.settings
        tasks = store.progress(run_id).tasks
        assert tasks.get("done") and tasks.get("split") and tasks.get("pending"), tasks
        # The open tasks are subtrees of tree 1: on tree 2 they would count something else.
        pending = [t.prefix for t in store.tasks(run_id, ["pending"], limit=None)]
        assert _tree_total(prepare(SHAPE, tree=2), pending) != _tree_total(prepare(SHAPE, tree=1), pending)

        summary = runner.drive(store, client, run_id)
        info = store.get_run(run_id)
        assert summary.count == info.total == SHAPE_COUNT, f"{SHAPE}: {SHAPE_SOURCE} publishes {SHAPE_COUNT}"
        assert info.state == "verified" and "tree" not in info.settings
        checks = info.checks
        for name in ("total", "completeness", "divisibility", "audit", "published", "certificate"):
            assert checks[name]["ok"] is True, (name, checks[name])
        old_factor = 2 * 12  # tree 1 of 3x4: 12 rotations x 2 (turning the stack over)
        assert checks["divisibility"]["factor"] == old_factor == check.symmetry_factor((3, 4), LEGACY_TREE)
        assert "tree 1" in checks["divisibility"]["detail"]
        entries = [(parse_prefix(r.prefix), r.state, r.count) for r in store.check_rows(run_id)
                   if r.state in ("done", "split")]
        assert info.certificate == check.certificate("3x4", entries)  # the digest text of before tree 2


def test_a_run_on_a_tree_this_version_does_not_know_is_refused_in_one_line(tmp_path):
    url = f"sqlite:///{tmp_path / 'future.sqlite'}"
    with Store(url) as store:
        run_id = store.create_run(SHAPE, "3x4", {**runner.Settings().to_dict(), "tree": 9})
        store.add_tasks(run_id, ["/"])
        with pytest.raises(UserError, match="search tree 9, which this version of foldfarm does not know"):
            check.verify_run(store, run_id)
    out = subprocess.run([sys.executable, "-m", "foldfarm", "resume", str(run_id), "--store", url],
                         capture_output=True, text=True, timeout=120)
    lines = out.stderr.strip().splitlines()
    assert out.returncode == 2 and len(lines) == 1 and "search tree 9" in lines[0], out.stderr
    with Store(url) as store:
        assert store.get_run(run_id).state == "planned" and store.progress(run_id).tasks["pending"] == 1


@given(st.lists(st.sampled_from(["tcp://a", "tcp://b", "tcp://c"]), max_size=300), st.integers(1, 70))
def test_audit_bundles_send_every_sampled_task_once_to_its_chosen_worker(chosen, size):
    bundles = check.audit_bundles(chosen, size)
    positions = [i for _, group in bundles for i in group]
    assert sorted(positions) == list(range(len(chosen)))
    assert all(0 < len(group) <= size and all(chosen[i] == worker for i in group) for worker, group in bundles)

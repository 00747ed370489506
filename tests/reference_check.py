"""The checks' list-based implementation before streaming (issue 13), kept as a reference oracle.

:mod:`foldfarm.check` now reads a run's tasks once in tree order with
O(depth) state; the functions here are the previous implementation,
unchanged except for imports and :func:`completeness_problems` split out of
:func:`completeness_check`: they hold every task in memory and read the
rows in id order.  ``tests/test_check.py`` compares the two on random plans,
splits and tamperings.  Not used by foldfarm itself.
"""

from __future__ import annotations

import hashlib
from collections import Counter
from collections.abc import Iterable
from dataclasses import dataclass, field

from foldfarm.check import SHOWN, Kids, _listed, outcome
from foldfarm.prefix import PrefixError, Steps, first_overlap, parse_prefix, prefix_text
from foldfarm.symmetry import LEGACY_TREE


@dataclass
class Scan:
    """What one pass over a run's tasks (in id order) gathers for the checks.

    ``entries`` holds ``(steps, state, count)`` of every done and split
    task; ``tops`` the steps of tasks without a parent; ``children`` the
    steps of each parent id's children; ``sample`` the rows of the done
    tasks at the requested positions (0-based, in id order).  Of the
    tasks with a malformed prefix or a count off the factor, the first
    :data:`SHOWN` are kept and the rest counted.
    """

    factor: int
    states: Counter = field(default_factory=Counter)
    done_sum: int = 0
    split_sum: int = 0
    entries: list[tuple[Steps, str, int]] = field(default_factory=list)
    tops: list[Steps] = field(default_factory=list)
    children: dict[int, list[Steps]] = field(default_factory=dict)
    splits: dict[int, Steps] = field(default_factory=dict)
    malformed: list[str] = field(default_factory=list)
    malformed_more: int = 0
    not_multiple: list[tuple[str, int]] = field(default_factory=list)
    not_multiple_more: int = 0
    sample: list = field(default_factory=list)
    first_id: int | None = None
    last_id: int | None = None

    @property
    def total(self) -> int:
        """Foldings counted: done counts plus split partial counts."""
        return self.done_sum + self.split_sum


def scan_tasks(rows: Iterable, factor: int, sample_positions: Iterable[int] = ()) -> Scan:
    """Gather a :class:`Scan` from task rows with ``id, prefix, state, count, parent_id, worker``.

    >>> from foldfarm.store import CheckRow
    >>> rows = [CheckRow(1, "/1", "done", 24, None, "w1"), CheckRow(2, "/2", "split", 12, None, None),
    ...         CheckRow(3, "/2/1", "done", 36, 2, "w2")]
    >>> s = scan_tasks(rows, factor=12, sample_positions=[1])
    >>> s.total, s.tops, s.children, [r.id for r in s.sample]
    (72, [(1,), (2,)], {2: [(2, 1)]}, [3])
    """
    scan = Scan(factor)
    wanted = sorted(set(sample_positions), reverse=True)
    done_seen = 0
    for row in rows:
        scan.first_id = row.id if scan.first_id is None else scan.first_id
        scan.last_id = row.id
        scan.states[row.state] += 1
        try:
            steps = parse_prefix(row.prefix)
        except PrefixError:
            if len(scan.malformed) < SHOWN:
                scan.malformed.append(f"task {row.id} has the malformed prefix {row.prefix[:40]!r}")
            else:
                scan.malformed_more += 1
            continue
        if row.parent_id is None:
            scan.tops.append(steps)
        else:
            scan.children.setdefault(row.parent_id, []).append(steps)
        if row.state not in ("done", "split"):
            continue
        count = int(row.count)
        scan.entries.append((steps, row.state, count))
        if count % factor and len(scan.not_multiple) < SHOWN:
            scan.not_multiple.append((row.prefix, count))
        elif count % factor:
            scan.not_multiple_more += 1
        if row.state == "split":
            scan.split_sum += count
            scan.splits[row.id] = steps
        else:
            scan.done_sum += count
            if wanted and wanted[-1] == done_seen:
                wanted.pop()
                scan.sample.append(row)
            done_seen += 1
    return scan



def certificate(side_order: str, entries: Iterable[tuple[Steps, str, int]], tree: int = LEGACY_TREE) -> str:
    """Digest of a run's done and split tasks on tree ``tree`` (see the module docstring for the text hashed).

    >>> a = certificate("4x3", [((2,), "done", 24), ((1,), "split", 12)])
    >>> a == certificate("4x3", [((1,), "split", 12), ((2,), "done", 24)]), a.startswith("sha256:")
    (True, True)
    >>> a == certificate("4x3", [((2,), "done", 36), ((1,), "split", 12)])
    False
    >>> a == certificate("4x3", [((2,), "done", 24), ((1,), "split", 12)], tree=2)
    False
    """
    header = f"foldfarm certificate 1 {side_order}" + (f" tree {tree}" if tree != LEGACY_TREE else "")
    digest = hashlib.sha256(f"{header}\n".encode())
    for steps, state, count in sorted(entries):
        digest.update(f"{prefix_text(steps)} {state} {count}\n".encode())
    return "sha256:" + digest.hexdigest()



def cover_problems(prefixes: list[Steps], kids: Kids, cells: int) -> list[str]:
    """Why the subtrees of ``prefixes`` do not partition the search tree (empty: they do).

    They do when no two overlap, and walking down from the root through the
    proper ancestors of the prefixes ("inner" nodes) every child of an
    inner node is a prefix or another inner node, and every prefix or inner
    node is a child of its parent.  ``kids`` is asked about every inner node
    first, in one batch, then level by level (it must not trust nodes it has
    not checked: :class:`TreeChildren` does not).  An overlap is reported alone.
    """
    clash = first_overlap(prefixes)
    if clash is not None:  # the walk below assumes disjoint subtrees; it would only add noise
        a, b = (prefix_text(s) for s in clash)
        return [f"tasks {a} and {b} overlap" if a != b else f"task {a} appears twice"]
    tops = set(prefixes)
    if not tops:
        return ["no task covers the tree"]
    problems = []
    inner = {p[:j] for p in tops for j in range(len(p))}
    kids(sorted(inner, key=len))  # the whole walk in one batch (TreeChildren keeps the answers)
    members: dict[Steps, set[Steps]] = {}
    for node in tops | inner:
        if node:
            members.setdefault(node[:-1], set()).add(node)
    level = [()] if () in inner else []
    while level:
        deep = [v for v in level if len(v) + 2 >= cells]
        problems += [f"tasks below {prefix_text(v)} go deeper than the tree" for v in deep]
        level = [v for v in level if len(v) + 2 < cells]
        below = []
        for node, steps in zip(level, kids(level)):
            real = {node + (k,) for k in steps or ()}
            for child in sorted(real):
                if child in inner:
                    below.append(child)
                elif child not in tops:
                    problems.append(f"the subtree {prefix_text(child)} belongs to no task")
            problems += [f"task prefix {prefix_text(c)} is not a node of the tree"
                         for c in sorted(members.get(node, set()) - real)]
        level = below
    return problems


def split_problems(splits: list[tuple[Steps, list[Steps]]], kids: Kids, cells: int) -> list[str]:
    """Why the children of split tasks are not their remainders (empty: they all are).

    A task that ran out of budget stopped at some node D, about to expand
    it; its remainder is D plus, at every level from D up to the task's
    prefix, the siblings the search had not tried yet: those before the
    path's step in the kernel's order of children.  So D determines the
    remainder.  D is the deepest remainder task whose last step comes
    latest in its parent's children; the remainder is then recomputed and
    compared as a set.  (Losing D itself would look like a search that
    finished D; the id-gap check catches that.)  All splits walk down
    together, one batch of ``kids`` per level (after one batch of all the
    nodes on their way down).
    """
    problems = []
    walks = []  # [prefix, children, base (D's parent), kids lists from prefix down to base]
    for prefix, children in splits:
        name = prefix_text(prefix)
        if not children:
            problems.append(f"split task {name} has no remainder tasks")
            continue
        outside = [c for c in children if len(c) <= len(prefix) or c[:len(prefix)] != prefix]
        if outside:
            problems.append(f"remainder task {prefix_text(outside[0])} is not inside split task {name}")
            continue
        depth = max(len(c) for c in children)
        base = next(c for c in children if len(c) == depth)[:-1]
        if any(c[:-1] != base for c in children if len(c) == depth):
            problems.append(f"the deepest remainder tasks of split task {name} are not siblings")
        elif len(base) + 2 >= cells:
            problems.append(f"remainder tasks of split task {name} go deeper than the tree")
        else:
            walks.append((prefix, children, base, []))
    ready = []
    kids(sorted({base[:k] for prefix, _, base, _ in walks for k in range(len(prefix), len(base) + 1)}, key=len))
    while walks:
        answers = kids([base[:len(prefix) + len(got)] for prefix, _, base, got in walks])
        going = []
        for walk, steps in zip(walks, answers):
            prefix, _, base, got = walk
            at = len(prefix) + len(got)  # length of the node just expanded
            if steps is None:
                problems.append(f"split task {prefix_text(prefix)}: {prefix_text(base[:at])} is not a node of the "
                                "tree with nodes below it")
                continue
            got.append(steps)
            if at == len(base):
                ready.append(walk)
            elif base[at] in steps:
                going.append(walk)
            else:
                problems.append(f"split task {prefix_text(prefix)}: {prefix_text(base[:at + 1])} is not a node of "
                                "the tree")
        walks = going
    for prefix, children, base, got in ready:
        name = prefix_text(prefix)
        last = [c[-1] for c in children if len(c) == len(base) + 1]
        if any(step not in got[-1] for step in last):
            problems.append(f"a deepest remainder task of split task {name} is not a node of the tree")
            continue
        stop = base + (max(last, key=got[-1].index),)
        expected = {stop}
        for j in range(len(stop) - 1, len(prefix) - 1, -1):
            siblings = got[j - len(prefix)]
            expected.update(stop[:j] + (k,) for k in siblings[:siblings.index(stop[j])])
        found = set(children)
        missing, extra = sorted(expected - found), sorted(found - expected)
        if missing:
            more = f" and {len(missing) - SHOWN} more" if len(missing) > SHOWN else ""
            problems.append(f"split task {name} lacks remainder task(s) "
                            f"{', '.join(map(prefix_text, missing[:SHOWN]))}{more}")
        if extra:
            problems.append(f"split task {name} has task(s) {', '.join(map(prefix_text, extra[:SHOWN]))} "
                            "outside its remainder")
    return problems


def completeness_check(scan: Scan, kids: Kids, cells: int, gaps: list[tuple[int, int]] = ()) -> dict:
    """No open task, the plan covers the tree, splits have their remainders, no overlap, no deleted task.

    ``gaps`` are ranges of task ids next to this run's tasks that no task has.
    """
    problems = completeness_problems(scan, kids, cells, gaps)
    tasks = sum(scan.states.values())
    if problems:
        return outcome(False, _listed(problems), problems=len(problems))
    return outcome(True, f"all {tasks} task(s) closed ({scan.states['done']} done, {scan.states['split']} split); "
                         f"the {len(scan.tops)} planned task(s) cover the tree; every split has its whole remainder; "
                         "no done tasks overlap; no task id is missing")


def completeness_problems(scan: Scan, kids: Kids, cells: int, gaps: list[tuple[int, int]] = ()) -> list[str]:
    """Every problem :func:`completeness_check` lists (split out of it for the comparison)."""
    problems = list(scan.malformed)
    problems += [f"{scan.malformed_more} more malformed prefix(es)"] if scan.malformed_more else []
    open_tasks = {s: scan.states[s] for s in ("pending", "running", "failed") if scan.states[s]}
    if open_tasks:
        problems.append("open tasks: " + ", ".join(f"{n} {s}" for s, n in open_tasks.items()))
    problems += [f"task ids {a}..{b} are missing from the store (ids are never freed: deleted?)" if a != b else
                 f"task id {a} is missing from the store (ids are never freed: deleted?)" for a, b in gaps]
    problems += cover_problems(scan.tops, kids, cells)
    for parent, steps in scan.children.items():
        if parent not in scan.splits:
            problems.append(f"{len(steps)} task(s) name task {parent} as parent, which is not a split task of this run")
    problems += split_problems([(s, scan.children.get(i, [])) for i, s in scan.splits.items()], kids, cells)
    clash = first_overlap(s for s, state, _ in scan.entries if state == "done")
    if clash is not None:
        problems.append("done tasks {} and {} overlap".format(*map(prefix_text, clash)))
    return problems

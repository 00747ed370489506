"""The aggregator: a run's exact total and the evidence that it is right.

:func:`verify_run` reads a run's tasks from the store in one streamed pass
in tree order (tuple order of the prefixes: every task directly before
the tasks below it), runs the checks below, stores their outcome with the
run (state ``verified`` when none failed, ``suspect`` otherwise) and
returns them as a JSON-able dict: check name -> ``{"ok": True | False |
None, "detail": text, ...}``, where ``None`` means "not applicable" or
"skipped" (never "passed").  Every decision is a plain function of plain
data, tested without a database or a cluster; :func:`verify_run` is the
thin layer that feeds them.

In tree order every check is local, so the pass holds O(depth) state and
one chunk of rows, whatever the number of tasks (:class:`Scan`): sums and
counters; a stack of the open ancestors of the last planned task, whose
children are compared with the tree's as each is closed; a stack of the
open split tasks, each collecting its remainder; the last planned and the
last done task (an overlap is an ancestor directly followed by a
descendant); the certificate hashed as the rows come.  The kernel's
children are asked a chunk at a time (on a worker when there is a
cluster), and their memo keeps only recent nodes (:class:`TreeChildren`).
A row out of tree order, or whose stored sort key does not match its
prefix, was changed after it was stored and fails the completeness check.

``total``
    Σ count of done tasks + Σ partial count of split tasks, in exact
    integers, equals the total stored when the run finished.
``completeness``
    No task is pending, running or failed; the tasks without a parent (the
    plan) partition the search tree; every task with a parent lies below it
    and below no other split task nearer than it, and every split task's
    children are exactly the remainder the kernel defines for it (see
    :func:`_remainder_problems`); no two done tasks overlap; and no task id
    in the run's range is missing from the store (a run numbers its tasks
    consecutively and never frees a number, so a gap is a deleted task:
    :meth:`foldfarm.store.Store.missing_task_ids`).
``divisibility``
    Every task count, and so the total, is a multiple of the run's own
    :func:`symmetry_factor`: the number of foldings each leaf of the
    search tree the run was planned on stands for (the rotations of a
    folded stack, turning it over, and on tree 2 the map's own symmetries;
    :mod:`foldfarm.symmetry`).  A run made before tree 2 existed is held
    to tree 1's factor.  A flipped bit or an edited count rarely keeps
    that, and the check names the task.
``audit``
    A random sample of done tasks (``--audit FRACTION`` of them, default
    the run's ``audit`` setting, 1 %, at least one) is counted again on a
    worker other than the one that recorded it; on a mismatch a third
    count, on yet another worker or else in this process, says which
    worker disagreed.  Any mismatch makes the run suspect.
``published``
    The total against every published value for the shape
    (:mod:`foldfarm.published`), naming the source.
``transpose``
    The same map counted with its sides in another order: a different
    search tree, planned and split independently (on the current tree:
    a run made on tree 1 is recounted on tree 2), must give the same total.
``certificate``
    ``sha256:`` + SHA-256 of the text ``foldfarm certificate 1 <side
    order>\\n`` (``foldfarm certificate 1 <side order> tree <tree>\\n`` for
    a run on a tree other than 1, whose prefixes name other subtrees)
    followed by one line ``<prefix> <state> <count>\\n`` per done
    or split task, sorted by prefix as a tuple of numbers (the order the
    pass reads them in).  Done counts
    and split partial counts together make the total, so the digest
    certifies it.  Two stores holding the same run give the same digest,
    and so does the same plan counted again with the same node budget
    (budgets in seconds split at other places: same total, other digest).  The first
    digest is stored with the run and never replaced: a later
    verification that computes another one fails.
"""

from __future__ import annotations

import copy
import hashlib
import itertools
import math
import random
from collections import Counter, OrderedDict
from collections.abc import Callable, Iterable
from dataclasses import dataclass, field

from foldfarm.errors import UserError
from foldfarm.prefix import PrefixError, Steps, is_ancestor, parse_prefix, prefix_text, sort_key
from foldfarm.symmetry import LEGACY_TREE, reduction, tree_of

#: Check names, in the order they are reported.
CHECKS = ("total", "completeness", "divisibility", "audit", "published", "transpose", "certificate")
#: Audit fraction of a run whose settings name none.
DEFAULT_AUDIT = 0.01
#: Run states in which the total is final and the outcome can be stored.
FINISHED = ("done", "verified", "suspect")
#: Problems quoted in a detail line; the rest are counted.
SHOWN = 3

#: Children of each node of a batch (the next steps, in the kernel's order); None for a node that is
#: not in the tree or has no nodes below it (its children are the foldings counted in bulk).
Kids = Callable[[list[Steps]], list[list[int] | None]]


def outcome(ok: bool | None, detail: str, **extra) -> dict:
    """One check's result: ``ok`` (None: not applicable or skipped), one-line ``detail``, extra fields."""
    return {"ok": ok, "detail": detail, **extra}


def passed(checks: dict) -> bool:
    """Whether no check failed (skipped and not-applicable checks do not fail a run)."""
    return all(c.get("ok") is not False for c in checks.values())


def _listed(problems: list[str], more: int = 0) -> str:
    """The first :data:`SHOWN` problems, and how many more there are (``more`` beyond the list)."""
    rest = len(problems) - SHOWN + more if len(problems) > SHOWN else more
    return "; ".join(problems[:SHOWN]) + (f"; and {rest} more problem(s)" if rest > 0 else "")


# --------------------------------------------------------------------------
# One pass over the task rows, in tree order
# --------------------------------------------------------------------------

#: Task rows read between two batches of :data:`Kids` questions: what the pass holds at once beyond O(depth).
CHUNK = 8192
#: Kinds of completeness problems, in the order they are reported.
KINDS = ("malformed", "order", "open", "gaps", "cover", "parents", "splits", "overlap")


class Problems:
    """Completeness problems by kind: every one counted, the first ``keep`` of each kind kept (None: all)."""

    def __init__(self, keep: int | None = SHOWN):
        self.keep = keep
        self.kept: dict[str, list[str]] = {kind: [] for kind in KINDS}
        self.counts: Counter = Counter()

    def add(self, kind: str, message: str) -> None:
        self.counts[kind] += 1
        if self.keep is None or len(self.kept[kind]) < self.keep:
            self.kept[kind].append(message)

    def replace(self, kind: str, messages: list[str]) -> None:
        """Report ``messages`` instead of every problem of ``kind`` found so far."""
        self.kept[kind], self.counts[kind] = [], 0
        for message in messages:
            self.add(kind, message)

    def __len__(self) -> int:
        return sum(self.counts.values())

    def messages(self) -> list[str]:
        """The kept messages, kind by kind."""
        return [m for kind in KINDS for m in self.kept[kind]]

    def detail(self) -> str:
        """The first :data:`SHOWN` problems and how many more there are."""
        shown = self.messages()
        return _listed(shown, len(self) - len(shown))


class Certificate:
    """The run's digest (see the module docstring), fed entries in tuple order of their steps.

    Entries with equal steps (impossible in a store, whose prefixes are
    unique in a run) are hashed sorted among themselves, as
    :func:`certificate` does; an entry out of order is hashed where it
    comes (the completeness check reports it).
    """

    def __init__(self, side_order: str, tree: int = LEGACY_TREE):
        header = f"foldfarm certificate 1 {side_order}" + (f" tree {tree}" if tree != LEGACY_TREE else "")
        self._hash = hashlib.sha256(f"{header}\n".encode())
        self._same: list[tuple[Steps, str, int]] = []  # entries with the steps of the last one

    def add(self, steps: Steps, state: str, count: int) -> None:
        if self._same and self._same[0][0] != steps:
            self._flush()
        self._same.append((steps, state, count))

    def _flush(self) -> None:
        for steps, state, count in sorted(self._same):
            self._hash.update(f"{prefix_text(steps)} {state} {count}\n".encode())
        self._same = []

    def digest(self) -> str:
        """``sha256:`` and the hex digest of everything added."""
        self._flush()
        return "sha256:" + self._hash.hexdigest()


def certificate(side_order: str, entries: Iterable[tuple[Steps, str, int]], tree: int = LEGACY_TREE) -> str:
    """Digest of a run's done and split tasks on tree ``tree``, given in any order (see the module docstring).

    >>> a = certificate("4x3", [((2,), "done", 24), ((1,), "split", 12)])
    >>> a == certificate("4x3", [((1,), "split", 12), ((2,), "done", 24)]), a.startswith("sha256:")
    (True, True)
    >>> a == certificate("4x3", [((2,), "done", 36), ((1,), "split", 12)])
    False
    >>> a == certificate("4x3", [((2,), "done", 24), ((1,), "split", 12)], tree=2)
    False
    """
    digest = Certificate(side_order, tree)
    for entry in sorted(entries):
        digest.add(*entry)
    return digest.digest()


def _inside(a: Steps, b: Steps) -> bool:
    """Whether node ``b`` lies strictly below node ``a``."""
    return len(a) < len(b) and b[:len(a)] == a


@dataclass(eq=False)
class _Inner:
    """An open inner node of the plan's walk: a proper ancestor of a planned task, its subtree not read to the end.

    ``inner`` and ``tops`` are the last steps of its children that are
    inner nodes or planned tasks; ``kids`` the kernel's children; ``walked``
    whether the walk from the root reaches it (through children the kernel
    knows, above the depth limit).
    """

    node: Steps
    parent: _Inner | None
    inner: set[int] = field(default_factory=set)
    tops: set[int] = field(default_factory=set)
    kids: list[int] | None = None
    walked: bool = False


@dataclass(eq=False)
class _Split:
    """An open split task: its remainder tasks read so far and, once closed, the base of its walk (see
    :func:`_remainder_problems`)."""

    id: int
    steps: Steps
    children: list[Steps] = field(default_factory=list)
    base: Steps | None = None
    problem: str | None = None


class Scan:
    """One pass over a run's task rows in tree order: sums, divisibility, sample, certificate, completeness.

    Rows (``id, prefix, state, count, parent_id, worker`` and, where the
    store has it, ``sort_key``) come in tuple order of their prefixes
    (:func:`foldfarm.prefix.sort_key`): every task comes directly before
    the tasks below it.  So the checks that compare tasks with one another
    are local, and the pass holds O(depth) state besides one chunk of
    :data:`CHUNK` rows:

    * the planned tasks (no parent) partition the tree: a stack of the
      open inner nodes (the proper ancestors of the last planned task);
      when one is closed, its children in the tree are compared with the
      children that are planned tasks or inner nodes (see
      :meth:`_close_inner`); two planned tasks overlap exactly when one is
      an ancestor of the next;
    * a remainder task's parent must be the nearest split task above it, so
      a stack of the open split tasks collects each one's remainder and
      judges it when the split is closed (:func:`_remainder_problems`);
    * done tasks overlap exactly when one is an ancestor of the next done task.

    The kernel's children (``kids``) are asked once a chunk, for the
    inner nodes opened and the splits closed in it, in one batch.
    ``sample`` holds the done tasks at ``sample_positions`` (0-based,
    among the done tasks in this order); of the tasks with a count off the
    factor the first :data:`SHOWN` are kept and the rest counted;
    ``problems`` keeps ``keep`` messages of each kind (None: all, for tests).
    """

    def __init__(self, factor: int, kids: Kids, cells: int, sample_positions: Iterable[int] = (),
                 digest: Certificate | None = None, keep: int | None = SHOWN):
        self.factor, self.kids, self.cells, self.digest = factor, kids, cells, digest
        self.states: Counter = Counter()
        self.done_sum = self.split_sum = 0
        self.not_multiple: list[tuple[str, int]] = []
        self.not_multiple_more = 0
        self.sample: list = []
        self.first_id: int | None = None  # the smallest and largest task id
        self.last_id: int | None = None
        self.planned = 0
        self.problems = Problems(keep)
        self.malformed = 0
        self._wanted = sorted(set(sample_positions), reverse=True)
        self._done_seen = 0
        self._last: Steps | None = None  # of the last row in order
        self._last_top: Steps | None = None
        self._top_clash: tuple[Steps, Steps] | None = None
        self._last_done: Steps | None = None
        self._done_clash: tuple[Steps, Steps] | None = None
        self._inner: list[_Inner] = []
        self._splits: list[_Split] = []
        self._stray: list = [None, None, 0]  # misparented rows in a row: parent id, enclosing split, how many
        self._events: list[tuple[str, object]] = []
        self._ask: list[Steps] = []

    @property
    def total(self) -> int:
        """Foldings counted: done counts plus split partial counts."""
        return self.done_sum + self.split_sum

    def read(self, rows: Iterable) -> Scan:
        """Read every row, in chunks of :data:`CHUNK`; then close what is open.  Returns ``self``."""
        rows = iter(rows)
        while chunk := list(itertools.islice(rows, CHUNK)):
            for row in chunk:
                self._row(row)
            self._settle()
        while self._inner:
            self._pop_inner()
        while self._splits:
            self._pop_split()
        self._settle()
        self._flush_stray()
        if self.planned == 0:
            self.problems.add("cover", "no task covers the tree")
        if self._top_clash is not None:  # the walk assumes disjoint subtrees; what it found would only add noise
            a, b = (prefix_text(s) for s in self._top_clash)
            self.problems.replace("cover", [f"tasks {a} and {b} overlap" if a != b else f"task {a} appears twice"])
        if self._done_clash is not None:
            self.problems.add("overlap", "done tasks {} and {} overlap".format(*map(prefix_text, self._done_clash)))
        return self

    # -- one row ------------------------------------------------------------------------------------

    def _row(self, row) -> None:
        self.states[row.state] += 1
        self.first_id = row.id if self.first_id is None else min(self.first_id, row.id)
        self.last_id = row.id if self.last_id is None else max(self.last_id, row.id)
        try:
            steps = parse_prefix(row.prefix)
        except PrefixError:
            self.malformed += 1
            self.problems.add("malformed", f"task {row.id} has the malformed prefix {row.prefix[:40]!r}")
            return
        ordered = self._in_order(row, steps)
        if row.state in ("done", "split"):
            self._counted(row, steps)
        if ordered:
            self._place(row, steps)

    def _in_order(self, row, steps: Steps) -> bool:
        """Whether the row comes in tree order (its stored sort key, if any, matching its prefix); else report it."""
        stored = getattr(row, "sort_key", None)
        if stored is not None and stored != sort_key(steps):
            self.problems.add("order", f"task {row.id} ({row.prefix}) does not match its sort key: its prefix "
                                       "changed after it was stored")
            return False
        if self._last is not None and steps < self._last:
            self.problems.add("order", f"task {row.id} ({row.prefix}) comes after {prefix_text(self._last)}, "
                                       "out of tree order")
            return False
        self._last = steps
        return True

    def _counted(self, row, steps: Steps) -> None:
        count = int(row.count)
        if self.digest is not None:
            self.digest.add(steps, row.state, count)
        if count % self.factor and len(self.not_multiple) < SHOWN:
            self.not_multiple.append((row.prefix, count))
        elif count % self.factor:
            self.not_multiple_more += 1
        if row.state == "split":
            self.split_sum += count
        else:
            self.done_sum += count
            if self._wanted and self._wanted[-1] == self._done_seen:
                self._wanted.pop()
                self.sample.append(row)
            self._done_seen += 1

    def _place(self, row, steps: Steps) -> None:
        """The row's place in the tree: planned task, remainder of the split above it, overlap of done tasks."""
        while self._splits and not _inside(self._splits[-1].steps, steps):
            self._pop_split()
        enclosing = self._splits[-1] if self._splits else None
        if row.parent_id is None:
            self._planned(steps)
        elif enclosing is not None and enclosing.id == row.parent_id:
            enclosing.children.append(steps)
        else:
            self._misparented(row.parent_id, enclosing)
        if row.state == "done":
            if self._done_clash is None and self._last_done is not None and is_ancestor(self._last_done, steps):
                self._done_clash = (self._last_done, steps)
            self._last_done = steps
        elif row.state == "split":
            self._splits.append(_Split(row.id, steps))

    def _planned(self, steps: Steps) -> None:
        self.planned += 1
        if self._top_clash is None and self._last_top is not None and is_ancestor(self._last_top, steps):
            self._top_clash = (self._last_top, steps)
            self._inner.clear()  # the walk's findings will not be reported
        self._last_top = steps
        if self._top_clash is not None:
            return
        while self._inner and not _inside(self._inner[-1].node, steps):
            self._pop_inner()
        for j in range(len(self._inner[-1].node) + 1 if self._inner else 0, len(steps)):
            parent = self._inner[-1] if self._inner else None
            frame = _Inner(steps[:j], parent)
            if parent is not None:
                parent.inner.add(steps[j - 1])
            self._inner.append(frame)
            self._events.append(("open", frame))
            self._ask.append(frame.node)
        if steps:
            self._inner[-1].tops.add(steps[-1])

    def _misparented(self, parent_id: int, enclosing: _Split | None) -> None:
        """Count rows in a row that name the same wrong parent inside the same split (one message for them)."""
        if self._stray[:2] != [parent_id, enclosing]:
            self._flush_stray()
            self._stray = [parent_id, enclosing, 0]
        self._stray[2] += 1

    def _flush_stray(self) -> None:
        parent_id, enclosing, n = self._stray
        if n:
            where = "none" if enclosing is None else f"task {enclosing.id}, {prefix_text(enclosing.steps)}"
            self.problems.add("parents", f"{n} task(s) name task {parent_id} as parent, which is not the split task "
                                         f"they lie in ({where})")
        self._stray = [None, None, 0]

    def _pop_inner(self) -> None:
        self._events.append(("close", self._inner.pop()))

    def _pop_split(self) -> None:
        split = self._splits.pop()
        name, children = prefix_text(split.steps), split.children
        if not children:
            split.problem = f"split task {name} has no remainder tasks"
        else:
            depth = max(len(c) for c in children)
            base = next(c for c in children if len(c) == depth)[:-1]
            if any(c[:-1] != base for c in children if len(c) == depth):
                split.problem = f"the deepest remainder tasks of split task {name} are not siblings"
            elif len(base) + 2 >= self.cells:
                split.problem = f"remainder tasks of split task {name} go deeper than the tree"
            else:
                split.base = base
                self._ask += [base[:k] for k in range(len(split.steps), len(base) + 1)]
        self._events.append(("split", split))

    # -- what the kernel says -----------------------------------------------------------------------

    def _settle(self) -> None:
        """Ask the kernel about this chunk's nodes in one batch, then judge what was opened and closed."""
        if not self._events:
            return
        nodes = list(dict.fromkeys(self._ask))
        answers = dict(zip(nodes, self.kids(nodes))) if nodes else {}
        for what, item in self._events:
            if what == "open":
                self._open_inner(item, answers[item.node])
            elif what == "close":
                self._close_inner(item)
            else:
                for problem in _remainder_problems(item, answers):
                    self.problems.add("splits", problem)
        self._events, self._ask = [], []

    def _open_inner(self, frame: _Inner, kids: list[int] | None) -> None:
        frame.kids = kids
        up = frame.parent
        frame.walked = up is None or (up.walked and len(up.node) + 2 < self.cells and frame.node[-1] in (up.kids or ()))
        if frame.walked and len(frame.node) + 2 >= self.cells:
            self.problems.add("cover", f"tasks below {prefix_text(frame.node)} go deeper than the tree")

    def _close_inner(self, frame: _Inner) -> None:
        """Every child of a walked inner node is a planned task or an inner node, and every such child is a
        child of it in the tree."""
        if not frame.walked or len(frame.node) + 2 >= self.cells:
            return
        real = frame.kids or ()
        for k in sorted(real):
            if k not in frame.inner and k not in frame.tops:
                self.problems.add("cover", f"the subtree {prefix_text(frame.node + (k,))} belongs to no task")
        for k in sorted((frame.inner | frame.tops) - set(real)):
            self.problems.add("cover", f"task prefix {prefix_text(frame.node + (k,))} is not a node of the tree")


def _remainder_problems(split: _Split, answers: dict[Steps, list[int] | None]) -> list[str]:
    """Why a split task's children are not its remainder (empty: they are).

    A task that ran out of budget stopped at some node D, about to expand
    it; its remainder is D plus, at every level from D up to the task's
    prefix, the siblings the search had not tried yet: those before the
    path's step in the kernel's order of children.  So D determines the
    remainder.  D is the deepest remainder task whose last step comes
    latest in its parent's children (the parent is the ``base`` of the
    walk, found when the split was closed); the remainder is then
    recomputed and compared as a set.  (Losing D itself would look like a
    search that finished D; the id-gap check catches that.)  ``answers``
    holds the kernel's children of every node from the split's prefix down
    to the base.
    """
    if split.problem is not None:
        return [split.problem]
    prefix, base, name = split.steps, split.base, prefix_text(split.steps)
    got = []
    for at in range(len(prefix), len(base) + 1):
        steps = answers[base[:at]]
        if steps is None:
            return [f"split task {name}: {prefix_text(base[:at])} is not a node of the tree with nodes below it"]
        got.append(steps)
        if at < len(base) and base[at] not in steps:
            return [f"split task {name}: {prefix_text(base[:at + 1])} is not a node of the tree"]
    last = [c[-1] for c in split.children if len(c) == len(base) + 1]
    if any(step not in got[-1] for step in last):
        return [f"a deepest remainder task of split task {name} is not a node of the tree"]
    stop = base + (max(last, key=got[-1].index),)
    expected = {stop}
    for j in range(len(stop) - 1, len(prefix) - 1, -1):
        siblings = got[j - len(prefix)]
        expected.update(stop[:j] + (k,) for k in siblings[:siblings.index(stop[j])])
    found = set(split.children)
    missing, extra = sorted(expected - found), sorted(found - expected)
    problems = []
    if missing:
        more = f" and {len(missing) - SHOWN} more" if len(missing) > SHOWN else ""
        named = ", ".join(map(prefix_text, missing[:SHOWN]))
        problems.append(f"split task {name} lacks remainder task(s) {named}{more}")
    if extra:
        problems.append(f"split task {name} has task(s) {', '.join(map(prefix_text, extra[:SHOWN]))} outside its "
                        "remainder")
    return problems


def scan_tasks(rows: Iterable, factor: int, kids: Kids, cells: int, sample_positions: Iterable[int] = (),
               digest: Certificate | None = None, keep: int | None = SHOWN) -> Scan:
    """Read task rows in tree order once (see :class:`Scan`); ``cells`` is the map's number of cells.

    >>> from foldfarm.store import CheckRow
    >>> rows = [CheckRow(1, "/1", "done", 24, None, "w1"), CheckRow(2, "/2", "split", 12, None, None),
    ...         CheckRow(3, "/2/1", "done", 36, 2, "w2")]
    >>> every_node_has_three = lambda nodes: [[1, 2, 3]] * len(nodes)
    >>> s = scan_tasks(rows, 12, every_node_has_three, 6, sample_positions=[1])
    >>> s.total, s.planned, [r.id for r in s.sample], s.problems.messages()
    (72, 2, [3], ['the subtree /3 belongs to no task'])
    """
    return Scan(factor, kids, cells, sample_positions, digest, keep).read(rows)


# --------------------------------------------------------------------------
# Total, divisibility, published values, certificate
# --------------------------------------------------------------------------

def total_check(scan: Scan, stored: int | None, finished: bool) -> dict:
    """The exact sum against the total stored when the run finished."""
    summed = (f"{scan.total} = {scan.done_sum} in {scan.states['done']} done task(s) "
              f"+ {scan.split_sum} in {scan.states['split']} split task(s)")
    if not finished:
        return outcome(None, f"run not finished; counted so far: {summed}", value=scan.total)
    if stored != scan.total:
        return outcome(False, f"the stored total {stored} differs from the sum of the tasks, {summed}",
                       value=scan.total, stored=stored)
    return outcome(True, summed, value=scan.total)


def symmetry_factor(sides: tuple[int, ...], tree: int) -> int:
    """The factor every count of a run on tree ``tree`` of the map with working sides ``sides`` has.

    Each leaf of the reduced tree stands for that many foldings: the
    rotations of the folded stack, turning it over, and (on tree 2) the
    map's own symmetries that act freely (:mod:`foldfarm.symmetry`; proofs
    in :mod:`foldfarm.kernel`, which counts one leaf per ``factor`` foldings).

    >>> [symmetry_factor(s, 1) for s in ((), (2,), (3,), (3, 8))], symmetry_factor((3, 8), 2)
    ([1, 2, 6, 48], 96)
    """
    return reduction(tuple(sides), tree).factor


def divisibility_check(scan: Scan, sides: tuple[int, ...], tree: int) -> dict:
    """The total and every task count are multiples of the run's :func:`symmetry_factor`."""
    red = reduction(tuple(sides), tree)
    factor, why = red.factor, f"{red.why}, tree {tree}"
    bad = [f"task {p} counts {c} = {factor} x {c // factor} + {c % factor}" for p, c in scan.not_multiple]
    if scan.total % factor:
        bad.insert(0, f"the total {scan.total} leaves {scan.total % factor} over")
    if bad:
        return outcome(False, f"not divisible by {factor} ({why}): {_listed(bad, scan.not_multiple_more)}",
                       factor=factor)
    return outcome(True, f"{scan.total} = {factor} x {scan.total // factor}; every task count is a multiple "
                         f"of {factor} ({why})", factor=factor)


def published_check(shape: str, total: int, finished: bool) -> dict:
    """The total against every published value for ``shape``, naming each source.

    >>> published_check("3x4", 15552, True)["detail"]
    '15552 equals the published value (OEIS A001416)'
    >>> published_check("3x4", 15553, True)["ok"]
    False
    """
    from foldfarm.published import published

    values = published(shape)
    sources = [{"source": v.source, "count": v.count} for v in values]
    if not values:
        return outcome(None, f"no published value for {shape} in foldfarm's table", sources=sources)
    if not finished:
        named = ", ".join(f"{v.count} ({v.source})" for v in values)
        return outcome(None, f"run not finished; published: {named}", sources=sources)
    wrong = [v for v in values if v.count != total]
    if wrong:
        named = "; ".join(f"{v.count} published in {v.source}" for v in wrong)
        return outcome(False, f"{total} differs from {named}", sources=sources)
    named = ", ".join(v.source for v in values)
    return outcome(True, f"{total} equals the published value ({named})", sources=sources)


def certificate_check(digest: str, stored: str | None, finished: bool = True) -> dict:
    """A newly computed digest against the one stored with the run (if any).

    >>> certificate_check("sha256:ab", None, finished=False)["detail"]
    'sha256:ab (run not finished: the digest of the tasks so far, not stored)'
    """
    if stored is None and not finished:
        return outcome(None, f"{digest} (run not finished: the digest of the tasks so far, not stored)", digest=digest)
    if stored is None:
        return outcome(True, f"{digest} (first verification: stored with the run)", digest=digest)
    if stored != digest:
        return outcome(False, f"the tasks now give {digest}, but {stored} was stored when the run was first "
                              "verified: its tasks changed since", digest=digest, stored=stored)
    return outcome(True, f"{digest} (same as stored)", digest=digest)


# --------------------------------------------------------------------------
# Completeness
# --------------------------------------------------------------------------

def completeness_check(scan: Scan, gaps: Iterable[tuple[int, int]] = ()) -> dict:
    """No open task, the plan covers the tree, splits have their remainders, no overlap, no deleted task.

    ``scan`` has read every row; ``gaps`` are ranges of task ids next to
    this run's tasks that no task has.
    """
    problems = completeness_problems(scan, gaps)
    tasks = sum(scan.states.values())
    if problems:
        return outcome(False, problems.detail(), problems=len(problems))
    return outcome(True, f"all {tasks} task(s) closed ({scan.states['done']} done, {scan.states['split']} split); "
                         f"the {scan.planned} planned task(s) cover the tree; every split has its whole remainder; "
                         "no done tasks overlap; no task id is missing")


def completeness_problems(scan: Scan, gaps: Iterable[tuple[int, int]] = ()) -> Problems:
    """The scan's problems with the open tasks and the missing ids (the more malformed prefixes summed up)."""
    problems = copy.deepcopy(scan.problems)
    if scan.malformed > SHOWN:
        problems.replace("malformed", problems.kept["malformed"][:SHOWN] +
                         [f"{scan.malformed - SHOWN} more malformed prefix(es)"])
    open_tasks = {s: scan.states[s] for s in ("pending", "running", "failed") if scan.states[s]}
    if open_tasks:
        problems.add("open", "open tasks: " + ", ".join(f"{n} {s}" for s, n in open_tasks.items()))
    for a, b in gaps:
        problems.add("gaps", f"task ids {a}..{b} are missing from the store (ids are never freed: deleted?)"
                     if a != b else f"task id {a} is missing from the store (ids are never freed: deleted?)")
    return problems


class TreeChildren:
    """:data:`Kids` from the kernel for one map's tree, memoised (the last :attr:`KEEP` nodes), a batch at a time.

    ``sides`` are the working sides of the map, ``tree`` the run's search
    tree (:func:`foldfarm.symmetry.tree_of`).  A node is expanded only
    once it is known to be in the tree (a child of a node expanded before,
    here or earlier in the same batch), or after the kernel replayed it: the
    compiled search does not check its input.  ``fetch(nodes, trusted)``
    does the kernel's part (:func:`foldfarm.worker.children` for these
    sides and tree): by default in this process, or on a Dask worker (see
    :func:`verify_run`), where asking for a chunk's nodes at once saves
    a round trip a node.  The memo keeps the nodes asked about most
    recently, so memory stays bounded however many nodes a pass asks
    about; a node whose parent was forgotten is replayed (same answer).
    """

    BATCH = 4096
    KEEP = 1 << 16

    def __init__(self, sides: tuple[int, ...], tree: int,
                 fetch: Callable[[list[Steps], list[bool]], list] | None = None):
        from foldfarm.worker import children

        self.cells = math.prod(sides)
        self.fetch = fetch or (lambda nodes, trusted: children(sides, nodes, trusted, tree=tree))
        self.memo: OrderedDict[Steps, list[int] | None] = OrderedDict()

    def __call__(self, nodes: list[Steps]) -> list[list[int] | None]:
        known = {}
        for node in dict.fromkeys(nodes):
            if node in self.memo:
                self.memo.move_to_end(node)
                known[node] = self.memo[node]
        todo = sorted((v for v in dict.fromkeys(nodes) if v not in known), key=len)  # parents first
        for start in range(0, len(todo), self.BATCH):
            batch, trusted = [], []
            for node in todo[start:start + self.BATCH]:
                parent = node[:-1] if node else None
                if len(node) + 2 >= self.cells:
                    known[node] = None
                elif parent is not None and (parent in known or parent in self.memo):  # judged by its parent
                    steps = known[parent] if parent in known else self.memo[parent]
                    if steps is not None and node[-1] in steps:
                        batch.append(node)
                        trusted.append(True)
                    else:
                        known[node] = None
                else:  # replayed, or judged by its parent in the same batch
                    batch.append(node)
                    trusted.append(False)
            for node, steps in zip(batch, self.fetch(batch, trusted)):
                known[node] = steps
        self.memo.update(known)
        while len(self.memo) > self.KEEP:
            self.memo.popitem(last=False)
        return [known[v] for v in nodes]


# --------------------------------------------------------------------------
# Audit
# --------------------------------------------------------------------------

def parse_fraction(value: object) -> float:
    """``value`` as an audit fraction in 0..1, or :class:`UserError`."""
    try:
        fraction = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        fraction = math.nan
    if not 0.0 <= fraction <= 1.0:
        raise UserError(f"the audit fraction must be a number from 0 to 1 (0.01 audits 1% of the tasks), not {value!r}")
    return fraction


def sample_positions(done: int, fraction: float, seed: int) -> list[int]:
    """Positions (0-based, among done tasks in tree order) of those to audit: ``fraction`` of ``done``, at least one.

    >>> sample_positions(1000, 0.01, 7) == sample_positions(1000, 0.01, 7), len(sample_positions(50, 0.01, 0))
    (True, 1)
    >>> sample_positions(0, 0.5, 0), sample_positions(10, 0.0, 0), sample_positions(3, 1.0, 0)
    ([], [], [0, 1, 2])
    """
    if done <= 0 or fraction <= 0:
        return []
    k = min(done, max(1, math.ceil(fraction * done)))
    return sorted(random.Random(seed).sample(range(done), k))


def pick_worker(workers: list[str], avoid: Iterable[str | None], turn: int = 0) -> str | None:
    """A worker not in ``avoid`` (round robin by ``turn``), or None when every worker is to be avoided.

    >>> pick_worker(["a", "b", "c"], ["a"], 0), pick_worker(["a", "b", "c"], ["a"], 1), pick_worker(["a"], ["a"])
    ('b', 'c', None)
    """
    others = [w for w in workers if w not in set(avoid)]
    return others[turn % len(others)] if others else None


def judge_audit(recorded: int, second: int, third: int | None) -> str:
    """Which count is out of line: ``"none"``, ``"first"`` (the recorded one), ``"second"``, or ``"unresolved"``.

    >>> judge_audit(24, 24, None), judge_audit(24, 36, 36), judge_audit(24, 36, 24), judge_audit(24, 36, 48)
    ('none', 'first', 'second', 'unresolved')
    """
    if recorded == second:
        return "none"
    if third == second:
        return "first"
    if third == recorded:
        return "second"
    return "unresolved"


def audit_outcome(audited: int, fraction: float, seed: int, mismatches: list[dict], errors: list[str],
                  same_worker: int = 0) -> dict:
    """Summarise an audit: a mismatch fails it and names the worker that disagreed; a task that could not
    be counted again (a lost worker) leaves it unconfirmed (None), not failed.  ``same_worker`` tasks were
    counted again by the worker that recorded them (a one-worker cluster)."""
    extra = {"audited": audited, "fraction": fraction, "seed": seed, "mismatches": mismatches, "errors": errors,
             "same_worker": same_worker}
    if not mismatches and not errors:
        where = "another worker" if not same_worker else \
            f"another worker ({same_worker} on the same one: the cluster has no other)"
        return outcome(True, f"{audited} done task(s) counted again on {where}: all agree", **extra)
    lines = []
    for m in mismatches:
        who = {"first": f"worker {m['recorded_by']} (which recorded it) disagrees",
               "second": f"worker {m['audited_by']} (the auditor) disagrees",
               "unresolved": "no two counts agree"}[m["verdict"]]
        lines.append(f"task {m['task']} ({m['prefix']}) recorded {m['recorded']} by {m['recorded_by']}, "
                     f"{m['audit']} on {m['audited_by']}, {m['third']} on {m['third_by']}: {who}")
    if mismatches:
        return outcome(False, f"{len(mismatches)} of {audited} audited task(s) disagree: {_listed(lines + errors)}",
                       **extra)
    return outcome(None, f"not confirmed: {len(errors)} of {audited} audited task(s) could not be counted again "
                         f"(verify again): {_listed(errors)}", **extra)


#: Sampled tasks counted again in one Dask task, and such bundles out at once per worker: a sample is 1% of
#: a run's tasks (100,000 of 10^7), which must neither wait on a Dask task each nor all be out at once.
AUDIT_BUNDLE = 64
AUDIT_OUT_PER_WORKER = 4


def audit_bundles(chosen: list[str], size: int = AUDIT_BUNDLE) -> list[tuple[str, list[int]]]:
    """Positions in the sample grouped by the worker chosen to recount them, at most ``size`` a group, in order.

    >>> audit_bundles(["a", "b", "a", "a", "b"], size=2)
    [('a', [0, 2]), ('b', [1, 4]), ('a', [3])]
    """
    open_: dict[str, list[int]] = {}
    bundles: list[tuple[str, list[int]]] = []
    for i, worker in enumerate(chosen):
        group = open_.get(worker)
        if group is None or len(group) == size:
            group = open_[worker] = []
            bundles.append((worker, group))
        group.append(i)
    return bundles


def _second_counts(client, sides: tuple[int, ...], tree: int, sample: list, chosen: list[str]):
    """Yield ``(position in the sample, result or exception)`` of every sampled task counted again on its worker.

    Bundles of :data:`AUDIT_BUNDLE` go out in order, at most
    :data:`AUDIT_OUT_PER_WORKER` per worker at once.
    """
    from distributed import as_completed

    from foldfarm.worker import work

    bundles = iter(audit_bundles(chosen))
    limit = AUDIT_OUT_PER_WORKER * len(set(chosen))
    out = as_completed()
    what = {}

    def send() -> bool:
        worker, positions = next(bundles, (None, None))
        if worker is None:
            return False
        future = client.submit(work, sides, "\n".join(sample[i].prefix for i in positions), 0, 0, tree=tree,
                               workers=[worker], allow_other_workers=False, pure=False)
        what[future] = positions
        out.add(future)
        return True

    while len(what) < limit and send():
        pass
    for future in out:
        positions = what.pop(future)
        try:
            results = future.result()
        except Exception as exc:  # a lost worker: these tasks are not confirmed
            results = [exc] * len(positions)
        future.release()
        yield from zip(positions, results)
        send()


def _audit(store, sides: tuple[int, ...], tree: int, sample: list, client, fraction: float, seed: int) -> dict:
    """Count each sampled done task again (on the run's tree) on another worker; on a mismatch a third time."""
    from foldfarm.worker import work

    workers = sorted(client.scheduler_info()["workers"])
    if not workers:
        return outcome(None, "skipped: the cluster has no workers", audited=0, fraction=fraction, seed=seed)
    chosen = [pick_worker(workers, [row.worker], i) or workers[i % len(workers)] for i, row in enumerate(sample)]
    mismatches, errors = [], []
    for i, second in _second_counts(client, sides, tree, sample, chosen):
        row, worker = sample[i], chosen[i]
        if isinstance(second, Exception):  # a lost worker: the task is not confirmed, say so
            why = (str(second).strip().splitlines() or [type(second).__name__])[0]
            errors.append((i, f"task {row.id} ({row.prefix}) could not be counted again on {worker}: {why}"))
            continue
        by = second["worker"] or worker
        if store.record_audit(row.id, second["count"], nodes=second["nodes"], seconds=second["seconds"], worker=by):
            continue
        third = None
        third_worker = pick_worker(workers, [row.worker, by])
        if third_worker is not None:
            try:
                third = client.submit(work, sides, [row.prefix], 0, 0, tree=tree, workers=[third_worker],
                                      allow_other_workers=False, pure=False).result()[0]
            except Exception:  # that worker is gone too: count here instead
                third = None
        if third is None:  # no third worker: this process counts it
            third, third_worker = work(sides, [row.prefix], 0, 0, tree=tree)[0], None
        third_by = third["worker"] or third_worker or "the verifying process"
        store.record_audit(row.id, third["count"], nodes=third["nodes"], seconds=third["seconds"],
                           worker=third["worker"] or third_worker)
        verdict = judge_audit(int(row.count), second["count"], third["count"])
        mismatches.append((i, {
            "task": row.id, "prefix": row.prefix, "recorded": int(row.count), "recorded_by": row.worker,
            "audit": second["count"], "audited_by": by, "third": third["count"], "third_by": third_by,
            "verdict": verdict,
            "disagreeing_worker": {"first": row.worker, "second": by}.get(verdict),
        }))
    same = sum(1 for row, w in zip(sample, chosen) if w == row.worker)
    in_order = [m for _, m in sorted(mismatches, key=lambda im: im[0])]  # as the sample, whichever came back first
    return audit_outcome(len(sample), fraction, seed, in_order, [e for _, e in sorted(errors)], same)


# --------------------------------------------------------------------------
# Transpose
# --------------------------------------------------------------------------

def other_order(sides: tuple[int, ...]) -> tuple[int, ...] | None:
    """Another order of ``sides`` (reversed if that differs), or None if every order is the same.

    >>> other_order((3, 8)), other_order((2, 3, 2)), other_order((4, 4)), other_order(())
    ((8, 3), (2, 2, 3), None, None)
    """
    reverse = tuple(reversed(sides))
    if reverse != sides:
        return reverse
    return next((p for p in sorted(set(itertools.permutations(sides))) if p != sides), None)


def transpose_check(total: int, other_run: int, other_order_text: str, other_total: int | None,
                    other_state: str) -> dict:
    """The total against the total of the same map searched in another side order."""
    extra = {"run": other_run, "side_order": other_order_text, "value": other_total}
    if other_total is None:
        return outcome(False, f"run {other_run} ({other_order_text}) did not finish: {other_state}", **extra)
    if other_total != total:
        return outcome(False, f"{total} differs from {other_total} counted as {other_order_text} in run {other_run}",
                       **extra)
    return outcome(True, f"run {other_run} counted {other_total} as {other_order_text} ({other_state})", **extra)


#: Counts a map as a run of its own and says how that ended: ``recount(shape, settings, run_id)``
#: continues run ``run_id`` (or, when None, creates one of ``shape`` with run ``settings``) and
#: returns ``(run id, total or None, state)``.  The caller supplies it with a cluster behind it
#: (:func:`foldfarm.run.recounter`), so the checks never reach for a cluster themselves.
Recount = Callable[[str, dict, int | None], tuple[int, int | None, str]]


def _transpose(store, run, recount: Recount | None, total: int, previous: dict | None) -> dict:
    """Count the map again with its sides in another order (or reuse the run that did), compare."""
    sides = _sides(run.side_order)
    other = other_order(sides)
    if other is None:
        return outcome(None, f"every side order of {run.shape} gives the same search tree")
    text = "x".join(map(str, other))
    reuse = (previous or {}).get("run")
    if reuse is not None:
        try:
            found = store.get_run(reuse)
        except UserError:
            found = None
        if found is None or found.side_order != text:
            reuse = None
        elif found.state in FINISHED:
            return transpose_check(total, reuse, text, found.total, found.state)
        elif recount is None:
            return outcome(None, f"run {reuse} ({text}) is {found.state}; verify --transpose finishes it", run=reuse)
    if recount is None:
        return outcome(None, "skipped: no cluster")
    reuse, other_total, state = recount(text, {**run.settings, "order": "given"}, reuse)
    return transpose_check(total, reuse, text, other_total, state)


# --------------------------------------------------------------------------
# The whole verification
# --------------------------------------------------------------------------

def _sides(side_order: str) -> tuple[int, ...]:
    return tuple(int(p) for p in side_order.split("x") if int(p) > 1)


def _on_a_worker(client, sides: tuple[int, ...], tree: int) -> Callable[[list[Steps], list[bool]], list]:
    """A ``fetch`` for :class:`TreeChildren` that runs the kernel on a worker of ``client``."""
    from foldfarm.worker import children

    return lambda nodes, trusted: client.submit(children, sides, nodes, trusted, tree=tree, pure=False).result()


def verify_run(store, run_id: int, *, client=None, audit_fraction: float | None = None,
               recount: Recount | None = None, seed: int = 0) -> dict:
    """Run every check on run ``run_id``; store the outcome with a finished run; return the checks.

    ``client`` (a Dask client) runs the audit; without one it is reported
    skipped.  With a client the kernel's part of the completeness check runs
    on a worker too, so this process never loads the kernel.  ``recount``
    (see :data:`Recount`), when given, counts the map in another side order
    for the ``transpose`` check; a run counted that way before is compared
    again without it.
    ``audit_fraction`` defaults to the run's ``audit`` setting; ``seed``
    picks the audited tasks.  A run that is not finished is checked but
    nothing is stored.
    """
    run = store.get_run(run_id)
    finished = run.state in FINISHED
    fraction = parse_fraction(run.settings.get("audit", DEFAULT_AUDIT) if audit_fraction is None else audit_fraction)
    sides = _sides(run.side_order)
    tree = tree_of(run.settings)  # runs made before the map's symmetries were used: tree 1
    cells = math.prod(sides)
    positions = []
    if client is not None:
        positions = sample_positions(store.progress(run_id).tasks["done"], fraction, seed)
    kids = TreeChildren(sides, tree, None if client is None else _on_a_worker(client, sides, tree))
    scan = scan_tasks(store.check_rows(run_id), symmetry_factor(sides, tree), kids, cells, positions,
                      Certificate(run.side_order, tree))
    gaps = [(g.first, g.last) for g in store.missing_task_ids(run_id)]
    checks = {
        "total": total_check(scan, run.total, finished),
        "completeness": completeness_check(scan, gaps),
        "divisibility": divisibility_check(scan, sides, tree),
    }
    if fraction == 0:
        checks["audit"] = outcome(None, "skipped: audit fraction 0", audited=0, fraction=fraction, seed=seed)
    elif client is None:
        checks["audit"] = outcome(None, "skipped: no cluster", audited=0, fraction=fraction, seed=seed)
    elif not scan.sample:
        checks["audit"] = outcome(None, f"skipped: audit fraction {fraction:g} of "
                                        f"{scan.states['done']} done task(s)", audited=0, fraction=fraction, seed=seed)
    else:
        checks["audit"] = _audit(store, sides, tree, scan.sample, client, fraction, seed)
    checks["published"] = published_check(run.shape, scan.total, finished)
    previous = (run.checks or {}).get("transpose")
    if not finished:
        checks["transpose"] = outcome(None, "run not finished: no total to compare yet")
    elif recount is not None or (previous or {}).get("run") is not None:
        checks["transpose"] = _transpose(store, run, recount, scan.total, previous)
    else:
        checks["transpose"] = outcome(None, "not asked (verify --transpose counts the map in another side order)")
    digest = scan.digest.digest()
    checks["certificate"] = certificate_check(digest, run.certificate, finished)
    if finished:
        store.set_verification(run_id, passed(checks), checks=checks,
                               certificate=digest if run.certificate is None else None)
    return checks

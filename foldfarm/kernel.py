"""The counting kernel: Lunnon's 1971 leaf-insertion procedure, compiled with numba.

The search
==========
Leaves ``1..n`` are put on the stack one at a time, in numerical order.  The
stack is a cycle through the sentinel leaf ``0``: reading downwards from ``0``
gives the stack from top to bottom.  When leaf ``l`` is inserted its creases
to its lower neighbours ``l - stride[i]`` (already placed) must not cross a
placed crease of the same dimension and parity class; Lunnon's connection
table (:func:`foldfarm.shape.neighbour_table`) turns that rule into a walk
around the cycle that lists the *gaps* (leaf ``m`` such that ``l`` may go
directly below ``m``) allowed by one dimension.  A gap allowed by every
constrained dimension is a child of the current node.  A node at depth ``k``
is a placement of leaves ``1..k``; the foldings are the placements of all
``n`` leaves.

Search state (int64 arrays, one entry per leaf, index 0 the sentinel):

``above[x]``, ``below[x]``
    the cycle: the leaf directly above / below ``x``.  Invariant: the leaves
    placed so far and ``0`` form one cycle, ``below[above[x]] == x``.
``gap[...]``
    a stack of gap lists, one list per level: the untried children of the
    node at depth ``l - 1`` are ``gap[gapter[l-1]:gapter[l]]`` once leaf
    ``l`` is placed (it took ``gap[gapter[l]]``, later overwritten).
``gapter[l]``
    where level ``l + 1`` starts writing its gap list.
``mark[m]``
    scratch for intersecting the gap lists of several dimensions: equal to
    ``stamp + k`` while gap ``m`` has passed the first ``k`` walks of the
    current node (see :func:`_gaps`); older values are below ``stamp``.

Three savings over the plain procedure
======================================
*Leaf 1 on top* (Lunnon 1971).  Crossing of creases is a property of the
cyclic order of the leaves: four distinct points interleave on a line exactly
when they interleave on the circle obtained by joining its ends.  So a
folding rotated cyclically (top leaf moved to the bottom) is a folding, and
the ``n`` rotations of a folding are distinct foldings of which exactly one
has leaf 1 on top.  Counting only those and multiplying by ``n`` is exact.
We forbid the gap "below the sentinel" (on top of leaf 1) by making the
sentinel column of the table repeat column 1 (``D[l, i, 0] = D[l, i, 1]``):
leaf 1 is always directly below ``0``, so the walk that would step onto ``0``
steps straight to the gap after it, and the forbidden gap is never produced
at all, where the 1971 procedure produces it and prunes the node afterwards.

*Mirror* (stack reversal).  A folding read bottom-up is a folding (turn the
folded map over).  Reverse a folding ``1, x2, ..., xn`` and rotate it so that
leaf 1 is on top again: ``1, xn, ..., x2``.  This is an involution on the
foldings with leaf 1 on top that reverses the relative order of any two
leaves other than 1; for ``n >= 3`` it exchanges those with leaf 2 above
leaf 3 and those with leaf 3 above leaf 2, so the two sets are equally large.
With leaf 1 on top and only leaves 1, 2 placed, leaf 2 is directly below 1;
"3 below 2" is the gap ``m = 2``.  We keep only that gap at depth 3 and
multiply by 2.

*Last leaf in bulk*.  The children of a node at depth ``n - 1`` are the
foldings themselves, one per allowed gap of leaf ``n``; their number is the
length of the filtered gap list, so we add it instead of placing leaf ``n``
and descending.  Nodes at depth ``n`` are therefore never visited, and a
prefix never places leaf ``n``.

Together, ``count = n * (2 if n >= 3 else 1) * (leaves of the reduced
tree)``; :attr:`Tables.factor` holds the multiplier.  ``tests/test_kernel.py``
checks each saving against :func:`count_plain`, a transcription without them.

Tasks and budgets
=================
A *prefix* is the list of gaps chosen for leaves ``2..k`` (``steps[j]`` is the
leaf that leaf ``j + 2`` went directly below).  :func:`count_below` replays a
prefix (rejecting an illegal step), then searches the subtree below it for at
most ``budget`` node expansions.  If the budget runs out it stops *before*
expanding a node and reports the *remainder*: the current node itself plus
the untried siblings at every level below the prefix.  Those prefixes cover
exactly the unexplored part, so ``count so far + sum(remainder counts)`` is
the count of the task.
"""

from __future__ import annotations

import itertools
import math
import threading
import time
from dataclasses import dataclass, field
from functools import lru_cache

import numba
import numpy as np

from foldfarm.prefix import PrefixError, parse_prefix
from foldfarm.shape import Shape, neighbour_table, parse_shape, working_sides

#: Node expansions between two returns from compiled code (about 50 ms): a timed count looks at
#: the clock then, and every count lets Python act on a pending Ctrl-C (compiled code cannot).
CLOCK_CHUNK = 1 << 20

#: ``budget`` meaning "no limit".
UNLIMITED = np.iinfo(np.int64).max


@dataclass(frozen=True)
class Tables:
    """Everything constant during one map's search."""

    sides: tuple[int, ...]
    n: int
    table: np.ndarray = field(repr=False)
    #: search only the half with leaf 2 above leaf 3 (needs n >= 3)
    mirror: bool = False

    @property
    def factor(self) -> int:
        """Foldings per leaf of the reduced tree: n rotations, times 2 mirrored."""
        return self.n * (2 if self.mirror else 1)


@lru_cache(maxsize=32)
def tables_for(sides: tuple[int, ...], mirror: bool = True) -> Tables:
    """Build (and memoise) the kernel tables for working sides ``sides``.

    ``mirror=False`` searches both halves (tests use it to check the saving).
    """
    n = math.prod(sides)
    table = neighbour_table(sides)
    # Leaf 1 stays on top: the walk steps over the sentinel (see module doc).
    table[:, :, 0] = table[:, :, 1]
    table.setflags(write=False)
    return Tables(sides=sides, n=n, table=table, mirror=mirror and n >= 3)


def prepare(shape: Shape | str, order: str = "fast") -> Tables:
    """Tables for ``shape`` searched with its sides in ``order``."""
    if isinstance(shape, str):
        shape = parse_shape(shape)
    return tables_for(working_sides(shape, order))


# --------------------------------------------------------------------------
# Compiled core
# --------------------------------------------------------------------------

@numba.njit(cache=True, nogil=True, inline="always")
def _insert(above, below, l, m):
    """Put leaf ``l`` into the cycle directly below leaf ``m``."""
    above[l] = m
    below[l] = below[m]
    below[m] = l
    above[below[l]] = l


@numba.njit(cache=True, nogil=True, inline="always")
def _remove(above, below, l):
    """Take leaf ``l`` out of the cycle (its neighbours close ranks)."""
    below[above[l]] = below[l]
    above[below[l]] = above[l]


@numba.njit(cache=True, nogil=True, inline="always")
def _mirror_half(gap, g0, g):
    """Keep only gap 2 in ``gap[g0:g]`` (leaf 3 below leaf 2, see Mirror); return the new end."""
    keep = g0
    for j in range(g0, g):
        if gap[j] == 2:
            gap[keep] = 2
            keep += 1
    return keep


@numba.njit(cache=True, nogil=True, inline="always")
def _gaps(table, l, below, mark, stamp, gap, g0, emit):
    """List the allowed gaps of leaf ``l`` at ``gap[g0:]``; return the end.

    Each constrained dimension walks the cycle once from leaf ``l``'s lower
    neighbour, jumping over every same-class crease it meets (a gap inside
    that crease would cross it).  A gap is allowed when every constrained
    dimension produced it: the ``k``-th walk raises ``mark[m]`` from
    ``stamp + k - 1`` to ``stamp + k``, and the last walk emits the gaps
    whose mark says all earlier walks passed them.  ``stamp`` grows by the
    number of dimensions per node, so old marks never match and no pass is
    spent clearing them.  With ``emit`` false the gaps are counted, not
    written (the last leaf), and the count is returned as ``g0 + count``.
    """
    dims = table.shape[1]
    c = 0
    for i in range(dims):
        c += table[l, i, l] != l
    k = 0
    g = g0
    for i in range(dims):
        m = np.int64(table[l, i, l])
        if m == l:
            continue
        k += 1
        if k == c:
            if c == 1:
                while m != l:
                    gap[g] = m
                    g += 1
                    m = table[l, i, below[m]]
            else:
                want = stamp + k - 1
                if emit:
                    while m != l:
                        gap[g] = m
                        g += mark[m] == want
                        m = table[l, i, below[m]]
                else:
                    while m != l:
                        g += mark[m] == want
                        m = table[l, i, below[m]]
        elif k == 1:
            while m != l:
                mark[m] = stamp + 1
                m = table[l, i, below[m]]
        else:
            want = stamp + k - 1
            while m != l:
                if mark[m] == want:
                    mark[m] = want + 1
                m = table[l, i, below[m]]
    return g


@numba.njit(cache=True, nogil=True)
def _search(table, n, above, below, mark, gap, gapter, level, floor, budget, mirror, stamp):
    """Search below the placed leaves ``1..floor-1``, resuming at ``level``.

    Returns ``(leaves, nodes, level, stamp)``: reduced-tree leaves counted,
    node expansions made, the level about to be expanded when the budget ran
    out (``floor - 1`` when the subtree is finished), and the next stamp.
    """
    dims = table.shape[1]
    leaves = np.int64(0)
    nodes = np.int64(0)
    l = level
    g = np.int64(gapter[l - 1])
    while True:
        if nodes >= budget:
            return leaves, nodes, l, stamp
        nodes += 1
        g0 = g
        if l == n and l != 3:
            leaves += _gaps(table, l, below, mark, stamp, gap, g0, False) - g0
            stamp += dims
            g = g0
        else:
            g = _gaps(table, l, below, mark, stamp, gap, g0, True)
            stamp += dims
            if mirror and l == 3:
                g = _mirror_half(gap, g0, g)
            if l == n:
                leaves += g - g0
                g = g0
        while g == gapter[l - 1]:
            l -= 1
            if l < floor:
                return leaves, nodes, l, stamp
            _remove(above, below, l)
        g -= 1
        _insert(above, below, l, gap[g])
        gapter[l] = g
        l += 1


@numba.njit(cache=True, nogil=True)
def _replay(table, n, above, below, mark, gap, gapter, steps, mirror):
    """Place leaf 1, then leaves ``2..len(steps)+1`` below ``steps``.

    Returns ``(bad, stamp)``: ``bad`` is 0 on success, else the 1-based
    index of the first illegal step.  The placed levels are left with empty
    sibling lists (``gapter`` all 0).
    """
    dims = table.shape[1]
    stamp = np.int64(0)
    mark[:] = 0  # the stamp restarts, so no old mark may survive
    above[0] = 1
    below[0] = 1
    above[1] = 0
    below[1] = 0
    gapter[0] = 0
    gapter[1] = 0
    for j in range(steps.shape[0]):
        l = j + 2
        want = steps[j]
        g = _gaps(table, l, below, mark, stamp, gap, 0, True)
        stamp += dims
        ok = False
        for k in range(g):
            if gap[k] == want:
                ok = True
        if mirror and l == 3 and want != 2:
            ok = False
        if not ok:
            return j + 1, stamp
        _insert(above, below, l, want)
        gapter[l] = 0
    return 0, stamp


@numba.njit(cache=True, nogil=True)
def _probe(table, n, above, below, mark, gap, level, mirror, stamp, probes, seed):
    """Knuth's random probes (1975) below the placed leaves ``1..level-1``.

    Each probe walks from the current node to a dead end or a last-leaf
    node, choosing a child uniformly at random; with ``d_k`` the number of
    children met at the ``k``-th step, ``1 + d_1 + d_1 d_2 + ...`` is an
    unbiased estimate of the nodes expanded by a full search of the subtree
    and ``d_1 d_2 ... d_last`` (0 at a dead end) of its reduced-tree leaves.
    Returns ``(sum_nodes, sum_nodes_sq, sum_leaves, sum_leaves_sq, stamp)``
    over ``probes`` probes; the placed leaves are left as they were.
    """
    dims = table.shape[1]
    np.random.seed(seed)
    s_nodes = 0.0
    s_nodes2 = 0.0
    s_leaves = 0.0
    s_leaves2 = 0.0
    for _ in range(probes):
        l = level
        weight = 1.0
        nodes = 1.0
        leaves = 0.0
        while True:
            g = _gaps(table, l, below, mark, stamp, gap, 0, True)
            stamp += dims
            if mirror and l == 3:
                g = _mirror_half(gap, 0, g)
            if l == n:
                leaves = weight * g
                break
            if g == 0:
                break
            weight *= g
            nodes += weight
            _insert(above, below, l, gap[np.random.randint(0, g)])
            l += 1
        for k in range(l - 1, level - 1, -1):
            _remove(above, below, k)
        s_nodes += nodes
        s_nodes2 += nodes * nodes
        s_leaves += leaves
        s_leaves2 += leaves * leaves
    return s_nodes, s_nodes2, s_leaves, s_leaves2, stamp


@numba.njit(cache=True, nogil=True)
def _expand(table, n, above, below, mark, gap, gapter, steps, mirror, probes, seed):
    """Children of the node ``steps`` and a probe estimate of each one's nodes.

    Returns ``(children, estimates)``: the gaps of the next leaf, and for each
    the mean of ``probes`` node estimates of its subtree (0 probes: all 1.0).
    The node must be legal and must not be a last-leaf node.
    """
    dims = table.shape[1]
    bad, stamp = _replay(table, n, above, below, mark, gap, gapter, steps, mirror)
    l = steps.shape[0] + 2
    g = _gaps(table, l, below, mark, stamp, gap, 0, True)
    stamp += dims
    if mirror and l == 3:
        g = _mirror_half(gap, 0, g)
    kids = gap[:g].copy()
    k = g
    sizes = np.ones(k, np.float64)
    if probes > 0 and k > 1:  # an only child needs no estimate: it is the whole subtree
        for j in range(k):
            _insert(above, below, l, kids[j])
            s_nodes, _, _, _, stamp = _probe(table, n, above, below, mark, gap, l + 1, mirror,
                                             stamp, probes, seed + j)
            sizes[j] = s_nodes / probes
            _remove(above, below, l)
    return kids, sizes


@numba.njit(cache=True, nogil=True)
def _node_seed(steps, seed):
    """Probe seed of a node: FNV-1a over its steps, mixed with ``seed`` (31 bits)."""
    h = np.uint64(14695981039346656037)
    for m in steps:
        h = (h ^ np.uint64(m)) * np.uint64(1099511628211)
    h ^= np.uint64(seed) * np.uint64(0x9E3779B97F4A7C15)
    return np.int64(h >> np.uint64(33))


@numba.njit(cache=True, nogil=True)
def _expand_many(table, n, above, below, mark, gap, gapter, flat, offsets, mirror, probes, seed):
    """:func:`_expand` for many nodes: node ``j`` has steps ``flat[offsets[j]:offsets[j+1]]``.

    Each node's probes are seeded by :func:`_node_seed`, so a node's estimate
    does not depend on the batch it came in.  Returns ``(counts, kids,
    sizes)``: node ``j``'s children are the next ``counts[j]`` entries of
    ``kids``/``sizes``.
    """
    nodes = offsets.shape[0] - 1
    counts = np.zeros(nodes, np.int64)
    kids = np.empty(nodes * n, np.int64)
    sizes = np.empty(nodes * n, np.float64)
    at = 0
    for j in range(nodes):
        steps = flat[offsets[j]:offsets[j + 1]]
        k, s = _expand(table, n, above, below, mark, gap, gapter, steps, mirror, probes,
                       _node_seed(steps, seed))
        counts[j] = k.shape[0]
        kids[at:at + k.shape[0]] = k
        sizes[at:at + k.shape[0]] = s
        at += k.shape[0]
    return counts, kids[:at], sizes[:at]


@numba.njit(cache=True, nogil=True)
def _plain(table, n, top_fixed):
    """The 1971 procedure without our savings: count at depth ``n + 1``.

    With ``top_fixed`` it prunes nodes whose top leaf is not leaf 1 (Lunnon's
    normalisation, multiply by ``n``); the table must keep a zero sentinel
    column.  Used by the tests to check each saving.
    """
    dims = table.shape[1]
    above = np.zeros(n + 2, np.int64)
    below = np.zeros(n + 2, np.int64)
    tally = np.zeros(n + 2, np.int64)
    gapter = np.zeros(n + 2, np.int64)
    gap = np.zeros((n + 2) * (n + 2), np.int64)
    total = np.int64(0)
    l = 1
    g = 0
    while l > 0:
        if (not top_fixed) or l <= 1 or below[0] == 1:
            if l > n:
                total += 1
            else:
                dd = 0
                gg = gapter[l - 1]
                g = gg
                for i in range(dims):
                    m = np.int64(table[l, i, l])
                    if m == l:
                        dd += 1
                    else:
                        while m != l:
                            gap[gg] = m
                            if tally[m] == 0:
                                gg += 1
                            tally[m] += 1
                            m = table[l, i, below[m]]
                if dd == dims:
                    for m in range(l):
                        gap[gg] = m
                        gg += 1
                for j in range(g, gg):
                    gap[g] = gap[j]
                    if tally[gap[j]] == dims - dd:
                        g += 1
                    tally[gap[j]] = 0
        while l > 0 and g == gapter[l - 1]:
            l -= 1
            below[above[l]] = below[l]
            above[below[l]] = above[l]
        if l > 0:
            g -= 1
            above[l] = gap[g]
            below[l] = below[above[l]]
            below[above[l]] = l
            above[below[l]] = l
            gapter[l] = g
            l += 1
    return total


# --------------------------------------------------------------------------
# Python face
# --------------------------------------------------------------------------

@dataclass
class Outcome:
    """Result of counting below one prefix.

    ``count`` is in foldings (already multiplied by :attr:`Tables.factor`);
    ``nodes`` is node expansions; when ``complete`` is false, ``remainder``
    lists the prefixes (tuples of steps) that cover the unexplored rest.
    """

    count: int
    nodes: int
    complete: bool
    remainder: list[tuple[int, ...]]
    seconds: float = 0.0


class _State:
    """Scratch arrays for one search (one map of ``n`` cells).

    :func:`_replay` re-initialises every entry a search reads, so one state
    per thread and map size is reused (see :func:`_scratch`).
    """

    def __init__(self, n: int):
        self.above = np.zeros(n + 1, np.int64)
        self.below = np.zeros(n + 1, np.int64)
        self.mark = np.zeros(n + 1, np.int64)
        self.gapter = np.zeros(n + 1, np.int64)
        self.gap = np.zeros(n * (n + 1) // 2 + n + 1, np.int64)


_local = threading.local()


def _scratch(n: int) -> _State:
    """This thread's scratch state for maps of ``n`` cells (allocation costs ~3 us a task)."""
    cache = _local.__dict__.setdefault("states", {})
    state = cache.get(n)
    if state is None:
        state = cache[n] = _State(n)
    return state


def _path(above: np.ndarray, last: int) -> tuple[int, ...]:
    """Steps that placed leaves ``2..last`` in the current stack.

    Leaf ``j`` went directly below the nearest leaf ``< j`` above it: later
    leaves only ever come between.
    """
    steps = []
    for j in range(2, last + 1):
        m = int(above[j])
        while m > j:
            m = int(above[m])
        steps.append(m)
    return tuple(steps)


def _placed(tables: Tables, steps: tuple[int, ...]) -> tuple[_State, int]:
    """Scratch state with the prefix ``steps`` placed, and the next stamp.

    Raises :class:`PrefixError` naming the first step that is not legal.
    """
    n = tables.n
    if n < 2 and steps:
        raise PrefixError("a map of one cell has no steps to take")
    if len(steps) > n - 2 and steps:
        raise PrefixError(
            f"step {n - 1} places leaf {n}, but a prefix places at most leaves 1..{n - 1} "
            f"(the last leaf is counted in bulk)"
        )
    for k, m in enumerate(steps, start=1):
        if not 1 <= m <= k:
            raise PrefixError(
                f"step {k} puts leaf {k + 1} below leaf {m}, but only leaves 1..{k} are placed"
            )
    state = _scratch(n)
    bad, stamp = _replay(tables.table, n, state.above, state.below, state.mark, state.gap,
                         state.gapter, np.asarray(steps, np.int64), tables.mirror)
    if bad:
        leaf = bad + 1
        why = ("the mirror half (leaf 3 above leaf 2) is counted by symmetry"
               if tables.mirror and leaf == 3 else "a crease would cross another")
        raise PrefixError(f"step {bad} puts leaf {leaf} below leaf {steps[bad - 1]}, which is illegal: {why}")
    return state, stamp


def check_prefix(tables: Tables, steps: tuple[int, ...]) -> None:
    """Raise :class:`PrefixError` unless ``steps`` is a node of the tree."""
    _placed(tables, steps)


def legal_prefix(tables: Tables, text: str) -> tuple[int, ...]:
    """Steps of prefix ``text`` if it is a node of the tree, else :class:`PrefixError` naming the first bad step."""
    steps = parse_prefix(text)
    check_prefix(tables, steps)
    return steps


def count_below(tables: Tables, steps: tuple[int, ...] = (), budget: int | None = None,
                seconds: float | None = None) -> Outcome:
    """Count the foldings below prefix ``steps`` within a node and/or time budget.

    ``budget`` is a number of node expansions; ``seconds`` is checked every
    :data:`CLOCK_CHUNK` nodes, so a timed count overruns by at most one chunk
    (about 10 ms).  Raises :class:`PrefixError` for an illegal prefix.
    """
    n = tables.n
    steps = tuple(int(s) for s in steps)
    started = time.perf_counter()
    if n == 1:
        check_prefix(tables, steps)
        return Outcome(count=1, nodes=0, complete=True, remainder=[], seconds=0.0)
    state, stamp = _placed(tables, steps)
    floor = len(steps) + 2
    level = floor
    left = UNLIMITED if budget is None else int(budget)
    deadline = None if seconds is None else started + seconds
    leaves = 0
    nodes = 0
    while True:
        chunk = min(left, CLOCK_CHUNK)
        got, used, level, stamp = _search(tables.table, n, state.above, state.below, state.mark,
                                          state.gap, state.gapter, level, floor, chunk,
                                          tables.mirror, stamp)
        leaves += int(got)
        nodes += int(used)
        left -= int(used)
        if level < floor:
            return Outcome(leaves * tables.factor, nodes, True, [], time.perf_counter() - started)
        if left <= 0 or (deadline is not None and time.perf_counter() >= deadline):
            break
    remainder = [_path(state.above, level - 1)]
    gap, gapter = state.gap, state.gapter
    for j in range(level - 1, floor - 1, -1):
        base = _path(state.above, j - 1)
        for k in range(gapter[j - 1], gapter[j]):
            remainder.append(base + (int(gap[k]),))
    return Outcome(leaves * tables.factor, nodes, False, remainder, time.perf_counter() - started)


def expand(tables: Tables, steps: tuple[int, ...], probes: int = 0,
           seed: int = 0) -> tuple[list[int], list[float]]:
    """Children of node ``steps`` (the next leaf's allowed gaps) and their estimated sizes.

    Sizes are estimated node counts of each child's subtree from ``probes``
    random probes each (all 1.0 when ``probes`` is 0).  ``steps`` must be a
    legal node that places fewer than ``n - 1`` leaves.
    """
    if len(steps) + 2 >= tables.n:
        raise PrefixError(f"a node placing {len(steps) + 1} leaves of {tables.n} has no children to split into")
    state = _scratch(tables.n)
    kids, sizes = _expand(tables.table, tables.n, state.above, state.below, state.mark, state.gap,
                          state.gapter, np.asarray(steps, np.int64), tables.mirror, probes, seed)
    return kids.tolist(), sizes.tolist()


def expand_many(tables: Tables, nodes: list[tuple[int, ...]], probes: int,
                seed: int = 0) -> list[tuple[list[int], list[float]]]:
    """:func:`expand` for a batch of legal, splittable nodes, in one compiled call.

    Probes are seeded per node from its steps and ``seed``.
    """
    if not nodes:
        return []
    lengths = np.fromiter((len(s) for s in nodes), np.int64, len(nodes))
    offsets = np.zeros(len(nodes) + 1, np.int64)
    np.cumsum(lengths, out=offsets[1:])
    flat = np.fromiter((m for s in nodes for m in s), np.int64, int(offsets[-1]))
    state = _scratch(tables.n)
    counts, kids, sizes = _expand_many(tables.table, tables.n, state.above, state.below, state.mark,
                                       state.gap, state.gapter, flat, offsets, tables.mirror, probes,
                                       seed)
    out = []
    at = 0
    kids_l, sizes_l = kids.tolist(), sizes.tolist()
    for c in counts.tolist():
        out.append((kids_l[at:at + c], sizes_l[at:at + c]))
        at += c
    return out


def children_of(tables: Tables, nodes: list[tuple[int, ...]], trusted: list[bool]) -> list[list[int] | None]:
    """The children of each node (next steps, in the search's order), None for a node not in the tree.

    The compiled search does not check its input, so a node is expanded
    only once it is known to be in the tree: ``trusted[i]`` says so for
    node ``i``; a node whose parent is in ``nodes`` too is judged by its
    parent's children; any other node is replayed first.  So a whole
    subtree's worth of nodes can come in one batch (shallow to deep, one
    compiled call a depth).  Every node must leave at least two leaves to
    place (``len(node) + 2 < tables.n``).

    >>> tables = prepare("2x3")
    >>> children_of(tables, [(1, 2), (), (1,), (4,), (1, 2, 7)], [False, True, False, False, False])
    [[2], [1], [2], None, None]
    >>> children_of(tables, [(1, 2), (1, 3)], [False, False])  # both replayed; the second is no node
    [[2], None]
    """
    found: dict[tuple[int, ...], list[int] | None] = {}
    out: list[list[int] | None] = [None] * len(nodes)
    def depth(i: int) -> int:
        return len(nodes[i])

    for _, level in itertools.groupby(sorted(range(len(nodes)), key=depth), key=depth):
        legal = []
        for i in level:
            node = nodes[i]
            if node and node[:-1] in found:
                parent = found[node[:-1]]
                ok = parent is not None and node[-1] in parent
            elif trusted[i]:
                ok = True
            else:
                try:
                    check_prefix(tables, node)
                    ok = True
                except PrefixError:
                    ok = False
            found[node] = None
            if ok:
                legal.append(i)
        for i, (kids, _) in zip(legal, expand_many(tables, [nodes[i] for i in legal], 0)):
            out[i] = found[nodes[i]] = kids
    return out


def probe(tables: Tables, steps: tuple[int, ...], probes: int, seed: int = 0) -> tuple[float, float, float, float]:
    """Sums over ``probes`` Knuth probes below ``steps``: nodes, nodes², leaves, leaves².

    Leaves are reduced-tree leaves; multiply by :attr:`Tables.factor` for foldings.
    """
    if tables.n == 1:
        return float(probes), float(probes), float(probes), float(probes)
    state, stamp = _placed(tables, steps)
    a, b, c, d, _ = _probe(tables.table, tables.n, state.above, state.below, state.mark, state.gap,
                           len(steps) + 2, tables.mirror, stamp, probes, seed)
    return a, b, c, d


def count(shape: Shape | str, order: str = "fast") -> int:
    """Exact number of foldings of ``shape`` (e.g. ``"3x5"``), on one core.

    >>> count("2x3")
    60
    """
    return count_below(prepare(shape, order)).count


def count_plain(sides: tuple[int, ...], top_fixed: bool = False) -> int:
    """Foldings by the plain 1971 procedure (tests only: slow, no savings)."""
    sides = tuple(p for p in sides if p > 1)
    n = math.prod(sides)
    if n == 1:
        return 1
    raw = int(_plain(neighbour_table(sides), n, top_fixed))
    return raw * n if top_fixed else raw


def warm() -> None:
    """Compile (or load from cache) every kernel entry point."""
    count("2x3")
    count_below(prepare("2x3"), (1,), budget=1)

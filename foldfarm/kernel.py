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
    current node (see :func:`_gaps`), then, at a leaf that decides a
    condition, to a stamp of its own on the leaves of the allowed arc
    (:func:`_conditions`); older values are below ``stamp``.

Savings over the plain procedure
================================
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

So the foldings with leaf 1 on top are the *cyclic orders* of the leaves
that fold (read from leaf 1 down); call their set ``C``.  The other savings
pick one member of each class of ``C`` under a group of symmetries and
multiply by the size of the group.  Write ``[a, b, c]`` for "leaves ``a``,
``b``, ``c`` come in this cyclic order reading down from ``a`` (wrapping
round from the bottom to the top)"; with leaf 1 on top ``[1, b, c]`` is
"``b`` above ``c``".

*Turning the stack over* (``M``).  A folding read bottom-up is a folding
(turn the folded map over); on ``C`` this is ``M``: reverse, then rotate leaf
1 back to the top, ``1, x2, ..., xn -> 1, xn, ..., x2``.  ``M`` reverses the
cyclic order of every three leaves, so for ``n >= 3`` it has no fixed point
and exchanges the cyclic orders with ``[1, 2, 3]`` and those without: keeping
``[1, 2, 3]`` ("leaf 2 above leaf 3") and multiplying by 2 is exact.

*The map's own symmetries.*  A symmetry ``g`` of the box (reflect a side,
``x_i -> p_i + 1 - x_i``; exchange two equal sides) maps creases to creases
of one dimension, and two creases of one class to two creases of one class
(a reflection keeps or exchanges the two parity classes of its dimension;
an exchange of sides keeps coordinates, so parity).  Relabelling every
leaf ``x`` of a folding by ``g(x)`` therefore gives a folding, and on cyclic
orders this action commutes with ``M``.  Two facts decide when a group of
such relabellings, with or without ``M``, acts *freely* on ``C`` (no member
but the identity keeps a cyclic order), which makes every class exactly as
large as the group:

(F1) if ``g != 1`` keeps some leaf, ``g`` keeps no cyclic order: if it
kept ``s``, it would move every leaf the same number of places round ``s``,
and a leaf it keeps shows that number is 0, so ``g`` would keep every leaf.

(F2) if ``gM`` keeps a cyclic order ``s``, then ``g`` acts on the places of
``s`` as a reflection of the circle: ``g`` has order 2 and keeps at most two
leaves (a reflection of ``n`` points on a circle keeps 0, 1 or 2 of them).
So if ``g`` is not an involution, or keeps 3 leaves or more, ``gM`` keeps
no cyclic order.

A *condition* ``[a, b, c]`` is kept by every relabelling that keeps its
three leaves, reversed by one that exchanges two of them and keeps the third,
and reversed by ``M``.  Once its largest leaf ``c`` is placed it is decided
for the whole subtree, because inserting later leaves never changes the
cyclic order of placed ones; so a condition prunes when ``c`` is placed:
``c`` must go directly below a leaf of the arc from ``b`` down to ``a``
(:func:`_conditions`).  The conditions of each tree are chosen by
:mod:`foldfarm.symmetry` (largest leaf as small as it can be); the proofs:

* *Tree 1*: ``[1, 2, 3]``, the group ``{1, M}``, factor ``2n`` (``n >= 3``).

* *Tree 2, an involution and ``M``.*  Let ``g`` be a reflection of an odd
  side ``p >= 3`` or the exchange of two equal sides, keeping at least 3
  leaves (``p`` odd: the middle layer, ``n / p`` leaves; an exchange: the
  diagonal, ``n / p``).  By (F1) and (F2) the group ``{1, g, M, gM}`` acts
  freely on ``C``.  Take ``[t, a, g(a)]`` with ``t`` kept by ``g`` and ``a``
  not (reversed by ``g`` and by ``M``) and ``[u, v, w]`` with all three kept
  by ``g`` (kept by ``g``, reversed by ``M``).  The two yes/no answers of a
  cyclic order ``s`` change under ``g``, ``M``, ``gM`` as (flip, keep),
  (flip, flip), (keep, flip): the four members of the class of ``s`` answer
  the four different ways, so exactly one answers (yes, yes).  Factor
  ``4n``.  (3x8: ``[1, 2, 3]`` and ``[2, 5, 8]``, reflecting the side of 3;
  4x4: ``[1, 2, 5]`` and ``[1, 6, 11]``, the diagonal.)

* *Tree 2, a square of odd sides* ``q >= 3`` (5x5; in more dimensions two
  equal odd sides).  Its 8 symmetries ``K`` (turns and reflections in the
  plane of the square) all keep the middle cell ``c`` of the square (the
  first one, in more dimensions), so by (F1) ``K`` acts freely on ``C``.
  (``M`` is not used: the group of ``K`` and ``M`` holds the half turn with
  ``M``, and the half turn keeps one leaf only, so (F2) does not apply; on
  3x3 it does keep 24 of the 152 cyclic orders, as the oracle shows.)  Let
  ``O`` be the four neighbours of ``c`` in the square; ``K`` permutes them
  transitively, and the members of ``K`` keeping one of them, ``o``, are 1
  and the reflection ``r`` in the line through ``c`` and ``o`` (which keeps
  that line's ``q >= 3`` cells and moves the others).  For a cyclic
  order ``s`` let ``f(s)`` be the first member of ``O`` met reading down
  from ``c``; relabelling does not change the direction of reading, so
  ``f(ks) = k(f(s))`` for ``k`` in ``K``.  In the class ``Ks`` (8 cyclic
  orders) ``f(ks) = o`` exactly for the ``k`` with ``k(f(s)) = o``: a pair
  ``{k0 s, r k0 s}``; of those, exactly one has ``[t, a, r(a)]`` (``t`` kept
  by ``r``, ``a`` not), which ``r`` reverses.  "``f(s) = o``" is the three
  conditions ``[c, o, x]`` for the other ``x`` in ``O``.  Factor ``8n``.
  (5x5: ``o = 8``, ``[8, 12, 13]``, ``[13, 8, 14]``, ``[13, 8, 18]`` and
  ``[2, 3, 4]``.)

Maps with no symmetry of these kinds (2xN, 2x2, 4x6, strips) keep tree 1's
reduction on tree 2.  ``tests/test_kernel.py`` checks every reduction
against :func:`count_plain` (and that each choice of answers to the
conditions is equally common); ``tests/test_symmetry.py`` checks (F1),
(F2) and every tree's conditions on the brute-force oracle's foldings.

*Last leaf in bulk*.  The children of a node at depth ``n - 1`` are the
foldings themselves, one per allowed gap of leaf ``n``; their number is the
length of the filtered gap list, so we add it instead of placing leaf ``n``
and descending.  Nodes at depth ``n`` are therefore never visited, and a
prefix never places leaf ``n``.

Together, ``count = factor * (leaves of the reduced tree)``;
:attr:`Tables.factor` holds the factor of the tree searched.

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
from foldfarm.symmetry import CURRENT_TREE, Reduction, describe, reduction

#: Node expansions between two returns from compiled code (about 50 ms): a timed count looks at
#: the clock then, and every count lets Python act on a pending Ctrl-C (compiled code cannot).
CLOCK_CHUNK = 1 << 20

#: ``budget`` meaning "no limit".
UNLIMITED = np.iinfo(np.int64).max


@dataclass(frozen=True)
class Tables:
    """Everything constant during one map's search on one reduced tree."""

    sides: tuple[int, ...]
    n: int
    table: np.ndarray = field(repr=False)
    #: ``constrained[l]``: how many dimensions constrain leaf ``l`` (it has a lower neighbour there; :func:`_gaps`)
    constrained: np.ndarray = field(repr=False)
    #: the conditions leaf ``l`` decides are ``arcs[first[l]:first[l + 1]]``; each row ``(a, b)``
    #: says leaf ``l`` goes directly below a leaf of the arc from ``b`` down to ``a`` (``a`` excluded)
    first: np.ndarray = field(repr=False)
    arcs: np.ndarray = field(repr=False)
    reduction: Reduction = field(repr=False)

    @property
    def factor(self) -> int:
        """Foldings per leaf of the reduced tree (:attr:`foldfarm.symmetry.Reduction.factor`)."""
        return self.reduction.factor

    @property
    def tree(self) -> int | None:
        """The tree's identifier (:mod:`foldfarm.symmetry`); None for a test-made reduction."""
        return self.reduction.tree


@lru_cache(maxsize=32)
def _table(sides: tuple[int, ...]) -> np.ndarray:
    table = neighbour_table(sides)
    # Leaf 1 stays on top: the walk steps over the sentinel (see module doc).
    table[:, :, 0] = table[:, :, 1]
    table.setflags(write=False)
    return table


@lru_cache(maxsize=64)
def tables_of(red: Reduction) -> Tables:
    """Build (and memoise) the kernel tables that search the reduced tree ``red``."""
    n = math.prod(red.sides)
    first = np.zeros(n + 2, np.int64)
    arcs = np.zeros((len(red.conditions), 2), np.int64)
    for k, (a, b, c) in enumerate(sorted(red.conditions, key=lambda t: t[2])):
        if not (1 <= a <= n and 1 <= b <= n and max(a, b) < c <= n and a != b):
            raise ValueError(f"{(a, b, c)} is no condition of a {n}-cell map: three leaves, the largest last")
        arcs[k] = (a, b)
        first[c + 1:] += 1
    table = _table(red.sides)
    constrained = (table[:, :, :].diagonal(axis1=0, axis2=2) != np.arange(n + 1)).sum(axis=0).astype(np.int64)
    for array in (first, arcs, constrained):
        array.setflags(write=False)
    return Tables(sides=red.sides, n=n, table=table, constrained=constrained, first=first, arcs=arcs, reduction=red)


def tables_for(sides: tuple[int, ...], tree: int = CURRENT_TREE) -> Tables:
    """Tables that search the map with working sides ``sides`` on tree ``tree`` (:mod:`foldfarm.symmetry`)."""
    return tables_of(reduction(tuple(sides), tree))


def prepare(shape: Shape | str, order: str = "fast", tree: int = CURRENT_TREE) -> Tables:
    """Tables for ``shape`` searched with its sides in ``order``, on tree ``tree``."""
    if isinstance(shape, str):
        shape = parse_shape(shape)
    return tables_for(working_sides(shape, order), tree)


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


@numba.njit(cache=True, nogil=True)
def _conditions(below, mark, stamp, gap, g0, g, first, arcs, l):
    """Keep in ``gap[g0:g]`` the gaps that meet the conditions leaf ``l`` decides; return ``(end, stamp)``.

    Each condition ``(a, b)`` marks the leaves from ``b`` down the cycle to
    ``a`` (excluded) with a fresh stamp; a gap is kept when it is marked.
    ``stamp`` must be past every mark already made; the stamp returned is
    the last one used.  Called only at a leaf that decides a condition
    (``first[l] != first[l + 1]``): a few depths of the tree.  Not inlined:
    inlined into the search loop it made every node about 15% slower.
    """
    for k in range(first[l], first[l + 1]):
        a = arcs[k, 0]
        m = arcs[k, 1]
        stamp += 1
        while m != a:
            mark[m] = stamp
            m = below[m]
        keep = g0
        for j in range(g0, g):
            if mark[gap[j]] == stamp:
                gap[keep] = gap[j]
                keep += 1
        g = keep
    return g, stamp


@numba.njit(cache=True, nogil=True, inline="always")
def _gaps(table, c, l, below, mark, stamp, gap, g0, emit):
    """List the allowed gaps of leaf ``l`` at ``gap[g0:]``; return the end.

    ``c`` is the number of dimensions that constrain ``l``
    (:attr:`Tables.constrained`; precomputed, which measured 3-7% faster
    than counting them here at every node).  Each constrained dimension
    walks the cycle once from leaf ``l``'s lower neighbour, jumping over
    every same-class crease it meets (a gap inside that crease would cross
    it).  A gap is allowed when every constrained
    dimension produced it: the ``k``-th walk raises ``mark[m]`` from
    ``stamp + k - 1`` to ``stamp + k``, and the last walk emits the gaps
    whose mark says all earlier walks passed them.  ``stamp`` grows by the
    number of dimensions per node, so old marks never match and no pass is
    spent clearing them.  With ``emit`` false the gaps are counted, not
    written (the last leaf), and the count is returned as ``g0 + count``.
    """
    dims = table.shape[1]
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
def _search(table, constrained, n, above, below, mark, gap, gapter, level, floor, budget, first, arcs, stamp):
    """Search below the placed leaves ``1..floor-1``, resuming at ``level``.

    Returns ``(leaves, nodes, level, stamp)``: reduced-tree leaves counted,
    node expansions made, the level about to be expanded when the budget ran
    out (``floor - 1`` when the subtree is finished), and the next stamp.
    """
    dims = table.shape[1]
    leaves = np.int64(0)
    nodes = np.int64(0)
    bulk = first[n] == first[n + 1]  # no condition on the last leaf: count its gaps without writing them
    l = level
    g = np.int64(gapter[l - 1])
    while True:
        if nodes >= budget:
            return leaves, nodes, l, stamp
        nodes += 1
        g0 = g
        if l == n and bulk:
            leaves += _gaps(table, constrained[l], l, below, mark, stamp, gap, g0, False) - g0
            stamp += dims
            g = g0
        else:
            g = _gaps(table, constrained[l], l, below, mark, stamp, gap, g0, True)
            stamp += dims
            if first[l] != first[l + 1]:
                g, stamp = _conditions(below, mark, stamp, gap, g0, g, first, arcs, l)
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
def _replay(table, constrained, n, above, below, mark, gap, gapter, steps, first, arcs):
    """Place leaf 1, then leaves ``2..len(steps)+1`` below ``steps``.

    Returns ``(bad, stamp)``: ``bad`` is 0 on success, else the 1-based
    index of the first illegal step, negated when the step is a gap that
    only the tree's conditions rule out.  The placed levels are left with
    empty sibling lists (``gapter`` all 0).
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
        g = _gaps(table, constrained[l], l, below, mark, stamp, gap, 0, True)
        stamp += dims
        ok = False
        for k in range(g):
            if gap[k] == want:
                ok = True
        if not ok:
            return j + 1, stamp
        g, stamp = _conditions(below, mark, stamp, gap, 0, g, first, arcs, l)
        ok = False
        for k in range(g):
            if gap[k] == want:
                ok = True
        if not ok:
            return -(j + 1), stamp
        _insert(above, below, l, want)
        gapter[l] = 0
    return 0, stamp


@numba.njit(cache=True, nogil=True)
def _probe(table, constrained, n, above, below, mark, gap, level, first, arcs, stamp, probes, seed):
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
            g = _gaps(table, constrained[l], l, below, mark, stamp, gap, 0, True)
            stamp += dims
            if first[l] != first[l + 1]:
                g, stamp = _conditions(below, mark, stamp, gap, 0, g, first, arcs, l)
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
def _expand(table, constrained, n, above, below, mark, gap, gapter, steps, first, arcs, probes, seed):
    """Children of the node ``steps`` and a probe estimate of each one's nodes.

    Returns ``(children, estimates)``: the gaps of the next leaf, and for each
    the mean of ``probes`` node estimates of its subtree (0 probes: all 1.0).
    The node must be legal and must not be a last-leaf node.
    """
    dims = table.shape[1]
    bad, stamp = _replay(table, constrained, n, above, below, mark, gap, gapter, steps, first, arcs)
    l = steps.shape[0] + 2
    g = _gaps(table, constrained[l], l, below, mark, stamp, gap, 0, True)
    stamp += dims
    g, stamp = _conditions(below, mark, stamp, gap, 0, g, first, arcs, l)
    kids = gap[:g].copy()
    k = g
    sizes = np.ones(k, np.float64)
    if probes > 0 and k > 1:  # an only child needs no estimate: it is the whole subtree
        for j in range(k):
            _insert(above, below, l, kids[j])
            s_nodes, _, _, _, stamp = _probe(table, constrained, n, above, below, mark, gap, l + 1, first, arcs,
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
def _expand_many(table, constrained, n, above, below, mark, gap, gapter, flat, offsets, first, arcs, probes, seed):
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
        k, s = _expand(table, constrained, n, above, below, mark, gap, gapter, steps, first, arcs, probes,
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
    bad, stamp = _replay(tables.table, tables.constrained, n, state.above, state.below, state.mark, state.gap,
                         state.gapter, np.asarray(steps, np.int64), tables.first, tables.arcs)
    if bad:
        step = abs(bad)
        leaf = step + 1
        why = "a crease would cross another"
        if bad < 0:
            rules = [describe(t) for t in tables.reduction.conditions if t[2] == leaf]
            why = f"this tree keeps only {' and '.join(rules)} (the rest is counted by symmetry)"
        raise PrefixError(f"step {step} puts leaf {leaf} below leaf {steps[step - 1]}, which is illegal: {why}")
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
        got, used, level, stamp = _search(tables.table, tables.constrained, n, state.above, state.below, state.mark,
                                          state.gap, state.gapter, level, floor, chunk,
                                          tables.first, tables.arcs, stamp)
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
    kids, sizes = _expand(tables.table, tables.constrained, tables.n, state.above, state.below, state.mark, state.gap,
                          state.gapter, np.asarray(steps, np.int64), tables.first, tables.arcs, probes, seed)
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
    counts, kids, sizes = _expand_many(tables.table, tables.constrained, tables.n, state.above, state.below, state.mark,
                                       state.gap, state.gapter, flat, offsets, tables.first, tables.arcs,
                                       probes, seed)
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
    a, b, c, d, _ = _probe(tables.table, tables.constrained, tables.n, state.above, state.below, state.mark, state.gap,
                           len(steps) + 2, tables.first, tables.arcs, stamp, probes, seed)
    return a, b, c, d


def count(shape: Shape | str, order: str = "fast", tree: int = CURRENT_TREE) -> int:
    """Exact number of foldings of ``shape`` (e.g. ``"3x5"``), on one core, searching tree ``tree``.

    >>> count("2x3"), count("3x3"), count("3x3", tree=1)
    (60, 1368, 1368)
    """
    return count_below(prepare(shape, order, tree)).count


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

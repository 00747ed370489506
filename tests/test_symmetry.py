"""The symmetry facts the reduced trees rest on, checked on the brute-force oracle's foldings.

Nothing here runs the kernel: the foldings come from tests/oracle.py (every
permutation checked against the crease rule), the map's symmetries are built
here from their definition (every permutation of the sides that keeps their
lengths, with every choice of reflecting each side), and foldfarm.symmetry
only supplies the conditions and factors under test.
"""

from __future__ import annotations

import functools
import itertools
import math

import pytest

from foldfarm.symmetry import (CURRENT_TREE, LEGACY_TREE, TREES, TreeError, describe, reduction, tree_of,
                               unreduced)
from oracle import all_foldings


def _coords(sides, m):
    out, stride = [], 1
    for p in sides:
        out.append((m - 1) // stride % p + 1)
        stride *= p
    return tuple(out)


def _leaf(sides, c):
    m, stride = 1, 1
    for p, x in zip(sides, c):
        m += (x - 1) * stride
        stride *= p
    return m


@functools.cache
def box_symmetries(sides):
    """Every symmetry of the box as a dict leaf -> leaf: sides permuted among equal lengths, each maybe reflected."""
    n, d = math.prod(sides), len(sides)
    out = []
    for order in itertools.permutations(range(d)):
        if any(sides[order[k]] != sides[k] for k in range(d)):
            continue
        for flips in itertools.product((False, True), repeat=d):
            def move(c, order=order, flips=flips):
                return tuple(sides[k] + 1 - c[order[k]] if flips[k] else c[order[k]] for k in range(d))
            out.append({m: _leaf(sides, move(_coords(sides, m))) for m in range(1, n + 1)})
    return out


def _top1(stack):
    """The rotation with leaf 1 on top: one representative of a cyclic order."""
    k = stack.index(1)
    return stack[k:] + stack[:k]


@functools.cache
def cyclic_orders(sides):
    """The foldings with leaf 1 on top (oracle), as tuples read from the top."""
    return frozenset(_top1(s) for s in all_foldings(sides))


def relabel(g, s, turn=False):
    t = tuple(g[x] for x in s)
    return _top1(t[::-1] if turn else t)


def meets(s, condition):
    """Whether the three leaves come in this cyclic order down the stack."""
    pa, pb, pc = (s.index(x) for x in condition)
    return pa < pb < pc or pb < pc < pa or pc < pa < pb


# ---- the two facts behind every free action (kernel docstring, F1 and F2) -------------------

FACT_SHAPES = [(3, 3), (2, 3), (3, 2), (2, 4), (2, 2, 2), (2, 2), (4,), (5,), (2, 2, 1)]


@pytest.mark.parametrize("sides", FACT_SHAPES, ids=lambda s: "x".join(map(str, s)))
def test_a_symmetry_keeping_a_leaf_or_an_involution_keeping_three_acts_freely(sides):
    sides = tuple(p for p in sides if p > 1)
    orders = cyclic_orders(sides)
    for g in box_symmetries(sides):
        kept = sum(g[m] == m for m in g)
        if kept == len(g):
            continue
        if kept >= 1:  # (F1)
            assert not any(relabel(g, s) == s for s in orders), g
        involution = all(g[g[m]] == m for m in g)
        if not involution or kept >= 3:  # (F2)
            assert not any(relabel(g, s, turn=True) == s for s in orders), g


def _kept_with_turn(sides, g):
    return sum(relabel(g, s, turn=True) == s for s in cyclic_orders(sides))


def test_the_facts_need_their_hypotheses():
    """Where (F2) does not apply, turning over with the symmetry can keep foldings: no factor there."""
    half_turn = next(g for g in box_symmetries((3, 3)) if g[1] == 9 and g[2] == 8)  # keeps the middle cell only
    assert _kept_with_turn((3, 3), half_turn) == 24
    reflect_three = next(g for g in box_symmetries((2, 3)) if g[1] == 5 and g[3] == 3)  # keeps 2 cells
    assert _kept_with_turn((2, 3), reflect_three) > 0
    swap = next(g for g in box_symmetries((2, 2)) if g[1] == 1 and g[2] == 3)  # the diagonal of 2x2: keeps 2 cells
    assert _kept_with_turn((2, 2), swap) > 0
    assert reduction((2, 3)).factor == 2 * 6 and reduction((2, 2)).factor == 2 * 4  # so they keep tree 1's


# ---- each tree's conditions pick one folding per class ---------------------------------------

ORACLE_SHAPES = [(2,), (3,), (4,), (5,), (6,), (7,), (8,), (9,), (2, 2), (2, 3), (2, 4), (3, 3), (2, 2, 2)]


def _every_order(shapes):
    return sorted({p for s in shapes for p in itertools.permutations(s)})


@pytest.mark.parametrize("sides", _every_order(ORACLE_SHAPES), ids=lambda s: "x".join(map(str, s)))
@pytest.mark.parametrize("tree", TREES)
def test_the_conditions_keep_one_folding_in_factor_over_n_of_every_class(sides, tree):
    """Within every class of the whole symmetry group (the map's and turning over), the foldings meeting
    the tree's conditions are exactly one in factor / n: so factor x (what the tree keeps) is the count."""
    red = reduction(sides, tree)
    n = math.prod(sides)
    group = red.factor // n
    orders = cyclic_orders(sides)
    unseen = set(orders)
    kept_total = 0
    while unseen:
        s = unseen.pop()
        orbit = {relabel(g, s, turn) for g in box_symmetries(sides) for turn in (False, True)}
        unseen -= orbit
        kept = sum(all(meets(t, c) for c in red.conditions) for t in orbit)
        assert kept * group == len(orbit), (s, red.conditions)
        kept_total += kept
    assert kept_total * red.factor == n * len(orders)  # n rotations of each cyclic order: every folding


# ---- what the module decides ----------------------------------------------------------------


@pytest.mark.parametrize("sides, group, kind", [
    ((5, 5), 8, "square"), ((3, 3), 8, "square"), ((7, 7), 8, "square"), ((3, 3, 3), 8, "square"),
    ((3, 8), 4, "side 1, of 3"), ((4, 5), 4, "side 2, of 5"), ((5, 6), 4, "side 1, of 5"),
    ((4, 4), 4, "diagonal"), ((8, 8), 4, "diagonal"), ((6, 6), 4, "diagonal"), ((2, 2, 2), 4, "diagonal"),
    ((2, 12), 2, "turning"), ((4, 6), 2, "turning"), ((2, 2), 2, "turning"), ((2, 9), 2, "turning"),
    ((20,), 2, "turning"),
])
def test_which_symmetry_each_map_uses(sides, group, kind):
    red = reduction(sides, CURRENT_TREE)
    n = math.prod(sides)
    assert red.factor == group * n and kind in red.why
    assert red.tree == CURRENT_TREE and red.sides == sides
    decided = [c for _, _, c in red.conditions]
    assert decided == sorted(decided) and all(max(t) == t[2] and len(set(t)) == 3 for t in red.conditions)
    assert reduction(sides, LEGACY_TREE).conditions == ((1, 2, 3),) and reduction(sides, 1).factor == 2 * n


def test_tiny_maps_and_the_unreduced_tree():
    assert reduction(()).factor == 1 and reduction((2,)).factor == 2 and reduction((2,)).conditions == ()
    assert unreduced((3, 3)).conditions == () and unreduced((3, 3)).factor == 9


def test_a_runs_tree_comes_from_its_settings():
    assert tree_of({"tree": 2, "task_seconds": 120}) == 2
    assert tree_of({"task_seconds": 120}) == LEGACY_TREE  # made before the key existed
    with pytest.raises(TreeError, match="search tree 7, which this version of foldfarm does not know"):
        tree_of({"tree": 7})
    with pytest.raises(TreeError, match="no search tree 0"):
        reduction((3, 3), 0)


def test_conditions_in_words():
    assert describe((1, 2, 3)) == "leaf 2 above leaf 3"
    assert describe((13, 8, 14)) == "leaves 13, 8, 14 in this cyclic order down the stack"

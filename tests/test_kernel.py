"""The kernel against things outside it: the brute-force oracle and published counts.

Check values: ``tests/oracle.py`` (every permutation checked against the
crease rule) and ``foldfarm/data/published_counts.csv`` (OEIS, the sequence
named on each row and in each assertion message).
"""

from __future__ import annotations

import itertools
import math

import pytest
from hypothesis import given, settings
from hypothesis import strategies as st

from foldfarm.kernel import count, count_below, count_plain, tables_for, tables_of
from foldfarm.symmetry import (LEGACY_TREE, TREES, Reduction, flip_condition, leaf, reduction, square_group,
                               unreduced)
from foldfarm.published import table as published_table
from foldfarm.shape import parse_shape
from oracle import count_by_permutations

# Every multiset of sides >= 2 with at most 9 cells, and the same with a side of 1 added.
SMALL = [(2,), (3,), (4,), (5,), (6,), (7,), (8,), (9,), (2, 2), (2, 3), (2, 4), (3, 3), (2, 2, 2)]
SMALL += [s + (1,) for s in SMALL] + [(1,), (1, 1)]


@pytest.fixture(scope="module")
def oracle_counts():
    return {}


def _oracle(cache, sides):
    key = tuple(sorted(sides))
    if key not in cache:
        cache[key] = count_by_permutations(key)
    return cache[key]


@pytest.mark.parametrize("sides", SMALL, ids=lambda s: "x".join(map(str, s)))
def test_kernel_matches_oracle_in_every_side_order(sides, oracle_counts):
    expected = _oracle(oracle_counts, sides)  # source: tests/oracle.py, every permutation checked
    for order in sorted(set(itertools.permutations(sides))):
        text = "x".join(map(str, order))
        for tree in TREES:
            assert count(text, order="given", tree=tree) == expected, f"{text}, tree {tree}: oracle says {expected}"
            assert count(text, tree=tree) == expected


def test_three_dimensional_maps_match_oracle(oracle_counts):
    # 2x2x2 has no published value in our table; the oracle is the reference.
    assert count("2x2x2") == _oracle(oracle_counts, (2, 2, 2))
    assert count("2x2x2", order="given") == count_by_permutations((2, 2, 2))


def _published_rows(limit):
    rows = [r for r in published_table() if r.count <= limit]
    return pytest.mark.parametrize("row", rows, ids=[f"{r.shape}-{r.source.split()[-1]}" for r in rows])


@_published_rows(limit=3 * 10**8)  # the rows that compute in about a second each
def test_kernel_matches_published_count(row):
    got = count(row.shape)
    assert got == row.count, f"{row.shape}: {row.source} publishes {row.count}, kernel says {got}"


@_published_rows(limit=3 * 10**7)
def test_the_legacy_tree_matches_published_count(row):
    got = count(row.shape, tree=LEGACY_TREE)  # stored runs made before tree 2 continue on it
    assert got == row.count, f"{row.shape}, tree 1: {row.source} publishes {row.count}, kernel says {got}"


def test_one_cell():
    assert count("1x1") == 1  # the only stack of one cell
    assert count("1") == 1


# ---- each saving against the plain 1971 procedure ------------------------------------

PLAIN_SHAPES = [(2,), (3,), (6,), (2, 2), (2, 3), (3, 3), (2, 5), (2, 2, 2), (3, 4), (2, 2, 3)]


@pytest.mark.parametrize("sides", PLAIN_SHAPES, ids=lambda s: "x".join(map(str, s)))
def test_leaf_one_on_top_times_n_is_the_plain_count(sides):
    # Lunnon's cyclic normalisation, checked inside the plain procedure itself.
    assert count_plain(sides, top_fixed=True) == count_plain(sides)


@pytest.mark.parametrize("sides", PLAIN_SHAPES, ids=lambda s: "x".join(map(str, s)))
def test_bulk_last_leaf_and_sentinel_skip_match_plain(sides):
    # With no condition, the reduced tree differs from the plain procedure only by
    # skipping the sentinel gap and counting the last leaf in bulk.
    out = count_below(tables_of(unreduced(sides)))
    assert out.count == count_plain(sides)
    assert out.count // math.prod(sides) == count_plain(sides, top_fixed=True) // math.prod(sides)


@pytest.mark.parametrize("sides", PLAIN_SHAPES, ids=lambda s: "x".join(map(str, s)))
def test_mirror_halves_are_equal(sides):
    both = count_below(tables_of(unreduced(sides)))
    half = count_below(tables_for(sides, tree=LEGACY_TREE))
    n = math.prod(sides)
    if n >= 3:
        # raw leaves: the half with leaf 2 above leaf 3 is exactly half of all
        assert both.count // n == 2 * (half.count // (2 * n))
        # and it is searched with fewer nodes once leaf 3 is not the last leaf
        assert half.nodes < both.nodes if n > 3 else half.nodes == both.nodes
    assert half.count == both.count == count_plain(sides)


# ---- tree 2: the map's own symmetries (proofs in foldfarm.kernel) --------------------------

# Every shape (and side order) of at most 20 cells on which tree 2 uses a symmetry of the map, and 5x5.
SQUARE_GROUP = [(3, 3), (3, 3, 2), (2, 3, 3), (3, 2, 3), (5, 5)]
INVOLUTION = [(3, 4), (4, 3), (3, 5), (5, 3), (3, 6), (6, 3), (4, 5), (5, 4), (4, 4), (2, 2, 2), (2, 2, 3), (2, 3, 2),
              (3, 2, 2), (2, 2, 4), (4, 2, 2), (2, 2, 5)]
# Shapes where no symmetry of the map is proved to act freely: tree 2 must be tree 1 there.
NO_MAP_SYMMETRY = [(2,), (7,), (2, 2), (2, 3), (3, 2), (2, 4), (2, 5), (5, 2), (2, 6), (2, 7), (4, 6), (2, 4, 6)]


def plain(sides):
    """The plain procedure's count; above 16 cells with Lunnon's leaf 1 on top (5x5: 25 s in full, 1 s so)."""
    return count_plain(sides, top_fixed=math.prod(sides) > 16)


@pytest.mark.parametrize("sides", SQUARE_GROUP + INVOLUTION, ids=lambda s: "x".join(map(str, s)))
def test_tree_two_matches_the_plain_procedure(sides):
    red = reduction(sides, 2)
    group = 8 if sides in SQUARE_GROUP else 4  # the square's symmetries; or an involution and turning over
    assert red.factor == group * math.prod(sides), red
    new, old = count_below(tables_for(sides, 2)), count_below(tables_for(sides, 1))
    assert new.count == old.count == plain(sides)
    assert new.nodes < old.nodes


@pytest.mark.parametrize("sides", NO_MAP_SYMMETRY, ids=lambda s: "x".join(map(str, s)))
def test_tree_two_is_tree_one_where_no_map_symmetry_applies(sides):
    assert reduction(sides, 2).conditions == reduction(sides, 1).conditions
    assert reduction(sides, 2).factor == reduction(sides, 1).factor
    if math.prod(sides) <= 20:
        assert count_below(tables_for(sides, 2)).count == plain(sides)


def _leaves(sides, conditions):
    return count_below(tables_of(Reduction(sides, None, tuple(conditions), 1, "test"))).count


def _reversed(t):
    return (t[1], t[0], t[2])


@pytest.mark.parametrize("sides", [(3, 4), (4, 3), (4, 4), (2, 2, 3), (3, 5), (4, 5)],
                         ids=lambda s: "x".join(map(str, s)))
def test_the_four_answers_to_the_two_conditions_are_equally_common(sides):
    """An involution g and turning over act freely: each of the four (yes/no, yes/no) answer pairs
    to the two conditions is given by exactly a quarter of the foldings with leaf 1 on top."""
    first, second = reduction(sides, 2).conditions
    everything = _leaves(sides, [])
    assert everything == count_plain(sides, top_fixed=True) // math.prod(sides)
    for a in (first, _reversed(first)):
        for b in (second, _reversed(second)):
            assert 4 * _leaves(sides, [a, b]) == everything, (a, b)


@pytest.mark.parametrize("sides", [(3, 3), (3, 3, 2), (2, 3, 3)], ids=lambda s: "x".join(map(str, s)))
def test_the_eight_choices_of_the_square_conditions_are_equally_common(sides):
    """The square's 8 symmetries act freely: for each neighbour o of the middle cell c, the foldings that
    meet o first going down from c are a quarter, split in halves by the reflection keeping o."""
    i, j = [k for k, p in enumerate(sides) if p == 3]
    group = square_group(sides, i, j)
    centre = [1] * len(sides)
    centre[i] = centre[j] = 2
    c = leaf(sides, tuple(centre))
    ring = []
    for k in (i, j):
        for x in (1, 3):
            near = list(centre)
            near[k] = x
            ring.append(leaf(sides, tuple(near)))
    everything = _leaves(sides, [])
    for o in ring:
        (keep,) = [g for g in group[1:] if g[o] == o]
        meets_o_first = [_normal(c, o, x) for x in ring if x != o]
        flip = flip_condition(keep)
        for t in (flip, _reversed(flip)):
            assert 8 * _leaves(sides, meets_o_first + [_normal(*t)]) == everything, (o, t)
    assert reduction(sides, 2).factor == 8 * math.prod(sides)


def _normal(a, b, c):
    """The same cyclic order with the largest leaf last."""
    while c != max(a, b, c):
        a, b, c = b, c, a
    return a, b, c


# ---- invariants (Hypothesis) -------------------------------------------------------------

shapes = st.lists(st.integers(1, 4), min_size=1, max_size=3).filter(lambda s: math.prod(s) <= 14)


@settings(max_examples=40, deadline=None)
@given(shapes, st.randoms(use_true_random=False))
def test_side_order_does_not_change_the_count(sides, rnd):
    shuffled = list(sides)
    rnd.shuffle(shuffled)
    a = count("x".join(map(str, sides)), order="given")
    b = count("x".join(map(str, shuffled)), order="given")
    assert a == b


@settings(max_examples=40, deadline=None)
@given(shapes)
def test_count_is_divisible_by_the_cells(sides):
    shape = parse_shape("x".join(map(str, sides)))
    c = count(shape)
    assert c > 0 and c % shape.cells == 0

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

from foldfarm.kernel import count, count_below, count_plain, tables_for
from foldfarm.published import table as published_table
from foldfarm.shape import parse_shape
from oracle import count_by_permutations

# Every multiset of sides >= 2 with at most 8 cells, and the same with a side of 1 added.
SMALL = [(2,), (3,), (4,), (5,), (6,), (7,), (8,), (2, 2), (2, 3), (2, 4), (2, 2, 2)]
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
        assert count(text, order="given") == expected, f"{text}: oracle says {expected}"
        assert count(text) == expected


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
    # Without the mirror, the reduced tree differs from the plain procedure only by
    # skipping the sentinel gap and counting the last leaf in bulk.
    out = count_below(tables_for(sides, mirror=False))
    assert out.count == count_plain(sides)
    assert out.count // math.prod(sides) == count_plain(sides, top_fixed=True) // math.prod(sides)


@pytest.mark.parametrize("sides", PLAIN_SHAPES, ids=lambda s: "x".join(map(str, s)))
def test_mirror_halves_are_equal(sides):
    both = count_below(tables_for(sides, mirror=False))
    half = count_below(tables_for(sides, mirror=True))
    n = math.prod(sides)
    if n >= 3:
        # raw leaves: the half with leaf 2 above leaf 3 is exactly half of all
        assert both.count // n == 2 * (half.count // (2 * n))
        # and it is searched with fewer nodes once leaf 3 is not the last leaf
        assert half.nodes < both.nodes if n > 3 else half.nodes == both.nodes
    assert half.count == both.count == count_plain(sides)


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

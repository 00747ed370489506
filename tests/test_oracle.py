"""The brute-force oracle against published counts and the folding symmetries.

Check values come from foldfarm/data/published_counts.csv (each row names its
OEIS sequence); nothing here is a hand-typed count.
"""

from __future__ import annotations

import csv
import functools
import itertools
import math
import sys
from pathlib import Path

import pytest

sys.path.insert(0, str(Path(__file__).resolve().parent))
from oracle import all_foldings, count_by_permutations, is_folding  # noqa: E402

PUBLISHED_CSV = Path(__file__).resolve().parents[1] / "foldfarm" / "data" / "published_counts.csv"

# 9! orders take ~0.3 s here, 10! ~3 s; the 10-cell rows are marked slow.
FAST_CELLS = 9
SLOW_CELLS = 10


def _sides(text: str) -> tuple[int, ...]:
    return tuple(int(p) for p in text.split("x"))


def _published_rows() -> list[tuple[str, int, str]]:
    """(shape, count, source) for every data row of the published table."""
    with PUBLISHED_CSV.open(newline="") as fh:
        lines = [line for line in fh if line.strip() and not line.lstrip().startswith("#")]
    return [(r["shape"], int(r["count"]), r["source"]) for r in csv.DictReader(lines)]


def _rows_up_to(max_cells: int, min_cells: int = 0) -> list:
    params = []
    for shape, count, source in _published_rows():
        cells = math.prod(_sides(shape))
        if min_cells <= cells <= max_cells:
            marks = [pytest.mark.slow] if cells > FAST_CELLS else []
            params.append(pytest.param(shape, count, source, id=f"{shape}-{source.replace(' ', '_')}", marks=marks))
    return params


@functools.cache
def _count(sides: tuple[int, ...]) -> int:
    return count_by_permutations(sides)


@functools.cache
def _foldings(sides: tuple[int, ...]) -> frozenset[tuple[int, ...]]:
    return frozenset(all_foldings(sides))


def test_published_table_has_the_small_rows():
    """Guards the parametrisation below against a CSV that silently lost rows."""
    shapes = {shape for shape, _, _ in _published_rows()}
    assert {"1x8", "2x2", "2x3", "2x4", "3x3"} <= shapes


@pytest.mark.parametrize("shape,published,source", _rows_up_to(SLOW_CELLS))
def test_oracle_matches_published_count(shape, published, source):
    got = _count(_sides(shape))
    assert got == published, (
        f"{shape}: oracle counts {got}, published {published} "
        f"({source}, via foldfarm/data/published_counts.csv)"
    )


def test_rule_rejects_a_crossing_order():
    # 1x4: creases (1,2) and (3,4) are both in parity class 1; in the stack
    # 1,3,2,4 they interleave (positions 0-2 and 1-3), so it is no folding.
    assert not is_folding((1, 4), (1, 3, 2, 4))
    # Same leaves, 1,2,4,3: (1,2) at 0-1 and (3,4) at 2-3 are disjoint, and
    # (2,3) is alone in class 0, so this one folds.
    assert is_folding((1, 4), (1, 2, 4, 3))


def test_every_order_of_a_three_strip_folds():
    # 1x3 has one crease per parity class, so no pair can cross.
    assert _foldings((1, 3)) == frozenset(itertools.permutations((1, 2, 3)))


ROTATION_SHAPES = [(1, 6), (2, 2), (2, 3), (2, 4), (2, 2, 2), (3, 3)]


@pytest.mark.parametrize("sides", ROTATION_SHAPES, ids=lambda s: "x".join(map(str, s)))
def test_cyclic_rotations_of_a_folding_are_foldings(sides):
    """Lunnon's cyclic symmetry: moving the top leaf to the bottom keeps a folding."""
    foldings = _foldings(sides)
    assert foldings
    for stack in foldings:
        for k in range(1, len(stack)):
            rotated = stack[k:] + stack[:k]
            assert rotated in foldings, f"{sides}: {stack} folds but its rotation {rotated} does not"


@pytest.mark.parametrize("sides", ROTATION_SHAPES, ids=lambda s: "x".join(map(str, s)))
def test_reverse_of_a_folding_is_a_folding(sides):
    foldings = _foldings(sides)
    for stack in foldings:
        assert stack[::-1] in foldings, f"{sides}: {stack} folds but its reverse does not"


def _shapes_up_to(max_cells: int) -> list[tuple[int, ...]]:
    """Every shape with sides >= 2 (non-increasing) and at most ``max_cells`` cells."""
    out: list[tuple[int, ...]] = []

    def grow(prefix: tuple[int, ...], largest: int, room: int) -> None:
        if prefix:
            out.append(prefix)
        for p in range(min(largest, room), 1, -1):
            grow(prefix + (p,), p, room // p)

    grow((), max_cells, max_cells)
    return out


@pytest.mark.parametrize("sides", _shapes_up_to(8), ids=lambda s: "x".join(map(str, s)))
def test_count_is_a_multiple_of_the_cells(sides):
    n = math.prod(sides)
    got = _count(sides)
    assert got > 0 and got % n == 0, f"{sides}: {got} foldings is not a positive multiple of {n} cells"


@pytest.mark.parametrize(
    "sides",
    [(2, 3), (2, 4), (1, 2, 4), (1, 2, 3), (1, 2, 2, 2), (3, 1), (1, 1, 5)],
    ids=lambda s: "x".join(map(str, s)),
)
def test_side_order_does_not_change_the_count(sides):
    counts = {p: _count(p) for p in set(itertools.permutations(sides))}
    assert len(set(counts.values())) == 1, f"counts differ by side order: {counts}"

"""Brute-force folding counter: checks every permutation of the cells.

This is the independent reference the tests hold the kernel to, so it is
written straight from the definition and imports nothing from ``foldfarm``.

Definition.  A map with sides ``p1 x ... x pd`` has ``n = p1*...*pd`` cells
(leaves) numbered ``1..n`` in mixed radix, the first side varying fastest:
leaf ``m`` has 1-based coordinate ``c_i(m) = ((m-1) // s_i) % p_i + 1`` with
stride ``s_i = p1*...*p_{i-1}``.  Leaves ``m`` and ``m + s_i`` share a crease
in dimension ``i`` when ``c_i(m) < p_i``; the crease's parity class is
``c_i(m) % 2``.  A *folding* is a top-to-bottom order of all ``n`` leaves in
which no two creases of the same dimension and the same parity class cross,
i.e. interleave: exactly one end of one crease lies strictly between the two
ends of the other.

Same-class creases never share a leaf (two creases meeting at a leaf differ
in coordinate by one, hence in parity), so each such pair has four distinct
ends and "interleave" is well defined.
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Iterator

Crease = tuple[int, int]


def creases_by_class(sides: tuple[int, ...]) -> list[list[Crease]]:
    """Creases grouped by (dimension, parity class); leaves are numbered 1..n."""
    n = math.prod(sides)
    groups: list[list[Crease]] = []
    stride = 1
    for side in sides:
        by_parity: dict[int, list[Crease]] = {0: [], 1: []}
        for m in range(1, n + 1):
            c = ((m - 1) // stride) % side + 1
            if c < side:
                by_parity[c % 2].append((m, m + stride))
        groups.extend(by_parity.values())
        stride *= side
    return groups


def _crossing_pairs(sides: tuple[int, ...]) -> list[tuple[int, int, int, int]]:
    """Every pair of same-class creases ``(a, b, c, e)`` as 0-based leaf indices.

    Only these pairs can violate the folding rule, so checking a permutation
    means checking each of them once.
    """
    pairs = []
    for group in creases_by_class(sides):
        for (a, b), (c, e) in itertools.combinations(group, 2):
            pairs.append((a - 1, b - 1, c - 1, e - 1))
    return pairs


def _is_folding(pos: tuple[int, ...], pairs: list[tuple[int, int, int, int]]) -> bool:
    """True when no listed crease pair interleaves; ``pos[leaf-1]`` = stack position."""
    for a, b, c, e in pairs:
        pa, pb, pc, pe = pos[a], pos[b], pos[c], pos[e]
        # x lies strictly between pa and pb exactly when (pa < x) == (x < pb);
        # the creases cross when one of c, e is between and the other is not.
        if ((pa < pc) == (pc < pb)) != ((pa < pe) == (pe < pb)):
            return False
    return True


def _valid_positions(sides: tuple[int, ...]) -> Iterator[tuple[int, ...]]:
    """Yield every valid assignment ``pos[leaf-1]`` (0 = top) of stack positions.

    A permutation of positions and a stack order are the same object read two
    ways; enumerating positions directly saves inverting each permutation.
    """
    n = math.prod(sides)
    pairs = _crossing_pairs(sides)
    for pos in itertools.permutations(range(n)):
        if _is_folding(pos, pairs):
            yield pos


def count_by_permutations(sides: tuple[int, ...]) -> int:
    """Number of foldings of the map ``sides``, by checking all ``n!`` orders."""
    _check_sides(sides)
    return sum(1 for _ in _valid_positions(sides))


def all_foldings(sides: tuple[int, ...]) -> Iterator[tuple[int, ...]]:
    """Yield each folding as a tuple of leaf numbers, top of the stack first."""
    _check_sides(sides)
    n = math.prod(sides)
    for pos in _valid_positions(sides):
        stack = [0] * n
        for leaf_index, p in enumerate(pos):
            stack[p] = leaf_index + 1
        yield tuple(stack)


def is_folding(sides: tuple[int, ...], stack: tuple[int, ...]) -> bool:
    """True when ``stack`` (leaf numbers, top first) is a folding of ``sides``."""
    _check_sides(sides)
    n = math.prod(sides)
    if sorted(stack) != list(range(1, n + 1)):
        raise ValueError(f"{stack!r} is not an order of the leaves 1..{n}")
    pos = [0] * n
    for p, leaf in enumerate(stack):
        pos[leaf - 1] = p
    return _is_folding(tuple(pos), _crossing_pairs(sides))


def _check_sides(sides: tuple[int, ...]) -> None:
    if not sides or any(not isinstance(p, int) or p < 1 for p in sides):
        raise ValueError(f"sides must be positive integers, got {sides!r}")

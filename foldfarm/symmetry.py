"""Which reduced search tree a map is searched on, and how many foldings each of its leaves stands for.

Pure arithmetic on the working sides (no numpy, no kernel), so the
coordinator and the checks can use it without loading the compiled kernel;
the proofs are in :mod:`foldfarm.kernel`.

A *reduction* keeps, of the foldings with leaf 1 on top, those whose stack
meets a few *conditions*; each condition is a triple ``(a, b, c)`` of
leaves, ``c`` the largest, that must come in this cyclic order reading down
the stack and wrapping round from the bottom to the top (with leaf 1 on
top, ``(1, b, c)`` just says "leaf b above leaf c").  A condition is
decided when its largest leaf ``c`` is placed.  Every folding stands for :attr:`Reduction.factor`
foldings of the map: its ``n`` rotations times the size of the symmetry group
the conditions pick one of.

Trees, by the identifier a run records in its settings (``"tree"``):

``1``
    leaf 1 on top and leaf 2 above leaf 3 (turning the stack over): factor
    ``2n`` (``n`` below 3 cells).  Runs made before the map's own symmetries
    were used have no ``"tree"`` key and were planned on this tree.
``2``
    the map's own symmetries as well, where they provably act freely:

    * two equal odd sides ``q >= 3`` (5x5): the 8 symmetries of that square
      (:func:`square_group_conditions`), factor ``8n``;
    * otherwise a reflection across the middle of an odd side ``p >= 3``, or
      the swap of two equal sides (a reflection in a diagonal), that fixes at
      least 3 cells (3x8, 4x4, 2x2x2), together with turning the stack over
      (:func:`pair_conditions`), factor ``4n``;
    * otherwise (2xN, 4x6, strips) tree 1's reduction.

>>> reduction((3, 8)).conditions, reduction((3, 8)).factor
(((1, 2, 3), (2, 5, 8)), 96)
>>> reduction((5, 5)).factor, reduction((2, 12)).factor, reduction((3, 8), tree=1).factor
(200, 48, 48)
>>> reduction((4, 4)).why
'16 rotations x 2 (turning the stack over) x 2 (the reflection in the diagonal of sides 1 and 2)'
"""

from __future__ import annotations

import itertools
import math
from collections.abc import Callable, Mapping
from dataclasses import dataclass
from functools import lru_cache

from foldfarm.errors import UserError

#: The tree of runs made before the map's symmetries were used (their settings have no "tree" key).
LEGACY_TREE = 1
#: The tree new runs are planned on.
CURRENT_TREE = 2
#: Every tree this version of foldfarm can search.
TREES = (1, 2)

Triple = tuple[int, int, int]
Coords = tuple[int, ...]


@dataclass(frozen=True)
class Reduction:
    """The conditions that cut a map's tree to one folding per symmetry class, and the factor.

    ``conditions`` are sorted by their largest leaf (the leaf that decides
    them); ``factor`` is foldings per reduced-tree leaf; ``tree`` is the
    identifier (None for a test-made reduction); ``why`` says what the
    factor is made of, for people.
    """

    sides: tuple[int, ...]
    tree: int | None
    conditions: tuple[Triple, ...]
    factor: int
    why: str


class TreeError(UserError):
    """A run names a search tree this version of foldfarm cannot search."""


def tree_of(settings: Mapping) -> int:
    """The tree a stored run was planned on: its ``"tree"`` setting, :data:`LEGACY_TREE` if it has none.

    >>> tree_of({"tree": 2}), tree_of({"task_seconds": 120})
    (2, 1)
    """
    tree = settings.get("tree", LEGACY_TREE)
    if tree not in TREES:
        raise TreeError(f"the run was planned on search tree {tree!r}, which this version of foldfarm does not "
                        f"know (it knows {', '.join(map(str, TREES))}): continue it with the version that planned it")
    return tree


def cells(sides: tuple[int, ...]) -> int:
    return math.prod(sides)


def coords(sides: tuple[int, ...], m: int) -> Coords:
    """1-based coordinates of leaf ``m`` (first side fastest, as in :mod:`foldfarm.shape`)."""
    out, stride = [], 1
    for p in sides:
        out.append((m - 1) // stride % p + 1)
        stride *= p
    return tuple(out)


def leaf(sides: tuple[int, ...], c: Coords) -> int:
    """The leaf with coordinates ``c``."""
    m, stride = 1, 1
    for p, x in zip(sides, c):
        m += (x - 1) * stride
        stride *= p
    return m


def as_permutation(sides: tuple[int, ...], move: Callable[[Coords], Coords]) -> tuple[int, ...]:
    """A map symmetry given on coordinates as a permutation of the leaves (entry 0 is 0)."""
    return (0,) + tuple(leaf(sides, move(coords(sides, m))) for m in range(1, cells(sides) + 1))


def reflection(sides: tuple[int, ...], i: int) -> tuple[int, ...]:
    """Reflection across the middle of side ``i`` (0-based): ``x_i -> p_i + 1 - x_i``."""
    return as_permutation(sides, lambda c: c[:i] + (sides[i] + 1 - c[i],) + c[i + 1:])


def swap(sides: tuple[int, ...], i: int, j: int) -> tuple[int, ...]:
    """Exchange of the equal sides ``i < j``: the reflection in the diagonal of that square."""
    def move(c: Coords) -> Coords:
        d = list(c)
        d[i], d[j] = c[j], c[i]
        return tuple(d)
    return as_permutation(sides, move)


def fixed(g: tuple[int, ...]) -> list[int]:
    """The leaves a symmetry keeps in place, ascending."""
    return [m for m in range(1, len(g)) if g[m] == m]


def _normal(a: int, b: int, c: int) -> Triple:
    """The triple with the same cyclic order, largest leaf last (a rotation of it: same condition)."""
    while c != max(a, b, c):
        a, b, c = b, c, a
    return a, b, c


def flip_condition(g: tuple[int, ...]) -> Triple:
    """A triple whose cyclic order both ``g`` and turning the stack over reverse, decided as early as possible.

    ``(t, a, g(a))`` with ``t`` fixed by ``g`` and ``a`` not: ``g`` exchanges
    two of its leaves and keeps the third.  ``t`` is the first fixed leaf,
    ``a`` the leaf that makes the largest of the three smallest.
    """
    t = fixed(g)[0]
    a = min((m for m in range(1, len(g)) if g[m] != m), key=lambda m: (max(t, m, g[m]), m))
    return tuple(sorted((t, a, g[a])))  # type: ignore[return-value]


def pair_conditions(g: tuple[int, ...]) -> tuple[Triple, ...]:
    """Conditions picking one folding of each class of the group {1, g, turn over, g turned over}.

    ``g`` is an involution fixing at least 3 leaves.  The first triple's
    order is reversed by ``g`` and by turning over; the second, three leaves
    ``g`` fixes, only by turning over (proof: :mod:`foldfarm.kernel`).
    """
    u, v, w = fixed(g)[:3]
    return tuple(sorted((flip_condition(g), (u, v, w)), key=lambda t: t[2]))


def square_group(sides: tuple[int, ...], i: int, j: int) -> list[tuple[int, ...]]:
    """The 8 symmetries of the square spanned by the equal sides ``i < j``, as permutations."""
    q = sides[i]

    def move(k: int, flip: bool) -> Callable[[Coords], Coords]:
        def f(c: Coords) -> Coords:
            x, y = c[i], c[j]
            if flip:
                x, y = y, x
            for _ in range(k):  # a quarter turn
                x, y = q + 1 - y, x
            d = list(c)
            d[i], d[j] = x, y
            return tuple(d)
        return f

    return [as_permutation(sides, move(k, flip)) for flip in (False, True) for k in range(4)]


def square_group_conditions(sides: tuple[int, ...], i: int, j: int) -> tuple[Triple, ...]:
    """Conditions picking one folding of each class of the square group of the equal odd sides ``i < j``.

    With ``c`` the middle cell of the square (the first such cell) and
    ``O`` its four neighbours in the square, the first leaf of ``O`` met
    going down the stack from ``c`` must be ``o``, and a triple whose order
    the reflection fixing ``o`` reverses must come in its order (proof:
    :mod:`foldfarm.kernel`).  Of the four choices of ``o``, the one decided
    earliest is taken.
    """
    h = (sides[i] + 1) // 2
    middle = [1] * len(sides)
    middle[i] = middle[j] = h
    c = leaf(sides, tuple(middle))
    ring = []
    for k, step in ((i, -1), (i, 1), (j, -1), (j, 1)):
        d = list(middle)
        d[k] += step
        ring.append(leaf(sides, tuple(d)))
    group = square_group(sides, i, j)
    best = None
    for o in ring:
        (keep,) = [g for g in group[1:] if g[o] == o]
        conds = [_normal(c, o, x) for x in ring if x != o] + [flip_condition(keep)]
        conds.sort(key=lambda t: t[2])
        if best is None or _score(conds) < _score(best):
            best = conds
    return tuple(best)


def _score(conditions) -> tuple[int, int]:
    """How late a set of conditions is decided: its latest deciding leaf, then their sum (smaller is earlier)."""
    return max(t[2] for t in conditions), sum(t[2] for t in conditions)


def _pairs(sides: tuple[int, ...]) -> list[tuple[str, tuple[int, ...]]]:
    """Involutions of the map fixing at least 3 leaves: reflections of odd sides, swaps of equal sides."""
    found = []
    for i, p in enumerate(sides):
        if p >= 3 and p % 2:
            found.append((f"the reflection across the middle of side {i + 1}, of {p}", reflection(sides, i)))
    for i, j in itertools.combinations(range(len(sides)), 2):
        if sides[i] == sides[j] >= 2:
            found.append((f"the reflection in the diagonal of sides {i + 1} and {j + 1}", swap(sides, i, j)))
    return [(name, g) for name, g in found if len(fixed(g)) >= 3]


@lru_cache(maxsize=256)
def reduction(sides: tuple[int, ...], tree: int = CURRENT_TREE) -> Reduction:
    """The reduction of the map with working sides ``sides`` (sides of 1 dropped) on tree ``tree``."""
    sides = tuple(sides)
    if tree not in TREES:
        raise TreeError(f"there is no search tree {tree!r} (trees: {', '.join(map(str, TREES))})")
    n = cells(sides)
    rotations = f"{n} rotation{'s' if n != 1 else ''}"
    if n < 3:
        return Reduction(sides, tree, (), n, rotations)
    turn = "2 (turning the stack over)"
    mirror = Reduction(sides, tree, ((1, 2, 3),), 2 * n, f"{rotations} x {turn}")
    if tree == 1:
        return mirror
    squares = [(i, j) for i, j in itertools.combinations(range(len(sides)), 2)
               if sides[i] == sides[j] >= 3 and sides[i] % 2]
    if squares:
        i, j = min(squares, key=lambda ij: _score(square_group_conditions(sides, *ij)))
        return Reduction(sides, tree, square_group_conditions(sides, i, j), 8 * n,
                         f"{rotations} x 8 (the symmetries of the square of sides {i + 1} and {j + 1})")
    pairs = _pairs(sides)
    if pairs:
        name, g = min(pairs, key=lambda pair: _score(pair_conditions(pair[1])))
        return Reduction(sides, tree, pair_conditions(g), 4 * n, f"{rotations} x {turn} x 2 ({name})")
    return mirror


def unreduced(sides: tuple[int, ...]) -> Reduction:
    """Leaf 1 on top and nothing else (factor ``n``): the tests' reference for every other reduction."""
    n = cells(tuple(sides))
    return Reduction(tuple(sides), None, (), n, f"{n} rotations")


def describe(condition: Triple) -> str:
    """A condition in words.

    >>> describe((1, 2, 3)), describe((5, 8, 12))
    ('leaf 2 above leaf 3', 'leaves 5, 8, 12 in this cyclic order down the stack')
    """
    a, b, c = condition
    if a == 1:
        return f"leaf {b} above leaf {c}"
    return f"leaves {a}, {b}, {c} in this cyclic order down the stack"

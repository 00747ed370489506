"""Map shapes: parsing, canonical text, and the leaf tables the kernel reads.

A *shape* is the list of side lengths of a rectangular map, ``3x5`` or
``2x2x2``; its cells are the *leaves* of the folding problem.  Leaves are
numbered ``1..n`` in mixed radix, the first side varying fastest, so leaf
``m`` has coordinate ``coordinate(i, m) = ((m - 1) // stride[i]) % side[i] + 1``
in dimension ``i`` (1-based, as in Lunnon 1971) where ``stride[i]`` is the
product of the sides before ``i``.  Leaf ``0`` is a sentinel that closes the
stack into a cycle (see :mod:`foldfarm.kernel`).

>>> s = parse_shape("3×5")
>>> s.text, s.cells
('3x5', 15)
>>> parse_shape("2x2x2").sides
(2, 2, 2)
>>> parse_shape("0x5")
Traceback (most recent call last):
...
foldfarm.shape.ShapeError: '0x5' is not a shape: side '0' is 0, every side must be at least 1
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from foldfarm.errors import UserError

#: The most cells the kernel addresses.  The neighbour table holds
#: ``dims * (cells + 1)**2`` 8-byte entries and the gap stack ``cells**2 / 2``,
#: so the bound keeps them under 100 MB even for a 10-dimensional hypercube.
#: Every map whose count is open today has fewer than 100 cells.
MAX_CELLS = 1024

_SEPARATORS = re.compile(r"[x×X*]")
_SIDE = re.compile(r"\d+")


class ShapeError(UserError, ValueError):
    """A shape the user typed cannot be used; the message is one sentence."""


@dataclass(frozen=True)
class Shape:
    """Side lengths of a map, in the order the user gave them."""

    sides: tuple[int, ...]

    @property
    def text(self) -> str:
        """Canonical text: the sides joined by ``x``, in the given order."""
        return "x".join(str(p) for p in self.sides)

    @property
    def cells(self) -> int:
        """Number of cells (leaves), the product of the sides."""
        return math.prod(self.sides)

    @property
    def key(self) -> tuple[int, ...]:
        """Order-free identity: sides > 1, sorted (the count depends only on this)."""
        return tuple(sorted(p for p in self.sides if p > 1))

    def __str__(self) -> str:
        return self.text


def parse_shape(text: str) -> Shape:
    """Parse ``"3x5"``, ``"3×5"``, ``"2x2x2"`` or ``"7"``; raise :class:`ShapeError`."""
    raw = text.strip() if isinstance(text, str) else ""
    if not raw:
        raise ShapeError("empty shape: give the sides joined by 'x', for example 3x5")
    if "," in raw:
        raise ShapeError(f"{raw!r} is not a shape: join the sides with 'x', not ',' (for example 3x5)")
    parts = _SEPARATORS.split(raw)
    sides = []
    for part in parts:
        part = part.strip()
        if not part:
            raise ShapeError(f"{raw!r} is not a shape: a side is missing (write the sides joined by 'x', for example 3x5)")
        if not _SIDE.fullmatch(part):
            raise ShapeError(
                f"{raw!r} is not a shape: side {part!r} is not a whole number "
                "(write positive whole sides joined by 'x', for example 3x5)"
            )
        if int(part) == 0:
            raise ShapeError(f"{raw!r} is not a shape: side {part!r} is 0, every side must be at least 1")
        sides.append(int(part))
    shape = Shape(tuple(sides))
    if shape.cells > MAX_CELLS:
        raise ShapeError(
            f"{shape.text} has {shape.cells} cells; the kernel addresses at most {MAX_CELLS} cells"
        )
    return shape


def fast_order(sides: tuple[int, ...]) -> tuple[int, ...]:
    """Side order the kernel uses by default: sides of 1 dropped, shortest first.

    The count does not depend on the order, the cost does.  Measured with
    ``benchmarks/order.py``: the shortest side first (the fastest-varying
    leaf number) visits fewer nodes and is faster on every shape timed, for
    example 12x2 visits 1.9 times the nodes of 2x12 and takes 2.6 times as
    long, 4x3x2 takes 2.2 times as long as 2x3x4.
    """
    return tuple(sorted(p for p in sides if p > 1))


def working_sides(shape: Shape, order: str = "fast") -> tuple[int, ...]:
    """The sides the kernel searches: ``order="fast"`` or ``"given"`` (1s dropped)."""
    if order == "fast":
        return fast_order(shape.sides)
    if order == "given":
        return tuple(p for p in shape.sides if p > 1)
    raise ValueError(f"side order must be 'fast' or 'given', not {order!r}")


def strides(sides: tuple[int, ...]) -> np.ndarray:
    """``stride[i]``: leaf-number step between neighbours in dimension ``i``."""
    out = np.ones(len(sides), dtype=np.int64)
    for i in range(1, len(sides)):
        out[i] = out[i - 1] * sides[i - 1]
    return out


def coordinates(sides: tuple[int, ...]) -> np.ndarray:
    """``coord[i, m]`` = 1-based coordinate of leaf ``m`` in dimension ``i``.

    Shape ``(dims, cells + 1)``; column 0 (the sentinel) is 0.
    """
    n = math.prod(sides)
    m = np.arange(n + 1, dtype=np.int64)
    coord = np.zeros((len(sides), n + 1), dtype=np.int64)
    for i, (p, s) in enumerate(zip(sides, strides(sides))):
        coord[i, 1:] = ((m[1:] - 1) // s) % p + 1
    return coord


def neighbour_table(sides: tuple[int, ...]) -> np.ndarray:
    """Lunnon's connection table ``D[l, i, m]`` for ``1 <= m <= l <= n``.

    When leaf ``l`` is inserted, the creases that constrain it in dimension
    ``i`` are those of the same parity class as its own crease to leaf
    ``l - stride[i]``.  Each leaf has at most one crease of a given class in
    a dimension; ``D[l, i, m]`` is the other end of leaf ``m``'s crease of
    that class if that end is already placed (``<= l``), else ``m`` itself.
    In particular ``D[l, i, l]`` is ``l - stride[i]``, or ``l`` when leaf
    ``l`` has no lower neighbour in dimension ``i`` (no constraint there).
    Entries with ``m > l`` and the sentinel column ``m = 0`` are 0.

    Shape ``(n + 1, dims, n + 1)``, so the rows read while placing one leaf
    sit together.  dtype int64: narrower entries were measured slower, even
    for 8x8 (see DEVELOPERS.md).
    """
    n = math.prod(sides)
    coord = coordinates(sides)
    table = np.zeros((n + 1, len(sides), n + 1), dtype=np.int64)
    l = np.arange(n + 1)[:, None]
    m = np.arange(n + 1)[None, :]
    placed = (m >= 1) & (m <= l)
    for i, (p, s) in enumerate(zip(sides, strides(sides))):
        cl = coord[i][:, None]
        cm = coord[i][None, :]
        same_parity = (cl - cm) % 2 == 0
        # Same parity as l: m is the upper end of its crease of l's class.
        down = np.where(cm == 1, m, m - s)
        # Opposite parity: m is the lower end; its partner must exist and be placed.
        up = np.where((cm == p) | (m + s > l), m, m + s)
        table[:, i, :] = np.where(placed, np.where(same_parity, down, up), 0)
    return table

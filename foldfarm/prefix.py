"""Prefixes: the names of subtrees of a map's search tree, and so of tasks.

Pure text and tuple functions (no kernel import, so the store can use them);
:func:`foldfarm.kernel.legal_prefix` checks a prefix against a map's tree.

A node of the search tree (see :mod:`foldfarm.kernel`) is a placement of
leaves ``1..k``; it is reached by *steps*, the leaf that each of leaves
``2..k`` was inserted directly below.  Its text form is a path: ``/`` for the
root (only leaf 1 placed, the whole tree) and ``/1/2/2`` for "leaf 2 below
leaf 1, leaf 3 below leaf 2, leaf 4 below leaf 2".  The text round-trips,
has one spelling per node, and a node's subtree contains another's exactly
when its path is an ancestor path.

>>> steps = parse_prefix("/1/2/2")
>>> steps, prefix_text(steps)
((1, 2, 2), '/1/2/2')
>>> is_ancestor((1, 2), (1, 2, 2)), is_ancestor((1, 2), (1, 3)), overlaps((1,), (1,))
(True, False, True)
"""

from __future__ import annotations

import re

from foldfarm.errors import UserError

ROOT = "/"
_TEXT = re.compile(r"/|(?:/[1-9][0-9]{0,4})+")
#: Longest prefix text accepted, in characters (a 1024-cell map needs < 5000).
MAX_TEXT = 6000

Steps = tuple[int, ...]


class PrefixError(UserError, ValueError):
    """A prefix is malformed, or is not a legal path of the tree; the message names the step."""


def prefix_text(steps: Steps) -> str:
    """Text form of ``steps``: ``/`` or ``/a/b/...``."""
    return "/" + "/".join(str(s) for s in steps) if steps else ROOT


def parse_prefix(text: str) -> Steps:
    """Steps of a prefix text; :class:`PrefixError` if it is not one (syntax only)."""
    if not isinstance(text, str) or len(text) > MAX_TEXT or not _TEXT.fullmatch(text):
        shown = repr(text) if len(repr(text)) <= 40 else repr(text)[:37] + "..."
        raise PrefixError(
            f"{shown} is not a prefix: write / for the whole tree or leaf numbers after slashes, for example /1/2/2"
        )
    return () if text == ROOT else tuple(int(part) for part in text[1:].split("/"))


#: Decimal digits per step in a :func:`sort_key` (a step is at most 5 digits, see the prefix syntax).
KEY_DIGITS = 5


def sort_key(steps: Steps) -> str:
    """A text that sorts, as plain bytes and under any collation of digits, as ``steps`` sorts as a tuple.

    Each step is written as :data:`KEY_DIGITS` zero-padded digits, so a
    node's key is a prefix of its descendants' keys: sorted by key, every
    node comes directly before the run of its subtree's nodes.  The root's
    key is empty.

    >>> sort_key((1, 2, 10)), sort_key(())
    ('000010000200010', '')
    >>> sorted([(1, 10), (1, 2, 3), (1, 2), (2,)], key=sort_key)
    [(1, 2), (1, 2, 3), (1, 10), (2,)]
    """
    return "".join(f"{step:0{KEY_DIGITS}d}" for step in steps)


def is_ancestor(a: Steps, b: Steps) -> bool:
    """Whether node ``a``'s subtree contains node ``b`` (a node is its own ancestor)."""
    return len(a) <= len(b) and b[: len(a)] == a


def overlaps(a: Steps, b: Steps) -> bool:
    """Whether the subtrees of ``a`` and ``b`` share a node."""
    return is_ancestor(a, b) or is_ancestor(b, a)


def first_overlap(prefixes) -> tuple[Steps, Steps] | None:
    """A pair of overlapping prefixes among ``prefixes``, or None.

    Sorting puts every ancestor directly before a run of its descendants, so
    comparing neighbours finds an overlap if there is one: O(k log k).
    """
    ordered = sorted(prefixes)
    for a, b in zip(ordered, ordered[1:]):
        if is_ancestor(a, b):
            return a, b
    return None

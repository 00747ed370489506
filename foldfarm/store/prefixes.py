"""Prefix texts: the names of tasks within a run.

A prefix is ``/`` (the root: the whole search tree) or ``/a/b/c`` with
positive integer components (at most 5 digits, no leading zeros), so each
subtree has one spelling; :mod:`foldfarm.prefix` says what the steps mean.
Its *depth* is the number of components and its *branch* the first
component (``None`` for the root).  The store checks syntax and nesting
only: whether a prefix is a node of the map's tree is the planner's business.

>>> prefix_depth("/1/2/2/4"), prefix_branch("/1/2/2/4"), prefix_branch("/")
(4, 1, None)
>>> is_ancestor("/1", "/1/2"), is_ancestor("/1", "/12"), is_ancestor("/", "/3")
(True, False, True)
>>> check_remainder("/1", ["/1/3", "/1/2/5"])
['/1/3', '/1/2/5']
"""

from __future__ import annotations

import re

from foldfarm.store.errors import StoreError

# Same syntax as foldfarm.prefix (kept here so the store does not import the kernel).
_PREFIX = re.compile(r"/|(?:/[1-9][0-9]{0,4})+")

#: Longest accepted prefix text, in characters, as in foldfarm.prefix (the
#: column is unbounded TEXT; the bound keeps garbage from becoming a huge key).
MAX_PREFIX_LENGTH = 6000


def check_prefix(text: object) -> str:
    """Return ``text`` if it is a prefix, else raise :class:`StoreError`."""
    if not isinstance(text, str) or len(text) > MAX_PREFIX_LENGTH or not _PREFIX.fullmatch(text):
        shown = repr(text) if len(repr(text)) <= 60 else repr(text)[:57] + "..."
        raise StoreError(
            f"{shown} is not a task prefix: write '/' for the whole tree or "
            "positive integers after slashes, for example /1/2/4"
        )
    return text


def prefix_depth(prefix: str) -> int:
    """Number of components: 0 for ``/``."""
    return 0 if prefix == "/" else prefix.count("/")


def prefix_branch(prefix: str) -> int | None:
    """First component, or ``None`` for the root."""
    if prefix == "/":
        return None
    return int(prefix.split("/", 2)[1])


def is_ancestor(a: str, b: str) -> bool:
    """True when subtree ``b`` lies strictly inside subtree ``a``."""
    if a == "/":
        return b != "/"
    return b.startswith(a + "/")


def _components(prefix: str) -> tuple[int, ...]:
    return () if prefix == "/" else tuple(int(p) for p in prefix[1:].split("/"))


def check_remainder(parent: str, children: list[str]) -> list[str]:
    """Validate the remainder of a split task; return the children in the given order.

    The children must be strict descendants of ``parent`` and pairwise
    disjoint subtrees (no duplicates, none inside another), otherwise some
    foldings would be counted twice.  An empty remainder is refused: a task
    whose budget covered everything is *done*, not split.
    """
    children = [check_prefix(c) for c in children]
    if not children:
        raise StoreError(f"a split of {parent} needs at least one remainder prefix; record it as done instead")
    for child in children:
        if not is_ancestor(parent, child):
            raise StoreError(f"remainder prefix {child} is not inside the split task {parent}")
    # In lexicographic order of components a subtree's members directly
    # follow its root, so checking neighbours finds every overlap.
    ordered = sorted(children, key=_components)
    for a, b in zip(ordered, ordered[1:], strict=False):
        if a == b:
            raise StoreError(f"remainder prefix {a} appears twice in the split of {parent}")
        if is_ancestor(a, b):
            raise StoreError(f"remainder prefixes {a} and {b} overlap in the split of {parent}")
    return children

"""Prefix texts as the store sees them: the names of tasks within a run.

The syntax and the subtree order are :mod:`foldfarm.prefix`'s; this module
adds what the store records (depth, first component) and the one rule a split
must obey.  The store checks syntax and nesting only: whether a prefix is a
node of the map's tree is the kernel's business.

>>> prefix_depth("/1/2/2/4"), prefix_branch("/1/2/2/4"), prefix_branch("/")
(4, 1, None)
>>> is_ancestor("/1", "/1/2"), is_ancestor("/1", "/12"), is_ancestor("/", "/3")
(True, False, True)
>>> check_remainder("/1", ["/1/3", "/1/2/5"])
['/1/3', '/1/2/5']
"""

from __future__ import annotations

from foldfarm import prefix as _prefix
from foldfarm.store.errors import StoreError


def _steps(text: object) -> tuple[int, ...]:
    try:
        return _prefix.parse_prefix(text)  # type: ignore[arg-type]
    except _prefix.PrefixError as exc:
        raise StoreError(str(exc)) from None


def steps_of(text: object) -> tuple[int, ...]:
    """The steps of a prefix text; :class:`StoreError` if it is not one."""
    return _steps(text)


def check_prefix(text: object) -> str:
    """Return ``text`` if it is a prefix, else raise :class:`StoreError`."""
    _steps(text)
    return text  # type: ignore[return-value]


def prefix_depth(prefix: str) -> int:
    """Number of components: 0 for ``/``."""
    return len(_steps(prefix))


def prefix_branch(prefix: str) -> int | None:
    """First component, or ``None`` for the root."""
    steps = _steps(prefix)
    return steps[0] if steps else None


def is_ancestor(a: str, b: str) -> bool:
    """True when subtree ``b`` lies strictly inside subtree ``a``."""
    return a != b and _prefix.is_ancestor(_steps(a), _steps(b))


def check_remainder(parent: str, children: list[str]) -> list[str]:
    """Validate the remainder of a split task; return the children in the given order.

    The children must be strict descendants of ``parent`` and pairwise
    disjoint subtrees (no duplicates, none inside another), otherwise some
    foldings would be counted twice.  An empty remainder is refused: a task
    whose budget covered everything is *done*, not split.
    """
    if not children:
        raise StoreError(f"a split of {parent} needs at least one remainder prefix; record it as done instead")
    top = _steps(parent)
    steps = [_steps(c) for c in children]
    for child, s in zip(children, steps):
        if s == top or not _prefix.is_ancestor(top, s):
            raise StoreError(f"remainder prefix {child} is not inside the split task {parent}")
    clash = _prefix.first_overlap(steps)
    if clash is not None:
        a, b = (_prefix.prefix_text(s) for s in clash)
        if a == b:
            raise StoreError(f"remainder prefix {a} appears twice in the split of {parent}")
        raise StoreError(f"remainder prefixes {a} and {b} overlap in the split of {parent}")
    return children

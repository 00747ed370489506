"""Series: a family of shapes counted as runs in one store, tabulated beside the published values.

A *family* is written like a shape in which sides may be the letter ``N``
(``3xN``, ``Nx2``, ``NxN``, ``2xNx3``), or as ``S^N``: the map of ``N``
dimensions with every side ``S`` (``2^N`` is ``2``, ``2x2``, ``2x2x2``, ...).
Its *index* ``N`` runs over a range of whole numbers from 1.

>>> family = parse_family("3xN")
>>> [member(family, n) for n in (1, 2, 8)]
['3x1', '3x2', '3x8']
>>> [member(parse_family("2^N"), n) for n in (1, 3)], member(parse_family("NxN"), 4)
(['2', '2x2x2'], '4x4')
"""

from __future__ import annotations

import re
from collections.abc import Callable
from dataclasses import dataclass

from foldfarm.errors import UserError
from foldfarm.shape import ShapeError, parse_shape

#: Most members one sweep may have.
MAX_MEMBERS = 200
_POWER = re.compile(r"([1-9][0-9]*)\s*\^\s*[nN]")
_EXAMPLES = "write a shape with N for the varying side, like 3xN or NxN, or S^N for every side S, like 2^N"


class FamilyError(UserError, ValueError):
    """A family the user typed cannot be used; the message is one sentence."""


@dataclass(frozen=True)
class Family:
    """A family of shapes: ``sides`` with ``None`` where the index goes, or ``power`` for ``S^N``."""

    text: str
    sides: tuple[int | None, ...] = ()
    power: int | None = None


def parse_family(text: str) -> Family:
    """Parse ``3xN``, ``NxN``, ``2xNx3`` or ``2^N``; :class:`FamilyError` otherwise."""
    raw = text.strip() if isinstance(text, str) else ""
    power = _POWER.fullmatch(raw)
    if power:
        side = int(power.group(1))
        if side < 2:
            raise FamilyError(f"{raw!r} is a single cell whatever N is; the side of S^N must be at least 2")
        return Family(raw, power=side)
    parts = [p.strip() for p in re.split(r"[x×X*]", raw)] if raw else []
    if not any(p in ("N", "n") for p in parts):
        raise FamilyError(f"{raw!r} is not a family of shapes: {_EXAMPLES}")
    sides: list[int | None] = []
    for part in parts:
        if part in ("N", "n"):
            sides.append(None)
        elif part.isdigit() and int(part) >= 1:
            sides.append(int(part))
        else:
            raise FamilyError(f"{raw!r} is not a family of shapes: side {part!r} is neither a whole number >= 1 "
                              f"nor N ({_EXAMPLES})")
    return Family(raw, sides=tuple(sides))


def member(family: Family, index: int) -> str:
    """The shape text of member ``index`` of ``family``."""
    if family.power is not None:
        return "x".join([str(family.power)] * index)
    return "x".join(str(index if p is None else p) for p in family.sides)


def members(family: Family, first: int, last: int) -> list[tuple[int, str]]:
    """``(index, canonical shape)`` for ``first..last``; :class:`UserError` for a bad range or too large a shape."""
    if first < 1:
        raise FamilyError(f"--from must be at least 1, not {first}")
    if last < first:
        raise FamilyError(f"--to ({last}) must not be below --from ({first})")
    if last - first + 1 > MAX_MEMBERS:
        raise FamilyError(f"a sweep has at most {MAX_MEMBERS} members; {first}..{last} has {last - first + 1}")
    out = []
    for index in range(first, last + 1):
        try:
            out.append((index, parse_shape(member(family, index)).text))
        except ShapeError as exc:
            raise FamilyError(f"member N={index} of {family.text}: {exc}") from None
    return out


@dataclass
class Row:
    """One member of a sweep: its run, its count (None if unfinished), state and the published values."""

    index: int
    shape: str
    run: int
    count: int | None
    state: str
    failed: list[str]
    published: list[tuple[int, str]]

    def as_json(self) -> dict:
        return {"index": self.index, "shape": self.shape, "run": self.run, "count": self.count, "state": self.state,
                "failed_checks": self.failed,
                "published": [{"count": c, "source": s} for c, s in self.published]}


def sweep(store, client, shapes: list[tuple[int, str]], settings, *, fresh: bool = False,
          on_row: Callable[[Row], None] | None = None) -> list[Row]:
    """Count each ``(index, shape)`` as a run on ``client`` (re-using the latest run of that shape
    unless ``fresh``); every finished run is verified by :func:`foldfarm.run.finish`."""
    from foldfarm import run as runner
    from foldfarm.published import published

    threads = max(1, sum(client.nthreads().values()))
    rows = []
    for index, shape in shapes:
        earlier = [] if fresh else store.runs_of_shape(shape)
        run_id = earlier[-1][0] if earlier else runner.create(store, shape, settings, threads, client)
        summary = runner.drive(store, client, run_id)
        checks = store.get_run(run_id).checks or {}
        row = Row(index, shape, run_id, summary.count, summary.state,
                  [name for name, c in checks.items() if c.get("ok") is False],
                  [(v.count, v.source) for v in published(shape)])
        rows.append(row)
        if on_row is not None:
            on_row(row)
    return rows


def table_lines(rows: list[Row]) -> list[str]:
    """The sweep table: index, shape, run, count, checks, published value and source."""
    width = max([5] + [len(str(r.count)) for r in rows])
    out = [f"{'N':>4}  {'shape':<12} {'run':>5}  {'count':>{width}}  {'checks':<10} published"]
    for r in rows:
        status = r.state if not r.failed else "FAILED " + ",".join(r.failed)
        values = {}
        for count, source in r.published:
            values.setdefault(count, []).append(source)
        shown = "; ".join(f"{'same' if c == r.count else c} ({', '.join(s)})" for c, s in values.items())
        count = "" if r.count is None else str(r.count)
        out.append(f"{r.index:>4}  {r.shape:<12} {r.run:>5}  {count:>{width}}  {status:<10} {shown}".rstrip())
    return out


def sequence_lines(rows: list[Row]) -> list[str]:
    """``index value`` lines of the finished members, the two-column form sequence tables take."""
    return [f"{r.index} {r.count}" for r in rows if r.count is not None]

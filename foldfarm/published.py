"""Published map-folding counts, carried with the package (``data/published_counts.csv``).

Every row names its source (an OEIS sequence).  Look-ups ignore side order
and sides of length 1, since the count depends on neither.

>>> [(v.count, v.source) for v in published("3x3")]
[(1368, 'OEIS A001416'), (1368, 'OEIS A001418')]
"""

from __future__ import annotations

import csv
from dataclasses import dataclass
from functools import lru_cache
from importlib import resources

from foldfarm.shape import Shape, parse_shape


@dataclass(frozen=True)
class PublishedValue:
    """One row of the table: a shape, its count and where it was published."""

    shape: str
    count: int
    source: str


@lru_cache(maxsize=1)
def table() -> tuple[PublishedValue, ...]:
    """All rows, in file order."""
    text = resources.files("foldfarm").joinpath("data/published_counts.csv").read_text()
    lines = [line for line in text.splitlines() if line and not line.startswith("#")]
    return tuple(
        PublishedValue(row["shape"], int(row["count"]), row["source"]) for row in csv.DictReader(lines)
    )


def published(shape: Shape | str) -> list[PublishedValue]:
    """Every published value for ``shape`` (empty when none is known to us)."""
    key = (parse_shape(shape) if isinstance(shape, str) else shape).key
    return [v for v in table() if parse_shape(v.shape).key == key]

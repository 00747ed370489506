"""The planner: cut a map's search tree into prefix tasks that partition it.

:func:`plan` grows a frontier from the root, always splitting the subtree
estimated to be the largest into its children, until the frontier holds the
requested number of tasks.  Each split replaces a node by all of its
children, so at every step the frontier partitions the tree's foldings: the
sum of the tasks' counts is the count of the map, and no task is an
ancestor of another.  Sizes are estimated with Knuth's random probes
(:func:`foldfarm.kernel.expand_many`), seeded by the node's own steps so the plan
depends only on ``(shape, side order, target, probes, seed)``.

>>> from foldfarm.kernel import prepare, count_below
>>> tables = prepare("3x4")
>>> tasks = list(plan(tables, 10))
>>> len(tasks) >= 10
True
>>> sum(count_below(tables, t).count for t in tasks)  # OEIS A001416: 3x4 has 15552
15552
"""

from __future__ import annotations

import heapq
from collections.abc import Iterator

from foldfarm.kernel import Tables, expand_many
from foldfarm.prefix import Steps, prefix_text

#: Random probes per child when estimating subtree sizes.
DEFAULT_PROBES = 4


def splittable(tables: Tables, steps: Steps) -> bool:
    """Whether a node has children that are nodes (not last-leaf foldings counted in bulk)."""
    return len(steps) + 2 < tables.n


def plan(tables: Tables, target_tasks: int, probes: int = DEFAULT_PROBES, seed: int = 0) -> Iterator[Steps]:
    """Yield, in sorted order, at least ``min(target_tasks, possible)`` prefixes partitioning the tree.

    Splits the largest estimated subtrees first, a batch at a time (an
    eighth of the tasks still missing, at least one), until the frontier
    reaches ``target_tasks`` or no node can be split.  ``probes`` random
    probes per child estimate its size; an only child inherits its parent's.
    """
    if target_tasks < 1:
        raise ValueError("target_tasks must be at least 1")
    frontier: list[tuple[float, Steps]] = [(-1.0, ())]  # max-heap by estimated nodes
    final: list[Steps] = []  # nodes that cannot be split further
    while frontier and len(frontier) + len(final) < target_tasks:
        want = max(1, (target_tasks - len(frontier) - len(final)) // 8)
        batch: list[tuple[float, Steps]] = []
        while frontier and len(batch) < want:
            key, steps = heapq.heappop(frontier)
            if splittable(tables, steps):
                batch.append((key, steps))
            else:
                final.append(steps)
        nodes = [steps for _, steps in batch]
        grown = expand_many(tables, nodes, probes, seed)
        for (key, steps), (kids, sizes) in zip(batch, grown):
            if not kids:
                final.append(steps)  # a dead end stays a task: it counts 0
            elif len(kids) == 1:
                heapq.heappush(frontier, (key, steps + (kids[0],)))  # same subtree, less one node
            else:
                for m, size in zip(kids, sizes):
                    heapq.heappush(frontier, (-size, steps + (m,)))
    tasks = final + [steps for _, steps in frontier]
    tasks.sort()
    yield from tasks


def batched(prefixes: Iterator[Steps], size: int = 10_000) -> Iterator[list[str]]:
    """Group a plan's prefixes into lists of texts, ``size`` at a time, for the store."""
    batch: list[str] = []
    for steps in prefixes:
        batch.append(prefix_text(steps))
        if len(batch) >= size:
            yield batch
            batch = []
    if batch:
        yield batch

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
import math
import zlib
from collections.abc import Iterator

from foldfarm.kernel import Tables, expand_many, probe
from foldfarm.prefix import Steps, prefix_text

#: Random probes per child when estimating subtree sizes.
DEFAULT_PROBES = 4


def splittable(tables: Tables, steps: Steps) -> bool:
    """Whether a node has children that are nodes (not last-leaf foldings counted in bulk)."""
    return len(steps) + 2 < tables.n


def grow(tables: Tables, target_tasks: int, probes: int = DEFAULT_PROBES, seed: int = 0,
         root: Steps = ()) -> list[tuple[Steps, float]]:
    """The frontier below ``root`` grown largest-first to ``target_tasks`` nodes, sorted: ``(steps, size)``.

    Splits the largest estimated subtrees first, a batch at a time (an
    eighth of the tasks still missing, at least one), until the frontier
    reaches ``target_tasks`` or no node can be split.  ``probes`` random
    probes per child estimate its size (search nodes); an only child
    inherits its parent's, and ``root`` counts as size 1.  The frontier
    partitions ``root``'s subtree.  Memory: proportional to ``target_tasks``.
    """
    if target_tasks < 1:
        raise ValueError("target_tasks must be at least 1")
    frontier: list[tuple[float, Steps]] = [(-1.0, root)]  # max-heap by estimated nodes
    final: list[tuple[float, Steps]] = []  # nodes that cannot be split further
    while frontier and len(frontier) + len(final) < target_tasks:
        want = max(1, (target_tasks - len(frontier) - len(final)) // 8)
        batch: list[tuple[float, Steps]] = []
        while frontier and len(batch) < want:
            key, steps = heapq.heappop(frontier)
            if splittable(tables, steps):
                batch.append((key, steps))
            else:
                final.append((key, steps))
        nodes = [steps for _, steps in batch]
        grown = expand_many(tables, nodes, probes, seed)
        for (key, steps), (kids, sizes) in zip(batch, grown):
            if not kids:
                final.append((key, steps))  # a dead end stays a task: it counts 0
            elif len(kids) == 1:
                heapq.heappush(frontier, (key, steps + (kids[0],)))  # same subtree, less one node
            else:
                for m, size in zip(kids, sizes):
                    heapq.heappush(frontier, (-size, steps + (m,)))
    tasks = [(steps, -key) for key, steps in final + frontier]
    tasks.sort()
    return tasks


def plan(tables: Tables, target_tasks: int, probes: int = DEFAULT_PROBES, seed: int = 0) -> Iterator[Steps]:
    """Yield, in sorted order, at least ``min(target_tasks, possible)`` prefixes partitioning the tree.

    One frontier grown largest-first (:func:`grow`), held whole in memory:
    for plans of up to a few thousand tasks (the estimator's strata, a
    piece of :func:`plan_stream`).
    """
    for steps, _ in grow(tables, target_tasks, probes, seed):
        yield steps


#: Nodes of the coarse plan that :func:`pieces` divides a large target over.
COARSE = 4096
#: Knuth probes that estimate each coarse node's size before the target is shared out: four per
#: task the node will get, within these bounds (a probe costs about a twentieth of a planned task).
COARSE_PROBES = (64, 1024)
#: Most tasks of one piece; a piece with a larger share is divided again.
PIECE_LIMIT = 65536


def shares(sizes: list[float], target_tasks: int) -> list[int]:
    """Tasks for each of a coarse plan's nodes: ``target_tasks`` divided in proportion to ``sizes``, rounded up.

    Every node gets at least one task; the shares add up to at least
    ``target_tasks`` (the rounding adds at most one a node).

    >>> shares([3.0, 1.0, 0.0], 8)
    [6, 2, 1]
    """
    whole = sum(s for s in sizes if s > 0)
    if whole <= 0:
        return [max(1, -(-target_tasks // len(sizes)))] * len(sizes)
    return [max(1, math.ceil(target_tasks * s / whole)) if s > 0 else 1 for s in sizes]


def node_size(tables: Tables, steps: Steps, probes: int, seed: int = 0) -> float:
    """Estimated search nodes below ``steps`` (a legal node) from ``probes`` Knuth probes; 0 if it cannot be split.

    The probes' seed comes from ``seed`` and the node's text, so each node
    has its own stream and the estimate depends on nothing else.
    """
    if not splittable(tables, steps):
        return 0.0
    own = (seed * 1_000_003 + zlib.crc32(prefix_text(steps).encode())) % 2**32
    return probe(tables, steps, probes, own)[0] / probes


def pieces(tables: Tables, target_tasks: int, probes: int = DEFAULT_PROBES, seed: int = 0, root: Steps = (), *,
           coarse: int = COARSE, limit: int = PIECE_LIMIT) -> Iterator[tuple[Steps, int]]:
    """Cut a plan of ``target_tasks`` below ``root`` into pieces ``(steps, tasks)``, in sorted order.

    A target of at most ``coarse`` is one piece, ``root`` itself.  A larger
    one is a coarse plan of ``coarse`` nodes (:func:`grow`, the same
    largest-first rule) whose target is shared out in proportion to the
    nodes' sizes (:func:`shares`), each estimated again with up to 1,024
    probes (:data:`COARSE_PROBES`, :func:`node_size`): the four probes a
    child gets in :func:`grow` are too few to decide how many tasks its
    whole subtree gets (on 5x5, 20,000 tasks in pieces of a 200-node coarse
    plan, the largest task had 970 times the mean nodes with them, 27 with
    1,024 probes, against 23 in one frontier; ``benchmarks/split.py``).  A
    node whose share exceeds ``limit`` is cut into pieces again.  The
    pieces partition ``root``'s subtree, their tasks add up to at least
    ``target_tasks``, and at most ``coarse`` nodes a level of division are
    held in memory.
    """
    if target_tasks <= max(coarse, 1) or not splittable(tables, root):
        yield root, target_tasks
        return
    frontier = [steps for steps, _ in grow(tables, coarse, probes, seed, root)]
    low, high = COARSE_PROBES
    many = min(high, max(low, 4 * target_tasks // len(frontier)))
    sizes = [node_size(tables, steps, many, seed) for steps in frontier]
    for steps, tasks in zip(frontier, shares(sizes, target_tasks)):
        if tasks > limit and steps != root:  # a dead end is its own frontier: nothing to divide
            yield from pieces(tables, tasks, probes, seed, steps, coarse=coarse, limit=limit)
        else:
            yield steps, tasks


def plan_piece(tables: Tables, root: Steps, target_tasks: int, probes: int = DEFAULT_PROBES,
               seed: int = 0) -> list[Steps]:
    """The tasks of one piece (:func:`pieces`): the frontier below ``root`` grown to ``target_tasks``, sorted."""
    return [steps for steps, _ in grow(tables, target_tasks, probes, seed, root)]


def plan_stream(tables: Tables, target_tasks: int, probes: int = DEFAULT_PROBES, seed: int = 0, *,
                coarse: int = COARSE, limit: int = PIECE_LIMIT) -> Iterator[Steps]:
    """Yield, in sorted order, at least ``min(target_tasks, possible)`` prefixes partitioning the tree, in pieces.

    The plan of a run: :func:`pieces` then :func:`plan_piece` for each, so
    memory stays bounded by ``coarse`` and ``limit`` whatever the target
    (a piece's tasks all sort after its root and before the next piece).
    A target of at most ``coarse`` gives exactly :func:`plan`'s tasks.
    Deterministic: depends only on the tables (shape, side order, tree),
    the target, ``probes``, ``seed``, ``coarse`` and ``limit``.
    """
    if target_tasks < 1:
        raise ValueError("target_tasks must be at least 1")
    for root, tasks in pieces(tables, target_tasks, probes, seed, coarse=coarse, limit=limit):
        yield from plan_piece(tables, root, tasks, probes, seed)


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

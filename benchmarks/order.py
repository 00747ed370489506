"""Which side order is fastest?  Times every distinct order of a few shapes, on a search tree.

Prints, per shape, nodes and seconds for each order and the ratio to the
default order (``foldfarm.shape.fast_order``), with the leaves that decide
the tree's conditions (:mod:`foldfarm.symmetry`; the order moves them).
Orders are timed alternately, best of ``--repeat`` runs, in one process.

    python benchmarks/order.py [--repeat 3] [--tree 2]
"""

from __future__ import annotations

import argparse
import itertools
import time

from foldfarm.kernel import count_below, tables_for
from foldfarm.shape import fast_order

SHAPES = [(5, 5), (3, 8), (2, 12), (4, 6), (4, 5), (3, 7), (5, 6), (3, 3, 3), (2, 3, 4), (2, 2, 5)]


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--tree", type=int, default=2)
    args = ap.parse_args()
    count_below(tables_for((2, 3)))  # compile / load the kernel
    for shape in SHAPES:
        orders = sorted(set(itertools.permutations(shape)))
        best = {o: float("inf") for o in orders}
        nodes = {}
        for _ in range(args.repeat):
            for o in orders:
                t = tables_for(o, args.tree)
                start = time.perf_counter()
                out = count_below(t)
                best[o] = min(best[o], time.perf_counter() - start)
                nodes[o] = out.nodes
        base = best[fast_order(shape)]
        print(f"{'x'.join(map(str, shape))}: default order {'x'.join(map(str, fast_order(shape)))}, tree {args.tree}")
        for o in sorted(orders, key=best.get):
            decided = ",".join(str(c) for _, _, c in tables_for(o, args.tree).reduction.conditions)
            print(f"  {'x'.join(map(str, o)):>10}  nodes {nodes[o]:>12,}  {best[o]:8.3f} s  ratio {best[o] / base:5.2f}"
                  f"  conditions decided at leaves {decided}")


if __name__ == "__main__":
    main()

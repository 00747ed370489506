"""Tree 2 against tree 1 where whole counts take too long: nodes per folding of 6x6, cost of 8x8.

For each map, on both search trees (:mod:`foldfarm.symmetry`), in one process:

* *slices* (6x6): the planner cuts the tree into ``--tasks`` subtrees; a
  seeded random sample of ``--slices`` of them is counted with a budget of
  ``--budget`` nodes each.  Nodes per folding = sum of the nodes over sum of
  the foldings counted in those slices (the two trees are sampled alike, but
  their slices are different subtrees).
* *whole tree* (6x6, 8x8): the stratified Knuth estimate of the tree's nodes
  (``foldfarm estimate``'s, same probes and seed on both trees), over the
  published count when there is one, else over the estimated count; with
  the kernel's rate on this machine, the projected core-years of a full
  count and their 95% interval.
* ``--full`` also counts 6x6 outright on both trees (minutes).

    python benchmarks/trees.py [--probes 5000000] [--seed 0] [--full]
"""

from __future__ import annotations

import argparse
import random
import time

from foldfarm import kernel
from foldfarm.estimate import HOURS_PER_YEAR, calibrate, cost, estimate
from foldfarm.plan import plan
from foldfarm.published import published


def slices(shape: str, tree: int, tasks: int, sample: int, budget: int, seed: int) -> tuple[int, int]:
    tables = kernel.prepare(shape, tree=tree)
    chosen = random.Random(seed).sample(list(plan(tables, tasks, seed=seed)), sample)
    nodes = folds = 0
    for task in chosen:
        out = kernel.count_below(tables, task, budget=budget)
        nodes += out.nodes
        folds += out.count
    return nodes, folds


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--probes", type=int, default=5_000_000)
    ap.add_argument("--seed", type=int, default=0)
    ap.add_argument("--tasks", type=int, default=2000)
    ap.add_argument("--slices", type=int, default=40)
    ap.add_argument("--budget", type=int, default=2_000_000)
    ap.add_argument("--full", action="store_true")
    args = ap.parse_args()
    kernel.warm()

    print(f"6x6 slices: {args.slices} random tasks of a {args.tasks}-task plan, {args.budget:,} nodes each")
    per = {}
    for tree in (1, 2):
        nodes, folds = slices("6x6", tree, args.tasks, args.slices, args.budget, args.seed)
        per[tree] = nodes / folds
        print(f"  tree {tree}: {nodes:,} nodes, {folds:,} foldings, {per[tree]:.5f} nodes/folding")
    print(f"  tree 2 visits {per[1] / per[2]:.2f}x fewer nodes per folding")

    for shape in ("6x6", "8x8"):
        truth = published(shape)
        print(f"{shape} whole tree: stratified estimate, {args.probes:,} probes, seed {args.seed}"
              + (f"; published {truth[0].count} ({truth[0].source})" if truth else ""))
        nodes, years = {}, {}
        for tree in (1, 2):
            tables = kernel.prepare(shape, tree=tree)
            est = estimate(tables, args.probes, args.seed)
            spend = cost(est, calibrate(tables, seed=args.seed), 1)
            nodes[tree], years[tree] = est.nodes, spend.core_years
            per = f", {est.nodes / truth[0].count:.5f} nodes per published folding" if truth else ""
            print(f"  tree {tree}: nodes {est.nodes:.4g} (95% {est.nodes_low:.4g} to {est.nodes_high:.4g}), "
                  f"count {est.count:.4g} (95% {est.low:.4g} to {est.high:.4g}){per}; "
                  f"{spend.nodes_per_second / 1e6:.1f} M nodes/s: {spend.core_years:.3g} core-years "
                  f"(95% {spend.core_hours_low / HOURS_PER_YEAR:.3g} to {spend.core_hours_high / HOURS_PER_YEAR:.3g})")
        print(f"  tree 2: {nodes[1] / nodes[2]:.2f}x fewer nodes for the same foldings, "
              f"{years[2] / years[1]:.2f} of tree 1's core-years")

    if args.full:
        for tree in (1, 2):
            started = time.perf_counter()
            out = kernel.count_below(kernel.prepare("6x6", tree=tree))
            print(f"6x6 counted on tree {tree}: {out.count} in {time.perf_counter() - started:.1f} s, "
                  f"{out.nodes:,} nodes, {out.nodes / out.count:.5f} nodes/folding")


if __name__ == "__main__":
    main()

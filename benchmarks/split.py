"""Cost of splitting: a plan of ~1,000 tasks against the unsplit count; planning speed, memory and task spread.

Counts 5x5 unsplit and as a plan of about 1,000 prefix tasks counted one
after another in this process, alternating, best of ``--repeat``; prints the
overhead of the split count (target <= 3%), with and without the time spent
planning.

Then the plan of a run (:func:`foldfarm.plan.plan_stream`, in pieces) against
one frontier grown to the target (:func:`foldfarm.plan.plan`, what runs were
planned with before): for 6x6 at 10^5 and 10^6 tasks (10^7 with ``--huge``)
the time and the peak memory of the planner (``tracemalloc``, the planner's
own Python objects; the tasks are counted as they stream, not kept); one
frontier is skipped past 10^6 (about 500 MB there).  And the spread of task
sizes, counting every task's search nodes, on 5x5 at 20,000 tasks in pieces
of a 1,000-node coarse plan (a run's ratio of target to coarse nodes at 80,000
tasks): the largest task, the 99th and 90th percentiles over the mean, and
the share of all nodes in the largest 1% of tasks (target: not much worse
than one frontier).

    python benchmarks/split.py [--repeat 3] [--skip-big] [--huge]
"""

from __future__ import annotations

import argparse
import time
import tracemalloc

import numpy as np

from foldfarm import kernel
from foldfarm.plan import plan, plan_stream


def peak(fn) -> tuple[int, float, float]:
    """(result, seconds, peak MiB of Python allocations) of ``fn()``."""
    tracemalloc.start()
    start = time.perf_counter()
    out = fn()
    seconds = time.perf_counter() - start
    top = tracemalloc.get_traced_memory()[1]
    tracemalloc.stop()
    return out, seconds, top / 2**20


def spread(tables, tasks) -> str:
    nodes = np.array([kernel.count_below(tables, t).nodes for t in tasks], float)
    mean = nodes.mean()
    top = np.sort(nodes)[-max(1, len(nodes) // 100):].sum() / nodes.sum()
    p99, p90 = (np.percentile(nodes, q) / mean for q in (99, 90))
    return (f"{len(tasks):>7,} tasks  largest {nodes.max() / mean:5.1f}x mean  p99 {p99:4.2f}x  p90 {p90:4.2f}x"
            f"  largest 1% hold {100 * top:4.1f}% of the nodes")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--tasks", type=int, default=1000)
    ap.add_argument("--skip-big", action="store_true", help="skip planning 10^6 tasks")
    ap.add_argument("--huge", action="store_true", help="also plan 10^7 tasks in pieces")
    args = ap.parse_args()
    kernel.warm()
    tables = kernel.prepare("5x5")
    whole_t, split_t, plan_t = [], [], []
    for _ in range(args.repeat):
        start = time.perf_counter()
        whole = kernel.count_below(tables).count
        whole_t.append(time.perf_counter() - start)

        start = time.perf_counter()
        tasks = list(plan(tables, args.tasks))
        planned = time.perf_counter()
        total = sum(kernel.count_below(tables, t).count for t in tasks)
        done = time.perf_counter()
        plan_t.append(planned - start)
        split_t.append(done - planned)
        assert total == whole, (total, whole)
    w, s, p = min(whole_t), min(split_t), min(plan_t)
    print(f"5x5 unsplit: {w:.3f} s   {len(tasks)} tasks: {s:.3f} s counting + {p:.3f} s planning")
    print(f"overhead counting only: {100 * (s / w - 1):+.1f}%   with planning: {100 * ((s + p) / w - 1):+.1f}%"
          "   (target <= 3%)")

    print("\ntask sizes on 5x5 (search nodes of every task, counted):")
    print(f"  one frontier   {spread(tables, list(plan(tables, 20_000)))}")
    print(f"  in pieces      {spread(tables, list(plan_stream(tables, 20_000, coarse=1000)))}")

    six = kernel.prepare("6x6")
    sizes = [10**5] if args.skip_big else [10**5, 10**6]
    if args.huge:
        sizes.append(10**7)
    print("\nplanning 6x6: seconds, peak MiB of the planner's Python objects")
    for k in sizes:
        _, secs, mib = peak(lambda: sum(1 for _ in plan_stream(six, k)))
        line = f"  {k:>10,} tasks  in pieces: {secs:6.1f} s {mib:7.1f} MiB"
        if k <= 10**6:
            _, secs, mib = peak(lambda: sum(1 for _ in plan(six, k)))
            line += f"   one frontier: {secs:6.1f} s {mib:7.1f} MiB"
        print(line)


if __name__ == "__main__":
    main()

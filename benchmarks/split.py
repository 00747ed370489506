"""Cost of splitting: a plan of ~1,000 tasks against the unsplit count, and planning speed.

Counts 5x5 unsplit and as a plan of about 1,000 prefix tasks counted one
after another in this process, alternating, best of ``--repeat``; prints the
overhead of the split count (target <= 3%), with and without the time spent
planning.  Then times planning 10^5 and 10^6 tasks for 6x6.

    python benchmarks/split.py [--repeat 3] [--skip-big]
"""

from __future__ import annotations

import argparse
import time

from foldfarm import kernel
from foldfarm.plan import plan


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--repeat", type=int, default=3)
    ap.add_argument("--tasks", type=int, default=1000)
    ap.add_argument("--skip-big", action="store_true", help="skip planning 10^6 tasks")
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
    six = kernel.prepare("6x6")
    for k in (10**5,) if args.skip_big else (10**5, 10**6):
        start = time.perf_counter()
        got = sum(1 for _ in plan(six, k))
        print(f"6x6: planned {got:,} tasks in {time.perf_counter() - start:.1f} s")


if __name__ == "__main__":
    main()

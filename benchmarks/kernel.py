"""Kernel speed against a plain C transcription of Lunnon's 1971 procedure, on both search trees.

Builds ``benchmarks/lunnon1971.c`` with plain ``gcc -O3`` at benchmark time,
then counts each shape in turn with foldfarm's kernel on tree 2 (the map's
own symmetries, the default), on tree 1 (leaf 1 on top and turning the stack
over only: the tree of runs made before tree 2) and with the C binary,
``--repeat`` times each, and prints the best times, the ratios foldfarm /
plain C, and the nodes per folding of each tree (``count --json``'s
``nodes / count``).  All search the sides in the same order (foldfarm's
default) and time only the search loop.  Times are CPU seconds of the
search (this thread's, the C process's): on a machine other processes share,
wall times swing by 20% between runs, CPU times by a few percent; the
ratio of best wall times is printed too.  Targets (tree 2 / plain C): 5x5
<= 0.15, 3x8 <= 0.20, 2x12 <= 0.30.

    python benchmarks/kernel.py [--repeat 5] [SHAPE ...]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

import plainc  # noqa: E402

from foldfarm import kernel  # noqa: E402
from foldfarm.shape import parse_shape  # noqa: E402

DEFAULT_SHAPES = ["5x5", "3x8", "2x12"]
TARGETS = {"5x5": 0.15, "3x8": 0.20, "2x12": 0.30}


def timed(tables) -> tuple[kernel.Outcome, float]:
    """A whole count and the CPU seconds it took (the compiled search runs in this thread)."""
    started = time.thread_time()
    out = kernel.count_below(tables)
    return out, time.thread_time() - started


def main() -> int:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("shapes", nargs="*", default=DEFAULT_SHAPES)
    ap.add_argument("--repeat", type=int, default=5)
    args = ap.parse_args()

    started = time.perf_counter()
    kernel.warm()
    print(f"kernel load (compile on first run, cache afterwards): {time.perf_counter() - started:.2f} s")
    with tempfile.TemporaryDirectory() as tmp:
        binary = plainc.build(tmp)
        print(f"{'shape':>6} {'tree 2 s':>9} {'tree 1 s':>9} {'plain C s':>10} {'ratio 2':>8} {'ratio 1':>8} "
              f"{'target':>7} {'wall 2':>7}  {'nodes/folding 2':>15} {'nodes/folding 1':>15} {'fewer':>6}  count")
        missed = []
        for text in args.shapes:
            shape = parse_shape(text)
            new, old = kernel.prepare(shape), kernel.prepare(shape, tree=1)
            two, one, theirs, wall_two, wall_theirs = [], [], [], [], []
            for _ in range(args.repeat):
                a, cpu_two = timed(new)
                b, cpu_one = timed(old)
                c_count, c_seconds, c_cpu = plainc.run_timed(binary, new.sides)
                two.append(cpu_two)
                one.append(cpu_one)
                theirs.append(c_cpu)
                wall_two.append(a.seconds)
                wall_theirs.append(c_seconds)
                if not c_count == a.count == b.count:
                    print(f"{text}: counts differ: tree 2 {a.count}, tree 1 {b.count}, plain C {c_count}")
                    return 1
            ratio = min(two) / min(theirs)
            target = TARGETS.get(shape.text)
            if target is not None and ratio > target:
                missed.append(shape.text)
            per_two, per_one = a.nodes / a.count, b.nodes / b.count
            print(f"{text:>6} {min(two):9.3f} {min(one):9.3f} {min(theirs):10.3f} {ratio:8.3f} "
                  f"{min(one) / min(theirs):8.3f} {target if target else '-':>7} "
                  f"{min(wall_two) / min(wall_theirs):7.3f}  {per_two:15.5f} {per_one:15.5f} "
                  f"{per_one / per_two:5.2f}x  {a.count}")
        print("every target met" if not missed else f"target missed on {', '.join(missed)}")
    return 0


if __name__ == "__main__":
    sys.exit(main())

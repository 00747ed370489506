"""Kernel speed against a plain C transcription of Lunnon's 1971 procedure.

Builds ``benchmarks/lunnon1971.c`` with plain ``gcc -O3`` at benchmark time,
then counts each shape alternately with foldfarm's kernel (in this process,
compiled kernel already loaded) and with the C binary, ``--repeat`` times
each, and prints the best times and the ratio foldfarm / plain C.  Both
search the sides in the same order (foldfarm's default), both time only the
search loop.  Target: ratio <= 0.5 on 5x5, 3x8 and 2x12.

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
        print(f"{'shape':>6} {'foldfarm s':>11} {'plain C s':>10} {'ratio':>6}  count")
        worst = 0.0
        for text in args.shapes:
            tables = kernel.prepare(parse_shape(text))
            ours, theirs = [], []
            for _ in range(args.repeat):
                out = kernel.count_below(tables)
                ours.append(out.seconds)
                c_count, c_seconds = plainc.run(binary, tables.sides)
                theirs.append(c_seconds)
                if c_count != out.count:
                    print(f"{text}: counts differ: foldfarm {out.count}, plain C {c_count}")
                    return 1
            ratio = min(ours) / min(theirs)
            worst = max(worst, ratio)
            print(f"{text:>6} {min(ours):11.3f} {min(theirs):10.3f} {ratio:6.2f}  {out.count}")
        print(f"worst ratio {worst:.2f} (target <= 0.50)")
    return 0


if __name__ == "__main__":
    sys.exit(main())

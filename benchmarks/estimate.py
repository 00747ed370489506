"""Knuth-probe estimates: speed, accuracy against published counts, plain versus stratified.

Prints three tables:

1. probes per second on one core (plain probes from the root), per shape;
2. the default estimate (seed 0) of maps with a published count (OEIS, named):
   time, estimate, 95% interval, error, whether the interval holds the count;
3. plain probes from the root against the stratified estimator, same probes,
   over ``--seeds`` seeds: mean time, RMS relative error, the error at equal
   time (RMS x sqrt(seconds), lower is better), the interval's coverage, and
   the ratio plain / stratified of the error at equal time.

    python benchmarks/estimate.py [--seeds 20] [--skip-big]
"""

from __future__ import annotations

import argparse
import math
import time

from foldfarm import kernel
from foldfarm.estimate import DEFAULT_PROBES, estimate
from foldfarm.published import published

SPEED = ["5x5", "3x8", "1x20", "6x6", "7x7", "8x8"]
ACCURACY = ["5x5", "3x8", "2x12", "1x20", "2x16", "3x12", "6x6", "1x28", "7x7"]
COMPARE = [("5x5", 200_000), ("3x8", 200_000), ("1x20", 200_000), ("6x6", 1_000_000), ("7x7", DEFAULT_PROBES)]


def truth(shape: str) -> tuple[int, str]:
    value = published(shape)[0]
    return value.count, value.source


def speed() -> None:
    print("1. probes per second, one core (plain probes from the root)")
    for shape in SPEED:
        tables = kernel.prepare(shape)
        kernel.probe(tables, (), 10, 0)
        probes = 200_000
        start = time.perf_counter()
        kernel.probe(tables, (), probes, 1)
        seconds = time.perf_counter() - start
        rate = probes / seconds
        print(f"  {shape:>5}  {rate:12,.0f} probes/s  ({60 * rate / 1e6:5.1f} million a minute)")


def accuracy(shapes: list[str]) -> None:
    print(f"\n2. default estimate ({DEFAULT_PROBES:,} probes, seed 0) against published counts")
    print(f"  {'shape':>5} {'seconds':>8} {'estimate':>12} {'95% interval':>27} {'error':>8}  holds  source")
    for shape in shapes:
        count, source = truth(shape)
        est = estimate(kernel.prepare(shape))
        holds = "yes" if est.low <= count <= est.high else "NO"
        print(f"  {shape:>5} {est.seconds:8.2f} {est.count:12.5g} [{est.low:11.5g}, {est.high:11.5g}] "
              f"{est.count / count - 1:+8.2%}  {holds:>5}  {source}: {count}")


def compare(cases: list[tuple[str, int]], seeds: int) -> None:
    print(f"\n3. plain probes vs stratified, same probes, {seeds} seeds (error at equal time = RMS x sqrt(s))")
    print(f"  {'shape':>5} {'probes':>10} {'method':>10} {'seconds':>8} {'RMS error':>10} {'at equal time':>14} "
          f"{'coverage':>9}")
    for shape, probes in cases:
        count, _ = truth(shape)
        tables = kernel.prepare(shape)
        equal_time = {}
        for name, strata in (("plain", 1), ("stratified", None)):
            errors, seconds, held = [], 0.0, 0
            for seed in range(seeds):
                est = estimate(tables, probes, seed, strata=strata)
                errors.append(est.count / count - 1)
                seconds += est.seconds
                held += est.low <= count <= est.high
            rms = math.sqrt(sum(e * e for e in errors) / seeds)
            equal_time[name] = rms * math.sqrt(seconds / seeds)
            print(f"  {shape:>5} {probes:>10,} {name:>10} {seconds / seeds:8.2f} {rms:10.2%} "
                  f"{equal_time[name]:14.5f} {held / seeds:9.0%}")
        print(f"  {'':>5} {'':>10} {'ratio':>10} plain / stratified at equal time: "
              f"{equal_time['plain'] / equal_time['stratified']:.2f}  (variance: "
              f"{(equal_time['plain'] / equal_time['stratified']) ** 2:.1f}x)")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--seeds", type=int, default=20)
    ap.add_argument("--skip-big", action="store_true", help="leave out 7x7 (about 12 s an estimate)")
    args = ap.parse_args()
    kernel.warm()
    estimate(kernel.prepare("3x5"), probes=1000)  # compile or load the estimator
    speed()
    accuracy([s for s in ACCURACY if not (args.skip_big and s == "7x7")])
    compare([c for c in COMPARE if not (args.skip_big and c[0] == "7x7")], args.seeds)


if __name__ == "__main__":
    main()

"""A run on a local Dask cluster against a one-core count of the same map, and coordinator throughput.

1. Wall time of ``foldfarm run SHAPE --workers 2`` (cluster start-up,
   planning, store, checks and shutdown included) against ``foldfarm count
   SHAPE``, both as fresh processes, in the order count, run, count, run,
   ..., count.  Target on a 2-core machine: run / count <= 0.6, reported
   as the best run over the best count, and as the median over the runs
   of each run against the mean of the two counts around it (these
   machines drift by 10% and more within minutes; the neighbours share
   the drift).  Two reference lines say what the machine allows: two
   ``count`` processes at once (what two cores give two kernels: the
   floor of the ratio is half their time over one count's), and the run's
   own split between its drive loop and everything around it (start-up,
   planning, shutdown).
2. Coordinator throughput with near-empty tasks: 5x5 planned as
   ``--tiny`` tasks (about 0.1 ms of counting each) through Dask and a
   SQLite store.  Target: >= 300 tasks/s.

    python benchmarks/cluster.py [--shape 3x10] [--repeat 4] [--tiny 5000]

The default shape, 3x10, takes 22 to 27 s on one core of the development
machine (it varies that much from hour to hour; the ratio is what counts).
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def command(args: list[str]) -> list[str]:
    return [sys.executable, "-m", "foldfarm", *args, "--json"]


def timed(args: list[str]) -> tuple[float, dict]:
    start = time.perf_counter()
    out = subprocess.run(command(args), capture_output=True, text=True, check=True)
    return time.perf_counter() - start, json.loads(out.stdout)


def two_counts(shape: str) -> float:
    """Wall time of two one-core counts of ``shape`` started together (the slower one)."""
    start = time.perf_counter()
    procs = [subprocess.Popen(command(["count", shape]), stdout=subprocess.DEVNULL) for _ in range(2)]
    for p in procs:
        if p.wait() != 0:
            raise SystemExit(f"foldfarm count {shape} failed")
    return time.perf_counter() - start


def throughput(tiny: int, folder: Path) -> None:
    from foldfarm import run as runner
    from foldfarm.store import Store

    store = Store(f"sqlite:///{folder / 'tiny.sqlite'}")
    client, cluster = runner.connect(None, 2)
    try:
        run = runner.create(store, "5x5", runner.Settings(tasks=tiny, audit=0.0), 2)
        start = time.perf_counter()
        summary = runner.drive(store, client, run)
        seconds = time.perf_counter() - start
    finally:
        runner.disconnect(client, cluster)
        store.close()
    print(f"near-empty tasks: {summary.tasks:,} tasks in {seconds:.2f} s = {summary.tasks / seconds:,.0f} tasks/s "
          f"(target >= 300), count {summary.count}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--shape", default="3x10")
    ap.add_argument("--repeat", type=int, default=4)
    ap.add_argument("--tiny", type=int, default=5000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        counts = [timed(["count", args.shape])[0]]
        runs, drives, ratios = [], [], []
        for i in range(args.repeat):
            t, r = timed(["run", args.shape, "--workers", "2", "--quiet", "--store",
                          f"sqlite:///{folder / f'run{i}.sqlite'}"])
            runs.append(t)
            drives.append(r["seconds"])
            t, c = timed(["count", args.shape])
            counts.append(t)
            assert r["count"] == c["count"], (r, c)
            ratios.append(runs[-1] / ((counts[-2] + counts[-1]) / 2))
            print(f"  run {i + 1}: {runs[-1]:.2f} s (drive loop {r['seconds']:.2f} s, {r['core_seconds']:.1f} core-s "
                  f"in tasks) between counts of {counts[-2]:.2f} and {counts[-1]:.2f} s: ratio {ratios[-1]:.3f}",
                  flush=True)
        both = two_counts(args.shape)
        best = min(range(args.repeat), key=runs.__getitem__)
        print(f"{args.shape}: count {min(counts):.2f} s, run on 2 workers {min(runs):.2f} s, "
              f"ratio {min(runs) / min(counts):.3f} (target <= 0.6); "
              f"median against the neighbouring counts {statistics.median(ratios):.3f}")
        print(f"  two counts at once: {both:.2f} s, so two cores give at best {both / 2 / min(counts):.3f}; "
              f"the best run spent {runs[best] - drives[best]:.2f} s outside its drive loop "
              "(start-up, planning, shutdown)")
        throughput(args.tiny, folder)


if __name__ == "__main__":
    main()

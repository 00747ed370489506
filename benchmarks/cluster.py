"""A run on a local Dask cluster against a one-core count of the same map, and coordinator throughput.

1. Wall time of ``foldfarm run SHAPE --workers 2`` (cluster start-up,
   planning, store and checks included) against ``foldfarm count SHAPE``,
   both as fresh processes, alternating, best of ``--repeat``.  Target on
   a 2-core machine: run / count <= 0.6.
2. Coordinator throughput with near-empty tasks: 5x5 planned as
   ``--tiny`` tasks (about 0.1 ms of counting each) through Dask and a
   SQLite store.  Target: >= 300 tasks/s.

    python benchmarks/cluster.py [--shape 2x15] [--repeat 2] [--tiny 5000]
"""

from __future__ import annotations

import argparse
import json
import subprocess
import sys
import tempfile
import time
from pathlib import Path


def timed(args: list[str]) -> tuple[float, dict]:
    start = time.perf_counter()
    out = subprocess.run([sys.executable, "-m", "foldfarm", *args, "--json"], capture_output=True, text=True,
                         check=True)
    return time.perf_counter() - start, json.loads(out.stdout)


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
        client.close()
        cluster.close()
        store.close()
    print(f"near-empty tasks: {summary.tasks:,} tasks in {seconds:.2f} s = {summary.tasks / seconds:,.0f} tasks/s "
          f"(target >= 300), count {summary.count}")


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--shape", default="2x15")
    ap.add_argument("--repeat", type=int, default=2)
    ap.add_argument("--tiny", type=int, default=5000)
    args = ap.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        runs, counts = [], []
        for i in range(args.repeat):
            t, c = timed(["count", args.shape])
            counts.append(t)
            t, r = timed(["run", args.shape, "--workers", "2", "--quiet", "--store",
                          f"sqlite:///{folder / f'run{i}.sqlite'}"])
            runs.append(t)
            assert r["count"] == c["count"], (r, c)
        print(f"{args.shape}: count {min(counts):.1f} s (kernel {c['seconds']:.1f} s), "
              f"run on 2 workers {min(runs):.1f} s, ratio {min(runs) / min(counts):.2f} (target <= 0.6)")
        throughput(args.tiny, folder)


if __name__ == "__main__":
    main()

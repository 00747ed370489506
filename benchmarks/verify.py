"""Memory and time of the checks' pass over a run's tasks, streamed in tree order, at growing sizes.

For each size N (default 10^5 and 10^6) plans N tasks of a map (default
5x5), writes them as done tasks into a scratch SQLite file with a
``sort_key`` column and its index (what the store's ``ORDER BY sort_key``
will stream), then, in a fresh process per size and implementation, reads
them back in key order into the checks and prints peak memory (the
process's high-water mark, VmHWM; and above its size after its imports)
and microseconds per task:

* ``streamed``: :func:`foldfarm.check.scan_tasks` and the completeness check;
* ``lists`` (``--lists``): the list-based checks before streaming
  (``tests/reference_check.py``), for comparison.

Counts are 0 (a multiple of every factor): the pass's work and memory do not
depend on them, and the plan's tasks cover the tree, so every check passes.
Target: flat memory (within 1.5x from 10^5 to 10^7 tasks, at most 1 GiB) and
time per task that does not rise.

    python benchmarks/verify.py [--shape 5x5] [--sizes 100000,1000000] [--lists] [--dir /tmp]
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import time

from sqlalchemy import Column, Integer, MetaData, String, Table, create_engine, insert, select

HERE = os.path.dirname(os.path.abspath(__file__))
METADATA = MetaData()
ROWS = Table("rows", METADATA, Column("id", Integer, primary_key=True), Column("prefix", String, nullable=False),
             Column("state", String, nullable=False), Column("count", Integer), Column("parent_id", Integer),
             Column("worker", String), Column("sort_key", String, nullable=False, index=True))


def build(path: str, shape: str, size: int) -> int:
    """Plan ``size`` tasks of ``shape`` into a scratch file at ``path``; return how many tasks."""
    from foldfarm.kernel import prepare
    from foldfarm.plan import plan
    from foldfarm.prefix import prefix_text, sort_key

    engine = create_engine(f"sqlite:///{path}")
    METADATA.create_all(engine)
    batch, n = [], 0
    with engine.begin() as conn:
        for steps in plan(prepare(shape), size):
            n += 1
            batch.append({"id": n, "prefix": prefix_text(steps), "state": "done", "count": 0, "parent_id": None,
                          "worker": "tcp://127.0.0.1:9", "sort_key": sort_key(steps)})
            if len(batch) == 10_000:
                conn.execute(insert(ROWS), batch)
                batch = []
        if batch:
            conn.execute(insert(ROWS), batch)
    engine.dispose()
    return n


def high_water() -> int:
    """This process's peak resident memory in KiB (ru_maxrss would include what its parent held before exec)."""
    with open("/proc/self/status") as status:
        return next(int(line.split()[1]) for line in status if line.startswith("VmHWM:"))


def measure(path: str, shape: str, how: str) -> dict:
    """In this process: stream the rows in key order through the checks; peak memory and time."""
    from foldfarm import check
    from foldfarm.kernel import prepare
    from foldfarm.store import CheckRow

    tables = prepare(shape)
    kids = check.TreeChildren(tables.sides, tables.tree)
    kids([()])  # the kernel's children compiled before the baseline
    engine = create_engine(f"sqlite:///{path}")
    columns = [ROWS.c[name] for name in CheckRow.__dataclass_fields__]
    stmt = select(*columns).order_by(ROWS.c.sort_key)
    factor = check.symmetry_factor(tables.sides, tables.tree)
    base = high_water()
    start = time.perf_counter()
    with engine.connect() as conn:
        rows = (CheckRow(*r) for r in conn.execution_options(yield_per=10_000).execute(stmt))
        if how == "streamed":
            scan = check.scan_tasks(rows, factor, kids, tables.n, digest=check.Certificate(shape, tables.tree))
            ok = check.completeness_check(scan)["ok"]
            scan.digest.digest()
        else:
            sys.path.insert(0, os.path.join(HERE, "..", "tests"))
            import reference_check as reference

            scan = reference.scan_tasks(rows, factor)
            ok = reference.completeness_check(scan, kids, tables.n)["ok"]
            reference.certificate(shape, scan.entries, tables.tree)
    seconds = time.perf_counter() - start
    peak = high_water()
    tasks = sum(scan.states.values())
    return {"tasks": tasks, "ok": ok, "seconds": seconds, "base_mib": base / 1024, "peak_mib": peak / 1024,
            "pass_mib": (peak - base) / 1024}


def main() -> None:
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--shape", default="5x5")
    ap.add_argument("--sizes", default="100000,1000000")
    ap.add_argument("--lists", action="store_true", help="also measure the list-based checks before streaming")
    ap.add_argument("--dir", default=None, help="where the scratch files go (default: a temporary directory)")
    ap.add_argument("--measure", nargs=3, metavar=("PATH", "SHAPE", "HOW"), help=argparse.SUPPRESS)
    args = ap.parse_args()
    if args.measure:
        print(json.dumps(measure(*args.measure)))
        return
    hows = ["streamed"] + (["lists"] if args.lists else [])
    print(f"{'tasks':>10} {'implementation':>14} {'peak MiB':>9} {'pass MiB':>9} {'us/task':>8}  ok")
    first: dict[str, float] = {}
    with tempfile.TemporaryDirectory(dir=args.dir) as scratch:
        for size in (int(s) for s in args.sizes.split(",")):
            path = os.path.join(scratch, f"rows-{size}.sqlite")
            build(path, args.shape, size)
            for how in hows:
                out = subprocess.run([sys.executable, __file__, "--measure", path, args.shape, how],
                                     capture_output=True, text=True, check=True)
                m = json.loads(out.stdout)
                first.setdefault(how, m["peak_mib"])
                print(f"{m['tasks']:>10,} {how:>14} {m['peak_mib']:>9.0f} {m['pass_mib']:>9.0f} "
                      f"{1e6 * m['seconds'] / m['tasks']:>8.1f}  {m['ok']}   peak {m['peak_mib'] / first[how]:.2f}x "
                      "the first size", flush=True)
            os.unlink(path)


if __name__ == "__main__":
    main()

"""Store throughput: finished tasks recorded through the store API, SQLite vs PostgreSQL.

    python3 benchmarks/store.py [--tasks 100000] [--single 5000]

For each back end: plan ``--tasks`` pending tasks (one add_tasks call), then
drive them all to done the way a coordinator does (next_pending ->
mark_running -> record_done_many, 1,000 per batch), then record ``--single``
more one transaction per result (record_done), then 2,000 splits with two
children each.  Prints tasks per second and each rate as a ratio of SQLite's.

SQLite uses a file in a temporary folder.  PostgreSQL uses
FOLDFARM_BENCH_POSTGRES_URL (default: the local test server) in a fresh
schema that is dropped afterwards; it is skipped if the server is unreachable.
"""

from __future__ import annotations

import argparse
import os
import tempfile
import time
import uuid
from collections.abc import Callable

from sqlalchemy import create_engine
from sqlalchemy.engine import make_url
from sqlalchemy.schema import CreateSchema, DropSchema

from foldfarm.store import Store, StoreError, TaskResult, redact, resolve_store_url

DEFAULT_PG = "postgresql+psycopg://postgres@127.0.0.1:5432/test"
BATCH = 1_000
SPLITS = 2_000


def prefixes(n: int, top: int):
    """n distinct, disjoint depth-3 prefixes below first step ``top`` (not a real map's tree)."""
    return (f"/{top}/{i // 1000 + 1}/{i % 1000 + 1}" for i in range(n))


def timed(fn: Callable[[], int]) -> tuple[int, float]:
    start = time.perf_counter()
    n = fn()
    return n, time.perf_counter() - start


def drive_batched(store: Store, run: int) -> int:
    done = 0
    while batch := store.next_pending(run, BATCH):
        ids = [t.id for t in batch]
        store.mark_running(ids, "tcp://127.0.0.1:9000")
        results = [TaskResult(t, 1000 + t % 97, 50_000, 0.25, "tcp://127.0.0.1:9000") for t in ids]
        report = store.record_done_many(results, batch_size=BATCH)
        assert report.new == len(ids) and not report.conflicts
        done += len(ids)
    return done


def drive_single(store: Store, run: int) -> int:
    batch = store.next_pending(run, 10**9)
    store.mark_running([t.id for t in batch])
    for t in batch:
        store.record_done(t.id, 7, 100, 0.01)
    return len(batch)


def drive_splits(store: Store, run: int) -> int:
    batch = store.next_pending(run, SPLITS)
    store.mark_running([t.id for t in batch])
    for t in batch:
        store.record_split(t.id, 3, 100, 0.01, None, [t.prefix + "/1", t.prefix + "/2"])
    return len(batch)


def measure(url: str, tasks: int, single: int) -> dict[str, float]:
    """Rates (per second) of each phase on the store at ``url``."""
    rates = {}
    with Store(url) as store:
        run = store.create_run("4x5", "5x4", {"task_budget": 1_000_000})
        store.set_run_state(run, "running")
        n, secs = timed(lambda: store.add_tasks(run, prefixes(tasks, 1)))
        rates["plan (add_tasks)"] = n / secs
        n, secs = timed(lambda: drive_batched(store, run))
        assert n == tasks
        rates[f"done, batched x{BATCH}"] = n / secs
        assert store.progress(run).tasks["done"] == tasks

        single_run = store.create_run("4x5", "5x4", {})
        store.add_tasks(single_run, prefixes(single, 2))
        n, secs = timed(lambda: drive_single(store, single_run))
        rates["done, one per transaction"] = n / secs

        split_run = store.create_run("4x5", "5x4", {})
        store.add_tasks(split_run, prefixes(SPLITS, 3))
        n, secs = timed(lambda: drive_splits(store, split_run))
        rates["split (+2 children)"] = n / secs
    return rates


def postgres_schema_url(base: str):
    """(url in a fresh schema, drop function), or (None, reason) when unreachable."""
    try:
        admin = create_engine(resolve_store_url(base), connect_args={"connect_timeout": 3})
        schema = f"foldfarm_bench_{uuid.uuid4().hex[:10]}"
        with admin.begin() as conn:
            conn.execute(CreateSchema(schema))
    except Exception as exc:  # any failure here just means "no PostgreSQL to measure"
        return None, f"{redact(base)} unreachable ({type(exc).__name__})"
    url = make_url(resolve_store_url(base)).update_query_dict({"options": f"-csearch_path={schema}"})

    def drop() -> None:
        with admin.begin() as conn:
            conn.execute(DropSchema(schema, cascade=True))
        admin.dispose()

    return url.render_as_string(hide_password=False), drop


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tasks", type=int, default=100_000, help="tasks driven to done in batches")
    parser.add_argument("--single", type=int, default=5_000, help="tasks recorded one per transaction")
    args = parser.parse_args()

    results: dict[str, dict[str, float]] = {}
    with tempfile.TemporaryDirectory() as folder:
        results["sqlite"] = measure(f"sqlite:///{folder}/bench.sqlite", args.tasks, args.single)

    pg_url, drop_or_reason = postgres_schema_url(os.environ.get("FOLDFARM_BENCH_POSTGRES_URL", DEFAULT_PG))
    if pg_url is None:
        print(f"postgresql: skipped, {drop_or_reason}")
    else:
        try:
            results["postgresql"] = measure(pg_url, args.tasks, args.single)
        except StoreError as exc:
            print(f"postgresql: skipped, {exc}")
        finally:
            drop_or_reason()

    print(f"\n{args.tasks:,} tasks batched, {args.single:,} one by one, {SPLITS:,} splits")
    backends = list(results)
    header = f"{'phase':28}" + "".join(f"{b + ' tasks/s':>20}" for b in backends)
    header += "".join(f"{b + '/sqlite':>20}" for b in backends[1:])
    print(header)
    for phase in results["sqlite"]:
        line = f"{phase:28}" + "".join(f"{results[b][phase]:>20,.0f}" for b in backends)
        line += "".join(f"{results[b][phase] / results['sqlite'][phase]:>20.2f}" for b in backends[1:])
        print(line)


if __name__ == "__main__":
    main()

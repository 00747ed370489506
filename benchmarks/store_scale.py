"""The store at the size of a real job: planning a million tasks, reading status, streaming, concurrent inserts.

    python3 benchmarks/store_scale.py [--tasks 1000000] [--done 0.5] [--backend sqlite,postgresql]

For each back end: one ``add_tasks`` of ``--tasks`` pending tasks (a
generator, one transaction); ``--done`` of them driven to done the way the
coordinator does (next_pending -> mark_running -> record_done_many, 1,000 a
batch), then the readers: ``status`` (list_runs), ``status RUN`` (progress,
audit summary), ``tasks RUN --sort count|time|finished --limit 20``, and the
stream of ``check_rows`` in tree order (rows per second, the process's peak
memory before and after).  On PostgreSQL also two transactions inserting
tasks of two runs at once: how long the second waits while the first is
still open (version 1 took every task id from one counter row, so the
second waited for the first to commit).

SQLite uses a file in a temporary folder; PostgreSQL uses
FOLDFARM_BENCH_POSTGRES_URL (default: the local test server) in a fresh
schema that is dropped afterwards.
"""

from __future__ import annotations

import argparse
import os
import resource
import tempfile
import threading
import time

from store import DEFAULT_PG, postgres_schema_url, prefixes

from foldfarm.store import Store, TaskResult

BATCH = 1_000


def peak_mib() -> float:
    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024


def best(fn, repeat: int = 3) -> float:
    """Best wall time of ``fn()`` in seconds."""
    times = []
    for _ in range(repeat):
        start = time.perf_counter()
        fn()
        times.append(time.perf_counter() - start)
    return min(times)


def drive(store: Store, run: int, n: int) -> None:
    done = 0
    while done < n and (batch := store.next_pending(run, min(BATCH, n - done))):
        ids = [t.id for t in batch]
        store.mark_running(ids, "tcp://127.0.0.1:9000")
        store.record_done_many([TaskResult(t, 48 * (1 + t % 97), 50_000, 0.25, "tcp://127.0.0.1:9000") for t in ids])
        done += len(ids)


def measure(url: str, tasks: int, done: float) -> dict[str, str]:
    out: dict[str, str] = {}
    with Store(url) as store:
        run = store.create_run("6x6", "6x6", {})
        store.set_run_state(run, "running")
        start = time.perf_counter()
        store.add_tasks(run, prefixes(tasks, 1))
        secs = time.perf_counter() - start
        out["add_tasks"] = f"{tasks / secs:,.0f} tasks/s ({secs:.1f} s)"
        n = int(tasks * done)
        start = time.perf_counter()
        drive(store, run, n)
        secs = time.perf_counter() - start
        out["claim + record done"] = f"{n / secs:,.0f} tasks/s ({secs:.1f} s)" if n else "-"
        out["status (list_runs)"] = f"{best(store.list_runs) * 1000:.1f} ms"
        out["status RUN (progress, audits)"] = (
            f"{best(lambda: (store.progress(run), store.audit_summary(run), store.lease(run))) * 1000:.1f} ms")
        for order in ("count", "time", "finished", "id"):
            out[f"tasks --sort {order} --limit 20"] = f"{best(lambda: store.tasks(run, (), order, 20)) * 1000:.1f} ms"
        out["next_pending(1000)"] = f"{best(lambda: store.next_pending(run, 1000)) * 1000:.1f} ms"
        before = peak_mib()
        start = time.perf_counter()
        rows = sum(1 for _ in store.check_rows(run))
        secs = time.perf_counter() - start
        out["check_rows stream (tree order)"] = (f"{rows / secs:,.0f} rows/s ({secs:.1f} s); "
                                                 f"peak memory {before:.0f} -> {peak_mib():.0f} MiB")
        start = time.perf_counter()
        rows = sum(1 for _ in store.iter_tasks(run))
        secs = time.perf_counter() - start
        out["iter_tasks stream (id order)"] = f"{rows / secs:,.0f} rows/s; peak memory {peak_mib():.0f} MiB"
    return out


def concurrent_inserts(url: str) -> str:
    """Seconds the second of two overlapping inserting transactions (two runs) waits for the first."""
    with Store(url) as store:
        a = store.create_run("3x4", "4x3", {})
        b = store.create_run("3x4", "4x3", {})
        opened = threading.Event()
        finish = threading.Event()

        def slow_plan():
            def slowly():
                yield from prefixes(1000, 1)
                opened.set()  # the first chunk is written, the transaction is open
                finish.wait(10)
                yield "/2/1/1"

            store.add_tasks(a, slowly(), chunk_size=1000)

        thread = threading.Thread(target=slow_plan)
        thread.start()
        opened.wait(10)
        time.sleep(0.2)
        start = time.perf_counter()
        store.add_tasks(b, prefixes(1000, 1))
        waited = time.perf_counter() - start
        finish.set()
        thread.join()
        return f"second insert took {waited * 1000:.0f} ms while the first stayed open (it would wait for the commit)"


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--tasks", type=int, default=1_000_000)
    parser.add_argument("--done", type=float, default=0.5, help="fraction of the tasks driven to done")
    parser.add_argument("--backend", default="sqlite,postgresql")
    args = parser.parse_args()
    results: dict[str, dict[str, str]] = {}
    backends = args.backend.split(",")
    if "sqlite" in backends:
        with tempfile.TemporaryDirectory() as folder:
            results["sqlite"] = measure(f"sqlite:///{folder}/bench.sqlite", args.tasks, args.done)
    if "postgresql" in backends:
        url, drop = postgres_schema_url(os.environ.get("FOLDFARM_BENCH_POSTGRES_URL", DEFAULT_PG))
        if url is None:
            print(f"postgresql: skipped, {drop}")
        else:
            try:
                results["postgresql"] = measure(url, args.tasks, args.done)
                results["postgresql"]["two runs inserting at once"] = concurrent_inserts(url)
            finally:
                drop()
    for backend, rows in results.items():
        print(f"\n{backend}: {args.tasks:,} tasks, {args.done:.0%} done")
        for name, value in rows.items():
            print(f"  {name:34} {value}")


if __name__ == "__main__":
    main()

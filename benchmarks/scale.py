"""A run the size of the real job: time and peak memory of each phase at 10^5 to 10^7 tasks.

    python3 benchmarks/scale.py [--sizes 1e5,1e6,1e7] [--backends sqlite,postgresql]
                                [--shape 3x10] [--count-up-to 1e6] [--plan-shape 8x8] [--workers 2]
                                [--skip verify,export]

For each back end and size, every phase is one ``python3 -m foldfarm ...``
command, as a researcher types it:

``plan``    ``run SHAPE --tasks N --plan-only``: the plan, made on the workers and stored;
``run``     ``resume RUN``: count every task, store the total, run the checks (sizes up to
            ``--count-up-to``; ``--shape``, 3x10 by default, whose published count it must match:
            OEIS A001416; about 3x10^8 search nodes, so at 10^6 tasks the run is bookkeeping,
            like 4x7, for which we carry no published count);
``verify``  ``verify RUN`` (audit on the workers) for a counted run; for a larger plan, which
            is ``--plan-shape`` (8x8) planned and never counted, ``verify RUN --audit 0``,
            whose completeness check still says whether the stored tasks cover the tree
            without overlap (only the pending tasks are reported);
``status``  ``status RUN``;  ``tasks``  ``tasks RUN --limit 20 --sort count``;
``export``  ``export RUN --format csv --output FILE``.

Each phase's peak resident memory is that of every process of its command
(the coordinator, the scheduler, the fork server, the Dask workers), read
from ``/proc`` through psutil every 0.1 s: the largest single process and the
largest sum at one moment.  The table ends with how each phase grows from
the smallest size to the largest: time per task and peak memory, as ratios
(targets: memory flat within 1.5x, time per task not rising; the 10^6 run
under 6 minutes and 1 GiB a process; status under 1 s, tasks under 2 s).

SQLite uses a file in a temporary folder; PostgreSQL uses
FOLDFARM_BENCH_POSTGRES_URL (default: the local test server) in a fresh
schema per measurement, dropped afterwards, as the tests do.  On a shared
2-core machine the times are noisy: run it on a quiet one.
"""

from __future__ import annotations

import argparse
import json
import os
import subprocess
import sys
import tempfile
import threading
import time
from dataclasses import dataclass

import psutil

sys.path.insert(0, os.path.dirname(os.path.abspath(__file__)))

from store import DEFAULT_PG, postgres_schema_url  # noqa: E402  (benchmarks/store.py)

from foldfarm.published import published  # noqa: E402

GiB = 2**30


@dataclass
class Phase:
    """One command's wall time (s), peak RSS of its largest process and of all of them at once (bytes)."""

    seconds: float
    largest: int
    together: int
    ok: bool
    note: str = ""


class PeakMemory:
    """Polls the resident memory of a process and all its descendants until stopped."""

    def __init__(self, pid: int, every: float = 0.1):
        self.root = psutil.Process(pid)
        self.every = every
        self.largest = self.together = 0
        self._halt = threading.Event()
        self._thread = threading.Thread(target=self._poll, daemon=True)
        self._thread.start()

    def _poll(self) -> None:
        while not self._halt.is_set():
            try:
                procs = [self.root, *self.root.children(recursive=True)]
            except psutil.Error:
                procs = []
            total = 0
            for proc in procs:
                try:
                    rss = proc.memory_info().rss
                except psutil.Error:
                    continue
                total += rss
                self.largest = max(self.largest, rss)
            self.together = max(self.together, total)
            self._halt.wait(self.every)

    def stop(self) -> None:
        self._halt.set()
        self._thread.join()


def foldfarm(args: list[str], env: dict) -> tuple[Phase, str]:
    """Run ``python3 -m foldfarm ARGS``; its phase measurement and standard output."""
    start = time.perf_counter()
    proc = subprocess.Popen([sys.executable, "-m", "foldfarm", *args], stdout=subprocess.PIPE,
                            stderr=subprocess.PIPE, text=True, env=env)
    peak = PeakMemory(proc.pid)
    out, err = proc.communicate()
    peak.stop()
    seconds = time.perf_counter() - start
    note = "" if proc.returncode == 0 else (err.strip().splitlines() or ["?"])[-1][:120]
    return Phase(seconds, peak.largest, peak.together, proc.returncode == 0, note), out


def measure(url: str, size: int, args, env: dict, folder: str) -> dict[str, Phase]:
    """Every phase of one size on the store at ``url``."""
    counted = size <= args.count_up_to
    shape = args.shape if counted else args.plan_shape
    store = ["--store", url]
    workers = ["--workers", str(args.workers)]
    phases: dict[str, Phase] = {}
    phases["plan"], out = foldfarm(["run", shape, "--tasks", str(size), "--plan-only", "--json", *workers, *store],
                                   env)
    if not phases["plan"].ok:
        return phases
    planned = json.loads(out)
    run = str(planned["run"])
    phases["plan"].note = f"{planned['tasks']:,} tasks"
    if counted:
        phases["run"], out = foldfarm(["resume", run, "--json", *workers, *store], env)
        if phases["run"].ok:
            summary = json.loads(out)
            expected = published(shape)
            exact = bool(expected) and summary["count"] == expected[0].count
            verdict = "passed" if summary.get("passed") else "FAILED"
            phases["run"].note = (f"{summary['count']} ({'= ' + expected[0].source if exact else 'NOT published'}), "
                                  f"{summary['tasks']:,} tasks, checks {verdict}")
            phases["run"].ok = exact and bool(summary.get("passed"))
        out = ""
        if "verify" not in args.skip:
            phases["verify"], out = foldfarm(["verify", run, "--json", "--quiet", "--seed", "1", *workers, *store],
                                             env)
        if out.strip():
            checks = json.loads(out)
            failed = [name for name, c in checks.items() if isinstance(c, dict) and c.get("ok") is False]
            phases["verify"].note = "passed" if not failed else "FAILED: " + ", ".join(failed)
    elif "verify" not in args.skip:
        phases["verify"], out = foldfarm(["verify", run, "--json", "--quiet", "--audit", "0", *store], env)
        if out.strip():
            detail = json.loads(out).get("completeness", {}).get("detail", "")
            # An uncounted plan is complete but for its open tasks: any other problem is a hole or an overlap.
            problems = [p.strip() for p in detail.split(";") if p.strip() and "pending" not in p and "open" not in p]
            phases["verify"].ok = not problems
            phases["verify"].note = "covers the tree, no overlap" if not problems else "; ".join(problems)[:120]
    phases["status"], _ = foldfarm(["status", run, *store], env)
    phases["tasks"], _ = foldfarm(["tasks", run, "--limit", "20", "--sort", "count", *store], env)
    if "export" in args.skip:
        return phases
    export = os.path.join(folder, f"export-{size}.csv")
    phases["export"], _ = foldfarm(["export", run, "--format", "csv", "--output", export, *store], env)
    if os.path.exists(export):
        phases["export"].note = f"{os.path.getsize(export) / 2**20:,.0f} MiB"
        os.remove(export)
    return phases


def sizes_of(text: str) -> list[int]:
    try:
        return [int(float(s)) for s in text.split(",") if s.strip()]
    except ValueError:
        raise SystemExit(f"--sizes takes numbers like 1e5,1e6, not {text!r}") from None


def mib(n: int) -> str:
    return f"{n / 2**20:,.0f}"


def report(backend: str, results: dict[int, dict[str, Phase]]) -> None:
    print(f"\n{backend}: wall seconds, peak RSS of the largest process / of all at once (MiB)")
    print(f"{'tasks':>10} {'phase':8} {'seconds':>9} {'µs/task':>8} {'largest':>8} {'all':>8}  note")
    for size, phases in results.items():
        for name, p in phases.items():
            flag = "" if p.ok else " !"
            print(f"{size:>10,} {name:8} {p.seconds:>9.2f} {1e6 * p.seconds / size:>8.1f} {mib(p.largest):>8} "
                  f"{mib(p.together):>8}  {p.note}{flag}")
    sizes = list(results)
    if len(sizes) < 2:
        return
    low, high = sizes[0], sizes[-1]
    print(f"growth from {low:,} to {high:,} tasks (x{high / low:g}): time per task, largest process's memory")
    for name in results[low]:
        a, b = results[low].get(name), results[high].get(name)
        if a is None or b is None:
            continue
        per_task = (b.seconds / high) / (a.seconds / low)
        print(f"  {name:8} time/task x{per_task:5.2f}   memory x{b.largest / max(a.largest, 1):5.2f}"
              f"{'   (counted at one size only)' if (low <= ARGS.count_up_to) != (high <= ARGS.count_up_to) else ''}")
    worst = max(p.largest for phases in results.values() for p in phases.values())
    print(f"largest process of any phase: {mib(worst)} MiB (target <= 1024)")


ARGS = None


def main() -> None:
    global ARGS
    ap = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    ap.add_argument("--sizes", default="1e5,1e6,1e7", help="task counts, e.g. 1e5,1e6")
    ap.add_argument("--backends", default="sqlite,postgresql")
    ap.add_argument("--shape", default="3x10", help="map counted end to end (with a published count)")
    ap.add_argument("--count-up-to", type=float, default=1e6, help="larger sizes are planned and checked, not counted")
    ap.add_argument("--plan-shape", default="8x8", help="map planned (not counted) above --count-up-to")
    ap.add_argument("--workers", type=int, default=2)
    ap.add_argument("--skip", default="", help="phases to leave out: verify, export (e.g. --skip verify,export)")
    ARGS = args = ap.parse_args()
    args.skip = {p.strip() for p in args.skip.split(",") if p.strip()}
    if args.skip - {"verify", "export"}:
        raise SystemExit(f"--skip takes verify and export, not {args.skip!r}")
    sizes = sizes_of(args.sizes)
    env = {**os.environ, "PYTHONPATH": os.pathsep.join([os.path.dirname(os.path.dirname(os.path.abspath(__file__))),
                                                        os.environ.get("PYTHONPATH", "")])}
    env.pop("FOLDFARM_STORE", None)
    for backend in [b.strip() for b in args.backends.split(",") if b.strip()]:
        results: dict[int, dict[str, Phase]] = {}
        with tempfile.TemporaryDirectory() as folder:
            for size in sizes:
                if backend == "sqlite":
                    url, drop = f"sqlite:///{folder}/scale-{size}.sqlite", None
                elif backend == "postgresql":
                    url, drop = postgres_schema_url(os.environ.get("FOLDFARM_BENCH_POSTGRES_URL", DEFAULT_PG))
                    if url is None:
                        print(f"postgresql: skipped, {drop}")
                        break
                else:
                    raise SystemExit(f"--backends takes sqlite and postgresql, not {backend!r}")
                try:
                    results[size] = measure(url, size, args, env, folder)
                finally:
                    if drop is not None:
                        drop()
                    elif os.path.exists(url.removeprefix("sqlite:///")):
                        os.remove(url.removeprefix("sqlite:///"))
                report(backend, {size: results[size]})
        if len(results) > 1:
            report(backend, results)


if __name__ == "__main__":
    main()

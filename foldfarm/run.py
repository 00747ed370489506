"""Runs on a Dask cluster: the coordinator that plans, dispatches, records and resumes.

Actors
------
The **coordinator** (this module, one process per run, holding the run's
lease) is the only writer of the run's tasks.  **Workers** (Dask, one
single-threaded worker per core) run :func:`foldfarm.worker.work`: count one
prefix within a budget and return the count, or the partial count and the
remainder.  The **store** (:mod:`foldfarm.store`) is the source of truth;
Dask's own state is disposable.

Protocol
--------
1. *Plan*: workers make the plan (the coordinator never runs the
   kernel itself when it has a cluster): first its pieces and the size
   estimate, then create the run, then add the tasks of the pieces in one
   transaction as the workers send them, in order, a bounded number of
   pieces out at once (:func:`planned`).  A run whose plan never landed
   (state ``planned``, no tasks) is planned again on resume; the plan is
   deterministic.
2. *Dispatch*: keep at most :attr:`Settings.window` tasks per worker thread
   in flight: take pending tasks from the store, mark them running, submit.
3. *Record*: a finished task is recorded ``done`` (batched, one
   transaction per batch); a task that ran out of budget is recorded
   ``split`` with its remainder children in one transaction.  Counts become
   part of the total only through the store.
4. *Finish*: when nothing is open, store the total, run the checks
   (:mod:`foldfarm.check`), release the lease.

Failures
--------
A worker that dies mid-task loses that task only: the scheduler runs it
again elsewhere, or, once Dask gives up on it, the coordinator resubmits it
(up to :attr:`Settings.max_attempts`).  A coordinator that dies loses
nothing recorded: on ``resume`` the tasks it had out (``running``) become
pending again.  Ctrl-C stops submitting, cancels what is in flight, records
what has arrived, returns the rest to pending and says how to resume.
A store that stops answering (a database restart) is waited for, up to the
run's ``store_wait`` seconds, while the results that arrive are held
(:mod:`foldfarm.outage`); past that the run stops as cleanly as on Ctrl-C.
A scheduler that goes away (killed, its node rebooted) loses the tasks in
flight only: they go back to pending, and the coordinator connects to the
same address again for up to the run's ``scheduler_wait`` seconds, then
submits them anew; past that, or when the scheduler was one of a cluster
the coordinator started itself, the run stops as cleanly as on Ctrl-C
(:mod:`foldfarm.reconnect`).

Decisions (:class:`Dispatch`, :func:`classify_failure`, :func:`stale_lease`,
:func:`needs_plan`, :func:`target_tasks`) are plain functions and a small
state object, tested without a cluster or a database; :func:`drive` is the
thin loop that connects them to Dask and the store.
"""

from __future__ import annotations

import itertools
import math
import os
import socket
import time
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import asdict, dataclass, field
from typing import Any, Callable

from foldfarm.errors import UserError
from foldfarm.symmetry import CURRENT_TREE, tree_of

#: Seconds without a heartbeat after which a lease may be taken over.
LEASE_TTL = 60.0
#: Seconds between heartbeats (well inside the TTL).
HEARTBEAT_EVERY = 10.0
#: Knuth probes behind the node estimate that the ETA counts down from.
ETA_PROBES = 100_000
#: Done results recorded per transaction, and the longest they wait for one.
FLUSH_TASKS = 1000
FLUSH_SECONDS = 0.5


@dataclass(frozen=True)
class Settings:
    """How a run is cut and driven; stored with the run so ``resume`` reuses it.

    ``task_seconds``/``task_nodes`` bound one task's work (whichever comes
    first; ``task_nodes`` 0 means no node bound); ``tasks`` is the planner's
    target (0: choose from the cluster size); ``window`` is in-flight tasks
    per worker thread; ``store_wait`` is how long, in seconds, the
    coordinator waits for a store that stopped answering before it stops
    the run (:mod:`foldfarm.outage`), ``scheduler_wait`` how long it tries
    to reach a Dask scheduler it lost (:mod:`foldfarm.reconnect`).
    """

    task_seconds: float = 120.0
    task_nodes: int = 0
    tasks: int = 0
    probes: int = 4
    seed: int = 0
    order: str = "fast"
    window: int = 4
    max_attempts: int = 3
    audit: float = 0.01
    store_wait: float = 300.0
    scheduler_wait: float = 300.0

    @classmethod
    def from_dict(cls, data: dict) -> Settings:
        known = {k: v for k, v in data.items() if k in cls.__dataclass_fields__}
        return cls(**known)

    def to_dict(self) -> dict:
        return asdict(self)


# --------------------------------------------------------------------------
# Decisions (no I/O)
# --------------------------------------------------------------------------

def target_tasks(settings: Settings, threads: int) -> int:
    """Planner target: the user's, or 64 tasks per worker thread (at least 256).

    Tasks also split themselves when they outgrow their budget, so the plan
    only has to give every thread work from the start.
    """
    return settings.tasks if settings.tasks > 0 else max(256, 64 * threads)


def needs_plan(state: str, tasks: int) -> bool:
    """Whether a run's plan still has to be stored (a crash may have hit before it landed)."""
    return state == "planned" and tasks == 0


def classify_failure(error: BaseException, attempts: int, max_attempts: int) -> str:
    """``"retry"`` a task whose worker died, while attempts remain; else ``"fail"``.

    Any other exception comes from the task itself and would come again.
    """
    lost_worker = type(error).__name__ in {"KilledWorker", "CommClosedError", "FutureCancelledError"}
    return "retry" if lost_worker and attempts < max_attempts else "fail"


def stale_lease(holder: str, here: str, alive: Callable[[int], bool]) -> bool:
    """Whether a lease holder ``host:pid`` is a dead process on this host (safe to take over)."""
    host, _, pid = holder.rpartition(":")
    return host == here and pid.isdigit() and not alive(int(pid))


#: A bundle (one Dask task) should take about this many seconds of work...
BUNDLE_SECONDS = 1.0
#: ...but hold at most this many prefix tasks.
BUNDLE_MAX = 256


def bundle_size(mean_task_seconds: float | None, share: int | None = None) -> int:
    """Prefix tasks per Dask task: enough that Dask's per-task cost stays small, few enough to end together.

    Each Dask task costs the coordinator about 5 ms of CPU (scheduler,
    client and result transfer, measured on a local cluster), so short
    prefix tasks travel in bundles of about :data:`BUNDLE_SECONDS` of work,
    judged by their running mean time.  Unknown speed starts at one task per
    bundle; slow tasks (the normal case on a cluster) always travel alone.
    ``share`` caps a bundle at its share of the work not yet sent (guided
    self-scheduling, after Polychronopoulos and Kuck, 1987): the last
    bundles of a run shrink, so the threads finish close together instead
    of one of them working through a last large bundle alone.

    >>> bundle_size(None), bundle_size(0.01), bundle_size(0.01, share=7), bundle_size(300.0)
    (1, 100, 7, 1)
    """
    if not mean_task_seconds or mean_task_seconds <= 0:
        return 1
    return max(1, int(min(BUNDLE_MAX, BUNDLE_SECONDS / mean_task_seconds, share or BUNDLE_MAX)))


Task = tuple[int, str, int]  # task id, prefix, attempt


@dataclass
class Dispatch:
    """In-flight bookkeeping of the coordinator.

    State, as named sets:

    ``claimed``
        (task id, prefix) taken from the store and marked running, not yet
        submitted (claimed in bulk to spare the store a transaction a task).
    ``flying``
        bundle key -> the tasks it carries: submitted, not yet answered.
    ``done``
        results waiting to be recorded (a task in it is still ``running`` in
        the store: if we die now, it runs again; nothing is lost).

    Invariant: a task id is in at most one of them, and every task in them
    is ``running`` in the store, so a crash returns all of them to pending
    on resume.  At most ``capacity`` bundles fly at once.
    """

    capacity: int
    claimed: list[tuple[int, str]] = field(default_factory=list)
    flying: dict[str, list[Task]] = field(default_factory=dict)
    done: list[Any] = field(default_factory=list)
    last_flush: float = 0.0
    mean_seconds: float | None = None

    def room(self) -> int:
        """How many more bundles to submit now."""
        return max(0, self.capacity - len(self.flying))

    def wanted(self) -> int:
        """How many claimed tasks it takes to fill the room."""
        return self.room() * bundle_size(self.mean_seconds)

    def bundles(self, unsent: int | None = None) -> list[list[Task]]:
        """Cut the claimed tasks into bundles for the room there is (first attempts).

        ``unsent``, when known, is the number of open tasks not in flight
        (claimed here or pending in the store): no bundle takes more than
        its share of them over every slot of the window (:func:`bundle_size`).
        """
        share = -(-unsent // self.capacity) if unsent and unsent > 0 else None
        size = bundle_size(self.mean_seconds, share)
        out = []
        while self.claimed and len(out) < self.room():
            head, self.claimed = self.claimed[:size], self.claimed[size:]
            out.append([(t, p, 1) for t, p in head])
        return out

    def submitted(self, key: str, tasks: list[Task]) -> None:
        self.flying[key] = tasks

    def answered(self, key: str) -> list[Task]:
        return self.flying.pop(key)

    def observed(self, seconds: float) -> None:
        """Fold one task's run time into the running mean (weight 1/16) that sizes bundles."""
        self.mean_seconds = seconds if self.mean_seconds is None else self.mean_seconds + (seconds - self.mean_seconds) / 16

    def tasks_flying(self) -> int:
        return sum(len(b) for b in self.flying.values())

    def busy(self) -> bool:
        return bool(self.flying or self.claimed)

    def forget(self) -> int:
        """Drop every claimed and flying task (the scheduler carrying them is gone); how many there were.

        The caller returns them to pending in the store.
        """
        out = self.tasks_flying() + len(self.claimed)
        self.flying.clear()
        self.claimed.clear()
        return out

    def should_flush(self, now: float, idle: bool) -> bool:
        """Record waiting results when there are many, they are old, or nothing else is going on."""
        if not self.done:
            return False
        return idle or len(self.done) >= FLUSH_TASKS or now - self.last_flush >= FLUSH_SECONDS


@dataclass
class Tally:
    """Progress of a run as the coordinator sees it, kept in memory (no store queries).

    ``known`` counts tasks ever created (done + split + open); ``counted`` is
    foldings in answered tasks, including partial counts of splits.
    """

    known: int
    done: int
    counted: int
    nodes: int
    failed: int = 0
    estimated_nodes: float | None = None
    started: float = field(default_factory=time.monotonic)
    nodes_at_start: int = 0

    @classmethod
    def start(cls, progress, estimated_nodes: float | None = None) -> Tally:
        return cls(known=sum(progress.tasks.values()), done=progress.tasks.get("done", 0) + progress.tasks.get("split", 0),
                   counted=progress.counted, nodes=progress.nodes, failed=progress.tasks.get("failed", 0),
                   estimated_nodes=estimated_nodes, nodes_at_start=progress.nodes)

    def answered(self, out: dict) -> None:
        self.done += 1
        self.counted += out["count"]
        self.nodes += out["nodes"]
        self.known += len(out["remainder"])

    def open(self) -> int:
        """Tasks created and not answered: pending in the store, claimed, or in flight."""
        return self.known - self.done - self.failed

    def rate(self, now: float | None = None) -> float:
        """Nodes per second since this coordinator started."""
        elapsed = (now or time.monotonic()) - self.started
        return (self.nodes - self.nodes_at_start) / elapsed if elapsed > 0 else 0.0

    def eta(self, now: float | None = None) -> float | None:
        """Seconds left, from the estimated nodes still to search (None if unknown)."""
        return eta_seconds(self.estimated_nodes, self.nodes, self.rate(now))


# --------------------------------------------------------------------------
# The loop (I/O)
# --------------------------------------------------------------------------

@dataclass
class Summary:
    """What :func:`drive` reports: the run, its total when finished, and how it went."""

    run: int
    shape: str
    state: str
    count: int | None
    tasks: int
    splits: int
    nodes: int
    core_seconds: float
    seconds: float
    checks: dict | None = None
    failed: int = 0

    def as_json(self) -> dict:
        return {
            "run": self.run, "shape": self.shape, "state": self.state, "count": self.count,
            "tasks": self.tasks, "splits": self.splits, "nodes": self.nodes,
            "core_seconds": round(self.core_seconds, 3), "seconds": round(self.seconds, 3),
            "checks": self.checks, "failed": self.failed,
        }


class Stopped(Exception):
    """The run stopped cleanly before its end (Ctrl-C, SIGTERM, a store or a scheduler gone for too long).

    Everything in flight went back to pending, or, if the store could not be
    reached, is still ``running`` there and goes back to pending on resume.
    """

    def __init__(self, run: int):
        super().__init__(f"run {run} stopped")
        self.run = run


def holder_name() -> str:
    """This coordinator's lease holder name, ``host:pid``."""
    return f"{socket.gethostname()}:{os.getpid()}"


def _pid_alive(pid: int) -> bool:
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:
        return True
    return True


def take_lease(store, run_id: int, holder: str, force: bool = False) -> None:
    """Become the run's driver; take over a lease left by a dead process on this host."""
    from foldfarm.store import LeaseHeld

    try:
        store.acquire_lease(run_id, holder, LEASE_TTL, force=force)
    except LeaseHeld:
        current = store.lease(run_id)
        if current is not None and stale_lease(current.holder, socket.gethostname(), _pid_alive):
            store.acquire_lease(run_id, holder, LEASE_TTL, force=True)
        else:
            raise


def create(store, shape_text: str, settings: Settings, threads: int, client=None, *,
           tree: int = CURRENT_TREE) -> int:
    """Create a run of ``shape_text`` with its plan (made on a worker of ``client`` if given); return its id.

    The run is planned on search tree ``tree`` (:mod:`foldfarm.symmetry`),
    recorded with its settings as ``"tree"``: every later count, split and
    check of the run uses that tree.
    """
    from foldfarm.shape import parse_shape, working_sides

    shape = parse_shape(shape_text)
    sides = working_sides(shape, settings.order)
    settings = Settings.from_dict({**settings.to_dict(), "tasks": target_tasks(settings, threads)})
    prefixes, nodes = planned(sides, settings, tree, client, threads)
    run_id = store.create_run(shape.text, "x".join(map(str, sides)) or "1",
                              {**settings.to_dict(), "tree": tree, "estimated_nodes": nodes})
    store_plan(store, run_id, prefixes)
    return run_id


def store_plan(store, run_id: int, prefixes: Iterator[str]) -> None:
    """Add the plan of run ``run_id`` (a generator from :func:`planned`) in one transaction, fed as pieces arrive.

    If it ends early, the run keeps no task and ``resume`` plans it again:
    the pieces still out are cancelled, Ctrl-C becomes :class:`Stopped`, and
    any other exception carries the run's id as ``run`` for the caller's
    resume line, as :class:`Stopped` does.
    """
    try:
        store.add_tasks(run_id, prefixes)
    except BaseException as exc:
        prefixes.close()
        if isinstance(exc, KeyboardInterrupt):
            raise Stopped(run_id) from None
        exc.run = run_id
        raise


def recounter(store, client):
    """A :data:`foldfarm.check.Recount` that counts on ``client`` as runs in ``store`` (for ``verify --transpose``)."""

    def recount(shape_text: str, settings: dict, run_id: int | None) -> tuple[int, int | None, str]:
        if run_id is None:
            threads = max(1, sum(client.nthreads().values()))
            run_id = create(store, shape_text, Settings.from_dict(settings), threads, client)
        summary = drive(store, client, run_id)
        return run_id, summary.count, summary.state

    return recount


#: Tasks a worker plans in one Dask task (a few pieces of the plan, a few megabytes of prefixes).
PLAN_JOB_TASKS = 20_000
#: Dask tasks of planning out at once, per worker thread.
PLAN_JOBS_PER_THREAD = 2


def plan_jobs(pieces: list[tuple[str, int]], job_tasks: int = PLAN_JOB_TASKS) -> list[list[tuple[str, int]]]:
    """Consecutive pieces of a plan grouped into jobs of about ``job_tasks`` tasks (in order; none empty).

    >>> plan_jobs([("/1", 5), ("/2", 5), ("/3", 12), ("/4", 1)], job_tasks=10)
    [[('/1', 5), ('/2', 5)], [('/3', 12)], [('/4', 1)]]
    """
    jobs: list[list[tuple[str, int]]] = []
    load = job_tasks
    for piece in pieces:
        if load >= job_tasks:
            jobs.append([])
            load = 0
        jobs[-1].append(piece)
        load += piece[1]
    return jobs


def in_order(jobs: list, submit: Callable[[Any], Any], inflight: int) -> Iterator[str]:
    """Yield every prefix of every job, job after job, with at most ``inflight`` jobs submitted ahead.

    ``submit(job)`` starts a job and returns something whose ``result()``
    is its list of prefixes (a Dask future).  Only the jobs out and the
    one being yielded are held, so the coordinator's memory is bounded by
    ``inflight`` whatever the size of the plan.  Closing the generator
    early cancels the jobs still out (those with a ``cancel``).
    """
    from collections import deque

    out: deque = deque()
    waiting = iter(jobs)
    try:
        for job in itertools.islice(waiting, max(1, inflight)):
            out.append(submit(job))
        while out:
            prefixes = out.popleft().result()
            for job in itertools.islice(waiting, 1):
                out.append(submit(job))
            yield from prefixes
    finally:
        for job in out:
            if hasattr(job, "cancel"):
                job.cancel()


class _Ready:
    """A job computed in this process, with a future's ``result()``."""

    def __init__(self, fn: Callable[[], Any]):
        self._fn = fn

    def result(self) -> Any:
        return self._fn()


def planned(sides: tuple[int, ...], settings: Settings, tree: int, client=None,
            threads: int = 1) -> tuple[Iterator[str], float]:
    """The deterministic plan of a run on tree ``tree`` (a generator of prefix texts, sorted) and its search size.

    The pieces of the plan (:func:`foldfarm.worker.plan_coarse`) are made
    at once, the estimate of the search nodes with them; the tasks of each
    piece as the generator is consumed, :data:`PLAN_JOB_TASKS` at a time
    on the workers of ``client``, up to :data:`PLAN_JOBS_PER_THREAD` jobs a
    worker thread ahead (of ``threads``), where the kernel is loaded (this
    process then never loads it); else here, one job at a time.  Feed the
    generator to :meth:`foldfarm.store.Store.add_tasks`: the plan lands in
    one transaction, with a bounded part of it in memory at any time.
    """
    from foldfarm.worker import plan_coarse, plan_pieces

    coarse_args = (sides, settings.tasks, settings.probes, settings.seed, ETA_PROBES)
    if client is None:
        pieces, nodes = plan_coarse(*coarse_args, tree=tree)
    else:
        pieces, nodes = client.submit(plan_coarse, *coarse_args, tree=tree, pure=False).result()
    jobs = plan_jobs(pieces, PLAN_JOB_TASKS)
    del pieces

    def submit(job: list[tuple[str, int]]):
        if client is None:
            return _Ready(lambda: plan_pieces(sides, job, settings.probes, settings.seed, tree=tree))
        return client.submit(plan_pieces, sides, job, settings.probes, settings.seed, tree=tree, pure=False)

    return in_order(jobs, submit, PLAN_JOBS_PER_THREAD * max(1, threads)), nodes


def drive(store, client, run_id: int, *, holder: str | None = None, take_over: bool = False,
          on_progress: Callable[[Any], None] | None = None,
          on_notice: Callable[[str], None] | None = None, threads: int | None = None) -> Summary:
    """Drive run ``run_id`` on ``client`` until nothing is open; record everything in ``store``.

    Raises :class:`Stopped` after a clean stop on Ctrl-C, or when the store
    did not answer for the run's ``store_wait`` seconds, or no scheduler for
    its ``scheduler_wait`` seconds (:mod:`foldfarm.reconnect`: the
    coordinator then works through a new client of its own, which it closes
    before it returns; ``client`` is closed).  ``on_notice`` receives the
    lines that say the store or the scheduler went away and came back
    (default: standard error).  ``threads`` is the number of worker
    threads to keep busy when the cluster will have more than it has now
    (SLURM jobs still queued); the window is never planned for fewer than
    the cluster has.
    """
    from foldfarm.outage import PatientStore, StoreGone
    from foldfarm.reconnect import SchedulerGone, SchedulerWait, reconnect, reconnectable, scheduler_lost
    from foldfarm.store import TaskResult
    from foldfarm.worker import ReadyWorker, work

    started = time.perf_counter()
    holder = holder or holder_name()
    notice = on_notice or _to_stderr
    run = store.get_run(run_id)
    if run.state in ("done", "verified", "suspect"):
        return finish(store, run_id, started)
    settings = Settings.from_dict(run.settings)
    tree = tree_of(run.settings)  # a run made before the map's symmetries were used continues on tree 1
    raw, dispatch = store, None
    store = PatientStore(raw, settings.store_wait, notice, holding=lambda: len(dispatch.done) if dispatch else 0)
    sides = tuple(int(p) for p in run.side_order.split("x") if int(p) > 1)
    take_lease(store, run_id, holder, force=take_over)
    # Where to connect again if the scheduler is lost (None: a closed client), and whether it is ours.
    address, security = (client.scheduler.address if client.scheduler is not None else None), client.security
    own_cluster, made = client.cluster is not None, []  # made: clients of our own after a loss
    _hush_dask_reconnect()
    try:
        client.register_plugin(ReadyWorker())  # workers load the kernel, now and when they join
        if needs_plan(run.state, sum(store.progress(run_id).tasks.values())):
            threads = max(1, threads or 0, sum(client.nthreads().values()))
            store_plan(store, run_id, planned(sides, settings, tree, client, threads)[0])
        store.reset_running(run_id, failed=True)
        if run.state != "running":
            store.set_run_state(run_id, "running")
        threads = max(1, threads or 0, sum(client.nthreads().values()))
        dispatch = Dispatch(capacity=settings.window * threads, last_flush=time.monotonic())
        futures: dict[Any, str] = {}  # future -> bundle key
        from distributed import as_completed

        pool = as_completed([], loop=client.loop, with_results=True, raise_errors=False)  # results with the futures
        shown = time.monotonic()
        tally = Tally.start(store.progress(run_id), run.settings.get("estimated_nodes"))

        lost = [False]  # the scheduler was seen lost: rejoin() before waiting on it again
        rejoined = [0]  # connections made since: keys of a new connection never meet the old ones

        def submit(bundles: list[list[Task]]) -> None:
            """Send bundles of (task id, prefix, attempt) to the cluster in one graph update."""
            if not bundles:
                return
            again = f"-r{rejoined[0]}" if rejoined[0] else ""
            keys = [f"foldfarm-{run_id}-{b[0][0]}-{b[0][2]}{again}" for b in bundles]
            try:
                if scheduler_lost(client.status):
                    futs = None  # a client that cannot send would keep the futures unsettled for ever
                else:
                    futs = client.map(work, [sides] * len(bundles), ["\n".join(p for _, p, _ in b) for b in bundles],
                                      [settings.task_nodes] * len(bundles), [settings.task_seconds] * len(bundles),
                                      tree=tree, pure=False, key=keys)
            except Exception as exc:
                if not scheduler_lost(client.status, exc):
                    raise
                futs = None
            if futs is None:
                lost[0] = True  # the tasks stay claimed (running in the store) until rejoin() returns them
                dispatch.claimed.extend((t, p) for b in bundles for t, p, _ in b)
                return
            for fut, key, bundle in zip(futs, keys, bundles):
                futures[fut] = key
                dispatch.submitted(key, bundle)
            pool.update(futs)

        def refill() -> None:
            wanted = dispatch.wanted()
            if wanted <= 0:
                return
            if len(dispatch.claimed) < wanted:
                # Claim pending tasks in bulk: one read and one write transaction for many tasks.
                rows = store.next_pending(run_id, max(wanted, 4 * dispatch.capacity))
                if rows:
                    store.mark_running([r.id for r in rows])
                    dispatch.claimed.extend((r.id, r.prefix) for r in rows)
            submit(dispatch.bundles(tally.open() - dispatch.tasks_flying()))

        def flush() -> None:
            if dispatch.done:
                report = store.record_done_many(dispatch.done)
                dispatch.done = []
                if report.conflicts:
                    raise UserError(str(report.conflicts[0]))
            dispatch.last_flush = time.monotonic()

        def answered(task: Task, out: dict) -> None:
            task_id = task[0]
            tally.answered(out)
            dispatch.observed(out["seconds"])
            if out["complete"]:
                dispatch.done.append(TaskResult(task_id, out["count"], out["nodes"], out["seconds"], out["worker"]))
            else:
                store.record_split(task_id, out["count"], out["nodes"], out["seconds"], out["worker"],
                                   out["remainder"])

        def failed(bundle: list[Task], error: BaseException) -> None:
            again = []
            for task_id, prefix, attempts in bundle:
                if classify_failure(error, attempts, settings.max_attempts) == "retry":
                    again.append((task_id, prefix, attempts + 1))
                else:
                    store.mark_failed(task_id, f"{type(error).__name__}: {_first_line(error)}")
                    tally.failed += 1
            if again:
                store.mark_running([t for t, _, _ in again])
                submit([again])

        def rejoin() -> None:
            """The scheduler is lost: record what arrived, return the rest to pending, connect again or stop.

            Raises :class:`SchedulerGone` when no scheduler answers within the
            run's wait, or the lost one was of a cluster we started.
            """
            nonlocal client, pool
            lost[0] = False
            flush()
            out = dispatch.forget()
            store.reset_running(run_id)  # every task not recorded: claimed, in flight, or from a failed bundle
            futures.clear()
            pool.clear()
            if not reconnectable(address, own_cluster):
                started = "of the cluster foldfarm started " if own_cluster else ""
                raise SchedulerGone(f"lost the Dask scheduler {started}({address or 'its client was closed'}); "
                                    f"{out:,} tasks in flight went back to pending")
            notice(f"foldfarm: lost the Dask scheduler at {address}; {out:,} tasks in flight went back to pending; "
                   f"trying to reconnect for up to {settings.scheduler_wait:g} s")
            _close_client(client)
            client, lasted = reconnect(lambda: _client_again(address, security),
                                       SchedulerWait(settings.scheduler_wait))
            made.append(client)
            rejoined[0] += 1
            try:
                client.register_plugin(ReadyWorker())  # workers of the new scheduler load the kernel first
            except Exception as exc:
                if not scheduler_lost(client.status, exc):
                    raise
                lost[0] = True  # gone again already: the loop comes back here
            pool = as_completed([], loop=client.loop, with_results=True, raise_errors=False)
            notice(f"foldfarm: the Dask scheduler at {address} answers again after {lasted:.0f} s; continuing")

        heart = Heartbeat(raw, run_id, holder)  # tries once a beat, never waits: the lease TTL leaves room
        try:
            refill()
            while dispatch.busy():
                for fut, out in _next_results(pool, client):
                    bundle = dispatch.answered(futures.pop(fut))
                    if fut.status == "finished":
                        for task, result in zip(bundle, out):
                            answered(task, result)
                    elif scheduler_lost(client.status, out if isinstance(out, BaseException) else None):
                        lost[0] = True  # its tasks go back to pending in rejoin()
                    else:
                        failed(bundle, out if isinstance(out, BaseException) else fut.exception())
                if lost[0] or scheduler_lost(client.status):
                    rejoin()
                now = time.monotonic()
                if dispatch.should_flush(now, idle=not dispatch.flying):
                    flush()
                heart.check()
                refill()
                if on_progress is not None and now - shown >= 0.25:
                    on_progress(tally)
                    shown = now
            flush()
        except KeyboardInterrupt:
            _stop(raw, client, run_id, futures, dispatch)
            raise Stopped(run_id) from None
        except (StoreGone, SchedulerGone) as exc:
            notice(f"foldfarm: {exc}; stopping run {run_id}")
            _stop(raw, client, run_id, futures, dispatch)
            raise Stopped(run_id) from None
        finally:
            heart.stop()
        return finish(store, run_id, started, client)
    finally:
        release_lease(raw, run_id, holder)
        for own in made:
            _close_client(own)


def _next_results(pool, client, every: float = 0.1) -> list:
    """The (future, result) pairs ready in ``pool``, waiting for the first; at once [] once the scheduler is lost.

    Unlike ``pool.next_batch(block=True)``, which waits for ever on futures
    that a closed client never settles, this looks at the client every
    ``every`` seconds (as Dask's own iterator looks at its queue), and
    returns [] on an empty pool.
    """
    from foldfarm.reconnect import scheduler_lost

    while True:
        batch = pool.next_batch(block=False)
        if batch or pool.is_empty() or scheduler_lost(client.status):
            return batch
        with pool.thread_condition:  # a result put meanwhile is seen here; one put later wakes the wait
            if not pool.has_ready():
                pool.thread_condition.wait(every)


def _client_again(address: str, security):
    """A new client to the scheduler at ``address``: :class:`SchedulerError` (one line) while none answers there."""
    identity = probe_scheduler(address, security=security)
    with interrupts_held() as came:  # Dask cannot cut a client's start short cleanly
        client, _ = connect(address, None, identity=identity, security=security)
    if came:
        _close_client(client)
        raise KeyboardInterrupt
    return client


def _close_client(client) -> None:
    """Close a client whose scheduler may be gone (Dask waits up to about 2 s for it); never raises."""
    with interrupts_held():
        try:
            client.close()
        except Exception:  # noqa: BLE001 - a client that cannot close cleanly is gone anyway
            pass


class _DaskReconnectLine:
    """Drops Dask's lines about its own reconnect attempt: the coordinator says what it does instead.

    Those are the line that it gave up, and the traceback of the attempt
    cancelled when the coordinator closes the client to connect anew.
    """

    def filter(self, record) -> bool:
        import asyncio

        if record.exc_info and isinstance(record.exc_info[1], asyncio.CancelledError):
            return False
        return not record.getMessage().startswith("Failed to reconnect to scheduler")


_DASK_RECONNECT_LINE = _DaskReconnectLine()


def _hush_dask_reconnect() -> None:
    import logging

    logging.getLogger("distributed.client").addFilter(_DASK_RECONNECT_LINE)  # once: the same filter is added once


def release_lease(store, run_id: int, holder: str) -> None:
    """Give up the run's lease if ``holder`` has it; a store error here never masks the real outcome."""
    try:
        store.release_lease(run_id, holder)
    except Exception:  # noqa: BLE001 - the lease expires on its own
        pass


class Heartbeat:
    """Renews the run's lease every :data:`HEARTBEAT_EVERY` seconds from a daemon thread.

    The coordinator may wait on the cluster for longer than the lease lives
    (tasks of minutes), so the beat cannot ride on the main loop.  If the
    lease is lost (another coordinator took over), :meth:`check` raises in
    the main loop, which stops at once.
    """

    def __init__(self, store, run_id: int, holder: str, every: float = HEARTBEAT_EVERY):
        import threading

        self.lost: BaseException | None = None
        self._halt = threading.Event()
        self._thread = threading.Thread(target=self._beat, args=(store, run_id, holder, every),
                                        name="foldfarm-heartbeat", daemon=True)
        self._thread.start()

    def _beat(self, store, run_id: int, holder: str, every: float) -> None:
        from foldfarm.store import LeaseLost, StoreError

        while not self._halt.wait(every):
            try:
                store.heartbeat(run_id, holder)
            except LeaseLost as exc:
                self.lost = exc
                return
            except StoreError:  # a hiccup or an outage: try again next beat.  A lease that expired
                # meanwhile is still ours unless another coordinator took it (the beat then says so).
                continue

    def check(self) -> None:
        if self.lost is not None:
            raise self.lost

    def stop(self) -> None:
        self._halt.set()
        self._thread.join(timeout=5)


def _stop(store, client, run_id: int, futures: dict, dispatch: Dispatch | None) -> None:
    """A clean stop: cancel what is in flight, record what arrived, return the rest to pending.

    Each store call is tried once: a store that does not answer is not waited
    for (Ctrl-C must stop now; a store gone for too long was waited for
    already).  What it could not record stays ``running`` in the store, and
    resume returns it to pending.
    """
    import signal

    from foldfarm.store import StoreUnavailable

    # A second Ctrl-C, or a second SIGTERM (a batch system may send one to every process of the job
    # and the job script pass on another), must not cut this short.
    previous = {sig: signal.signal(sig, signal.SIG_IGN) for sig in (signal.SIGINT, signal.SIGTERM)}
    try:
        try:
            client.cancel(list(futures))
        except Exception:
            pass
        try:
            if dispatch is not None and dispatch.done:
                store.record_done_many(dispatch.done)
                dispatch.done = []
            store.reset_running(run_id)
            store.set_run_state(run_id, "stopped")
        except StoreUnavailable:
            pass
    finally:
        for sig, handler in previous.items():
            signal.signal(sig, handler)


def _to_stderr(line: str) -> None:
    import sys

    print(line, file=sys.stderr, flush=True)


def finish(store, run_id: int, started: float, client=None) -> Summary:
    """Store the total of a run with nothing open and run its checks (audits on ``client``); summarise."""
    progress = store.progress(run_id)
    run = store.get_run(run_id)
    checks = run.checks
    if progress.open == 0 and run.state == "running":
        store.finish_run(run_id, progress.counted)
        try:
            from foldfarm import check
        except ImportError:  # checks arrive with the aggregator
            check = None
        if check is not None:
            checks = check.verify_run(store, run_id, client=client)
        run = store.get_run(run_id)
    done = progress.tasks.get("done", 0)
    return Summary(run=run_id, shape=run.shape, state=run.state,
                   count=run.total if run.total is not None else None, tasks=done,
                   splits=progress.tasks.get("split", 0), nodes=progress.nodes,
                   core_seconds=progress.core_seconds, seconds=time.perf_counter() - started, checks=checks,
                   failed=progress.tasks.get("failed", 0))


# --------------------------------------------------------------------------
# Clusters
# --------------------------------------------------------------------------

class SchedulerError(UserError):
    """The Dask scheduler cannot be reached."""


def connect(scheduler: str | None, workers: int | None, quiet: bool = True, identity: dict | None = None,
            security=None):
    """A Dask client: to ``scheduler`` if given, else to a new local cluster.

    A scheduler is probed first (:func:`probe_scheduler`) unless its
    ``identity`` from an earlier probe is given; ``security`` (a Dask
    ``Security``) is what a ``tls://`` scheduler needs.

    The local cluster has ``workers`` single-threaded worker processes (default:
    one per core) bound to 127.0.0.1, with :data:`foldfarm.worker.DASK_SETTINGS`;
    the workers are forked from a server that loaded the kernel once
    (:mod:`foldfarm.preload`, where the platform can fork), and each loads it
    before registering otherwise.  Returns ``(client, cluster_or_None)``.
    """
    import logging

    import dask
    from distributed import Client, LocalCluster

    from foldfarm.worker import DASK_SETTINGS, ReadyWorker

    _quiet_logs(quiet)
    if scheduler:
        if identity is None:
            probe_scheduler(scheduler, security=security)
        try:
            return Client(scheduler, timeout="10s", security=security), None
        except (OSError, TimeoutError, ValueError) as exc:
            raise SchedulerError(f"cannot reach the Dask scheduler at {scheduler}: {_first_line(exc)}") from None
    n = local_workers(workers)
    settings = dict(DASK_SETTINGS)
    if start_fork_server():
        settings["distributed.worker.multiprocessing-method"] = "forkserver"
    with interrupts_held() as came, dask.config.set(settings):  # config read as the scheduler and nannies start
        cluster = LocalCluster(n_workers=n, threads_per_worker=1, processes=True, host="127.0.0.1",
                               dashboard_address="127.0.0.1:0", plugins={ReadyWorker()},
                               silence_logs=logging.ERROR if quiet else logging.WARNING)
        client = Client(cluster)
    _without_gc_callback()
    if came:  # Ctrl-C while it started: stop now that it can be closed cleanly
        disconnect(client, cluster)
        raise KeyboardInterrupt
    return client, cluster


def _without_gc_callback() -> None:
    """Remove the garbage-collector callback that a Dask scheduler in this process installs.

    A Ctrl-C whose KeyboardInterrupt is raised while that callback runs is
    lost: Python reports an exception in a collector callback as "ignored"
    and goes on, and the run went on counting (seen on a busy machine).  The
    callback only times collections for Dask's warnings about long pauses.
    """
    from distributed.gc import disable_gc_diagnosis

    disable_gc_diagnosis(force=True)


def local_workers(workers: int | None) -> int:
    """Worker processes of a local cluster: ``workers``, or one per core when None; :class:`UserError` below 1."""
    if workers is None:
        return os.cpu_count() or 1
    if workers < 1:
        raise UserError(f"--workers must be at least 1 (leave it out for one worker per core), not {workers}")
    return workers


def start_fork_server() -> bool:
    """Start the server that local worker processes are forked from, if the platform has one.

    The server imports :mod:`foldfarm.preload` (Dask and the loaded kernel)
    once, in its own process: called early, it does that while this process
    opens the store, imports Dask and starts the scheduler.  Idempotent;
    returns whether local workers can be forked from it.
    """
    import multiprocessing
    import signal
    from multiprocessing import forkserver, resource_tracker

    if "forkserver" not in multiprocessing.get_all_start_methods():
        return False
    # Takes effect only for a server not yet running (Dask names its own list later; by then ours runs).
    multiprocessing.get_context("forkserver").set_forkserver_preload(["foldfarm.preload"])
    # The server shares the terminal's foreground process group, so a Ctrl-C reaches it too, and
    # until its preload ignores SIGINT (a second, longer on a busy machine) it would die of it with
    # a traceback on the terminal.  Started with SIGINT blocked, it (and every worker forked from
    # it) inherits the block; here the block lasts only the spawn, and a Ctrl-C meanwhile waits.
    # (The resource tracker starts first: its own start unblocks SIGINT on the way out.)
    resource_tracker.ensure_running()
    blocked = signal.pthread_sigmask(signal.SIG_BLOCK, {signal.SIGINT})
    try:
        forkserver.ensure_running()
    finally:
        signal.pthread_sigmask(signal.SIG_SETMASK, blocked)
    return True


def disconnect(client, cluster) -> None:
    """Close a client from :func:`connect`, and the local cluster if it started one (Ctrl-C meanwhile is ignored).

    A cluster whose scheduler is gone is closed without trying to reach it
    for long (Dask's default is 30 s a connection).
    """
    import dask

    from foldfarm.reconnect import scheduler_lost

    lost = scheduler_lost(client.status)
    with interrupts_held(), dask.config.set({"distributed.comm.timeouts.connect": "2s"} if lost else {}):
        client.close()
        if cluster is not None:
            cluster.close()


@contextmanager
def interrupts_held():
    """Hold back Ctrl-C and SIGTERM while the block runs; yield the list of those that came meanwhile.

    Dask cannot cut a cluster's start or close short cleanly: interrupted
    half-way, a local cluster ends the interpreter with a traceback from
    Dask's exit hook.  A start takes a second or two; the caller acts on
    the interrupt once it is over.  Main thread only, as signal handlers are.
    """
    import signal

    came: list[int] = []
    held = (signal.SIGINT, signal.SIGTERM)
    previous = {s: signal.signal(s, lambda signum, frame: came.append(signum)) for s in held}
    try:
        yield came
    finally:
        for s, handler in previous.items():
            signal.signal(s, handler)


@contextmanager
def connected(scheduler: str | None, workers: int | None):
    """:func:`open_cluster` of a local cluster or a scheduler, as a context manager yielding the client.

    A ``tls://`` scheduler takes its certificates from Dask's TLS configuration.
    """
    client, cluster, _ = open_cluster(ClusterSpec(scheduler=scheduler, workers=workers))
    try:
        yield client
    finally:
        disconnect(client, cluster)


def probe_scheduler(address: str, timeout: float = 5.0, security=None) -> dict:
    """Fail fast, in one line, unless ``address`` is a Dask scheduler that answers; return its identity.

    Checks, each with its own one-line :class:`SchedulerError`: the address
    is ``tcp://HOST:PORT`` (or ``tls://``); something listens there; and it
    answers Dask's handshake and identity request as a scheduler within
    ``timeout`` seconds.  The last step is what catches a wrong port: an HTTP
    server never completes Dask's handshake (the client would wait forever),
    and one that answers at all sends bytes that Dask reads as a frame of
    several exbibytes.  The identity (:meth:`distributed.Scheduler.identity`)
    names the scheduler's services, the dashboard among them.  A ``tls://``
    scheduler is asked with the client certificates of ``security``.
    """
    from urllib.parse import urlsplit

    parts = urlsplit(address if "://" in address else f"tcp://{address}")
    try:
        host, port = parts.hostname, parts.port
    except ValueError:
        host = port = None
    if parts.scheme not in ("tcp", "tls") or not host or not port:
        raise SchedulerError(f"{address!r} is not a scheduler address: write tls://HOST:PORT (or tcp://HOST:PORT "
                             "on loopback), for example tls://head.halvorsen.example:8786")
    try:  # TLS runs over TCP: a port nobody listens on is told at once either way
        socket.create_connection((host, port), timeout=timeout).close()
    except OSError as exc:
        raise SchedulerError(f"cannot reach the Dask scheduler at {address}: {exc.strerror or exc}") from None
    return identify(address, timeout, security.get_connection_args("client") if security is not None else None)


def identify(address: str, timeout: float, connection_args: dict | None = None) -> dict:
    """The identity a Dask scheduler at ``address`` gives within ``timeout`` s, or a one-line :class:`SchedulerError`.

    ``connection_args`` are Dask's arguments for the connection (its TLS
    context, from :meth:`distributed.security.Security.get_connection_args`).
    """
    import asyncio
    import logging

    from distributed.comm import CommClosedError
    from distributed.comm import connect as dask_connect

    async def ask() -> object:
        comm = await dask_connect(address, timeout=timeout, **(connection_args or {}))
        try:
            await comm.write({"op": "identity", "reply": True})
            return await comm.read()
        finally:
            comm.abort()

    comm_log = logging.getLogger("distributed.comm")
    level = comm_log.level
    comm_log.setLevel(logging.CRITICAL)  # what a stranger sends is our one line, not Dask's log
    try:
        reply = asyncio.run(asyncio.wait_for(ask(), timeout))
    except asyncio.TimeoutError:
        reply = f"no answer to Dask's handshake within {timeout:g} s"
    except (CommClosedError, ConnectionError, EOFError) as exc:
        if address.startswith("tls://") and ("TLS" in str(exc) or "SSL" in str(exc)):
            raise SchedulerError(f"{address} and this client do not trust each other's certificates "
                                 f"({_first_line(exc).split(': ')[-1]}); check --tls-ca-file, --tls-cert and "
                                 "--tls-key (deploy/README.md)") from None
        reply = "it closed the connection during Dask's handshake"
    except Exception as exc:  # noqa: BLE001 - whatever a non-Dask peer makes Dask raise
        reply = _first_line(exc)
    finally:
        comm_log.setLevel(level)
    kind = reply.get("type") if isinstance(reply, dict) else None
    if kind == "Scheduler":
        return reply
    if kind is not None:
        why = f"it is a Dask {kind.lower()}, not the scheduler"
    else:
        why = reply if isinstance(reply, str) else "it gave an answer Dask does not know"
    raise SchedulerError(f"{address} does not answer as a Dask scheduler ({why}); check the address and port "
                         "(a scheduler listens on 8786 unless told otherwise)")


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__


def eta_seconds(estimated_nodes: float | None, nodes_done: int, rate: float) -> float | None:
    """Seconds left from the estimated remaining nodes at ``rate`` nodes/s (None if unknown)."""
    if not estimated_nodes or rate <= 0:
        return None
    return max(0.0, estimated_nodes - nodes_done) / rate if math.isfinite(rate) else None


# --------------------------------------------------------------------------
# Where the workers come from
# --------------------------------------------------------------------------

@dataclass(frozen=True)
class ClusterSpec:
    """Where a command's Dask cluster comes from, as the user asked.

    A local cluster of ``workers`` processes (the default), a running
    scheduler at ``scheduler`` (``tcp://`` or ``tls://``, with ``tls`` files
    for the latter), or SLURM worker jobs (``slurm``, a
    :class:`foldfarm.slurm.Request`).
    """

    scheduler: str | None = None
    workers: int | None = None
    slurm: Any = None
    tls: Any = None


def cluster_spec(*, cluster: str | None = None, jobs: str | int | None = None, scheduler: str | None = None,
                 workers: int | None = None, job_cores: int | None = None, job_memory: str | None = None,
                 walltime: str | None = None, partition: str | None = None, account: str | None = None,
                 directives: tuple[str, ...] = (), insecure: bool = False, tls_ca_file: str | None = None,
                 tls_cert: str | None = None, tls_key: str | None = None) -> ClusterSpec:
    """Check a combination of cluster options and make the :class:`ClusterSpec`; :class:`UserError` in one line.

    >>> cluster_spec(cluster="slurm", jobs="2:8").slurm.jobs
    (2, 8)
    >>> cluster_spec(jobs=4)
    Traceback (most recent call last):
    ...
    foldfarm.errors.UserError: --jobs is for --cluster slurm (the local cluster's count is --workers)
    """
    from foldfarm.security import INSECURE_FLAG, TlsFiles, check_tls_files, split_address, tls_files

    kind = cluster or "local"
    if kind not in ("local", "slurm"):
        raise UserError(f"--cluster must be local or slurm, not {cluster!r}")
    slurm_only = {"--jobs": jobs, "--job-cores": job_cores, "--job-memory": job_memory, "--walltime": walltime,
                  "--partition": partition, "--account": account, "--job-directive": directives or None,
                  INSECURE_FLAG: insecure or None}
    tls = TlsFiles(*(os.path.expanduser(p) if p else None for p in (tls_ca_file, tls_cert, tls_key)))
    if kind == "local":
        given = [name for name, value in slurm_only.items() if value is not None]
        if given:
            hint = " (the local cluster's count is --workers)" if given[0] == "--jobs" else ""
            raise UserError(f"{given[0]} is for --cluster slurm{hint}")
        scheme = split_address(scheduler)[0] if scheduler else None
        if scheme not in (None, "tcp", "tls"):
            raise UserError(f"{scheduler!r} is not a scheduler address: write tls://HOST:PORT (or tcp://HOST:PORT "
                            "on loopback), for example tls://head.halvorsen.example:8786")
        if tls.given() and scheme != "tls":
            raise UserError("--tls-ca-file, --tls-cert and --tls-key are for a --scheduler tls://HOST:PORT")
        if scheme == "tls":
            tls = tls_files(tls.ca_file, tls.cert, tls.key)
            check_tls_files(tls, scheduler)
        return ClusterSpec(scheduler=scheduler, workers=workers, tls=tls)
    from foldfarm.slurm import Request, SlurmError, parse_jobs

    for option, value in (("--scheduler", scheduler), ("--workers", workers)):
        if value is not None:
            raise UserError(f"{option} does not go with --cluster slurm, which starts its own scheduler and "
                            "asks SLURM for --jobs worker jobs")
    if tls.given():
        raise UserError("--cluster slurm makes its own certificates (or takes those of distributed.comm.tls in "
                        "your Dask configuration); --tls-* options are for a --scheduler tls://HOST:PORT")
    if jobs is None:
        raise UserError("--cluster slurm needs --jobs N (worker jobs to keep) or --jobs MIN:MAX")
    if job_cores is not None and (isinstance(job_cores, bool) or job_cores < 1):
        raise SlurmError(f"--job-cores must be a whole number of at least 1, not {job_cores!r}")
    request = Request(jobs=parse_jobs(jobs), cores=job_cores, memory=job_memory, walltime=walltime,
                      partition=partition, account=account, directives=tuple(directives), insecure=insecure)
    return ClusterSpec(slurm=request)


def spec_arguments(spec: ClusterSpec) -> list[str]:
    """The command-line options that ask for the cluster of ``spec`` again (for the line that says how to resume).

    >>> spec_arguments(cluster_spec(cluster="slurm", jobs="2:8", partition="long"))
    ['--cluster', 'slurm', '--jobs', '2:8', '--partition', 'long']
    >>> spec_arguments(cluster_spec(scheduler="tcp://127.0.0.1:8786")), spec_arguments(cluster_spec())
    (['--scheduler', 'tcp://127.0.0.1:8786'], [])
    """
    from foldfarm.security import INSECURE_FLAG

    def given(pairs) -> list[str]:
        return [text for option, value in pairs if value is not None for text in (option, str(value))]

    if spec.slurm is not None:
        r = spec.slurm
        low, high = r.jobs
        return (["--cluster", "slurm", "--jobs", str(low) if low == high else f"{low}:{high}"]
                + given([("--job-cores", r.cores), ("--job-memory", r.memory), ("--walltime", r.walltime),
                         ("--partition", r.partition), ("--account", r.account)])
                + given(("--job-directive", d) for d in r.directives) + ([INSECURE_FLAG] if r.insecure else []))
    if spec.scheduler is not None:
        tls = spec.tls
        return ["--scheduler", spec.scheduler] + (given([("--tls-ca-file", tls.ca_file), ("--tls-cert", tls.cert),
                                                         ("--tls-key", tls.key)]) if tls is not None else [])
    return given([("--workers", spec.workers)])


def open_cluster(spec: ClusterSpec, quiet: bool = True, identity: dict | None = None):
    """A Dask client for ``spec``: ``(client, cluster_or_None, threads)``.

    ``threads`` is the number of worker threads to plan the window for: those
    the cluster has now, or, for SLURM, those it will have once its jobs run
    (tasks wait on the scheduler for workers still queued).  A ``tls://``
    scheduler gets the certificates of :func:`scheduler_security`;
    ``identity`` is that of a scheduler probed already (:func:`probe_scheduler`).
    """
    if spec.slurm is not None:
        from distributed import Client

        from foldfarm import slurm
        from foldfarm.worker import DASK_SETTINGS

        _quiet_logs(quiet)
        with interrupts_held() as came:
            cluster, threads = slurm.start(spec.slurm, DASK_SETTINGS)
            client = Client(cluster)
        _without_gc_callback()
        if came:  # Ctrl-C while it started: stop now that it can be closed cleanly
            disconnect(client, cluster)
            raise KeyboardInterrupt
        return client, cluster, threads
    client, cluster = connect(spec.scheduler, spec.workers, quiet, identity=identity,
                              security=scheduler_security(spec))
    return client, cluster, max(1, sum(client.nthreads().values()))


def scheduler_security(spec: ClusterSpec):
    """The Dask ``Security`` for the ``tls://`` scheduler of ``spec`` (None for any other).

    Its files are those of ``spec.tls``, else those of Dask's TLS
    configuration; :class:`foldfarm.security.SecurityError` in one line if
    they are missing.
    """
    from foldfarm import security

    if not spec.scheduler or security.split_address(spec.scheduler)[0] != "tls":
        return None
    given = spec.tls or security.TlsFiles()
    files = security.tls_files(given.ca_file, given.cert, given.key)
    security.check_tls_files(files, spec.scheduler)
    return security.client_security(files)


def _quiet_logs(quiet: bool) -> None:
    import logging

    _hush_dask_reconnect()  # a lost scheduler is the coordinator's to report, whenever it happens
    if quiet:
        for name in ("distributed", "distributed.nanny", "distributed.scheduler", "distributed.worker",
                     "distributed.deploy.adaptive", "dask_jobqueue"):
            logging.getLogger(name).setLevel(logging.ERROR)

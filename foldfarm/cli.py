"""The ``foldfarm`` command line (typer).  Thin: parse, call, print.

Every user error (:class:`foldfarm.errors.UserError`) becomes one line on
stderr, ``foldfarm: <message>``, and exit code 2.
"""

from __future__ import annotations

import functools
import gc
import json
import os
import shlex
import sys
import time
from contextlib import nullcontext
from typing import Callable

import typer

from foldfarm.errors import UserError

app = typer.Typer(
    add_completion=False,
    no_args_is_help=True,
    pretty_exceptions_enable=False,
    help="Exact map-folding counts on one core or a Dask cluster, checkpointed in SQLite or PostgreSQL.",
)


@app.callback()
def _root() -> None:
    """Exact map-folding counts on one core or a Dask cluster."""


def fail(message: str) -> None:
    """Print one line to stderr and exit 2."""
    typer.echo(f"foldfarm: {message}", err=True)
    raise typer.Exit(2)


def user_errors(fn: Callable) -> Callable:
    """Turn :class:`UserError` raised by a command into :func:`fail`, and Ctrl-C into one line and exit 130."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except UserError as exc:
            fail(str(exc))
        except KeyboardInterrupt:  # Ctrl-C outside a run's own clean stop (a run prints its resume line)
            typer.echo("foldfarm: interrupted", err=True)
            raise typer.Exit(130) from None

    return wrapper


def emit_json(obj: dict) -> None:
    """One JSON object on stdout; integers stay exact."""
    typer.echo(json.dumps(obj))


@app.command("count", context_settings={"ignore_unknown_options": True})
@user_errors
def count_cmd(
    shape: str = typer.Argument(..., metavar="SHAPE", help="Map shape, e.g. 3x5 or 2x2x2."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object."),
    given_order: bool = typer.Option(
        False, "--given-order", help="Search the sides in the order given instead of the fastest order."
    ),
) -> None:
    """Count the foldings of SHAPE exactly, in this process, on one core."""
    from foldfarm.shape import parse_shape

    parsed = parse_shape(shape)
    from foldfarm import kernel

    started = time.perf_counter()
    kernel.warm()
    load_seconds = time.perf_counter() - started
    tables = kernel.prepare(parsed, "given" if given_order else "fast")
    out = kernel.count_below(tables)
    if as_json:
        emit_json(
            {
                "shape": parsed.text,
                "cells": parsed.cells,
                "count": out.count,
                "seconds": round(out.seconds, 6),
                "nodes": out.nodes,
                "side_order": "x".join(map(str, tables.sides)) or "1",
                "tree": tables.tree,
                "factor": tables.factor,
                "kernel_load_seconds": round(load_seconds, 3),
            }
        )
    else:
        typer.echo(out.count)


# ---- runs on a Dask cluster -------------------------------------------------------------

StoreOpt = typer.Option(None, "--store", help="Store URL (default: $FOLDFARM_STORE or sqlite:///foldfarm.sqlite).")
WorkersOpt = typer.Option(None, "--workers", help="Local worker processes (default: one per core).")
SchedulerOpt = typer.Option(None, "--scheduler", help="Address of an existing Dask scheduler, e.g. tcp://head:8786.")
JsonOpt = typer.Option(False, "--json", help="Print one JSON object.")
QuietOpt = typer.Option(False, "--quiet", help="No progress display.")
TakeOverOpt = typer.Option(False, "--take-over", help="Drive the run even if another coordinator holds its lease.")
TaskSecondsOpt = typer.Option(None, "--task-seconds", help="Budget of one task in seconds (default 120).")
TaskNodesOpt = typer.Option(None, "--task-nodes", help="Budget of one task in search nodes (default: none).")
ClusterOpt = typer.Option(None, "--cluster", help="local (worker processes on this machine; the default) or slurm "
                          "(worker jobs through dask-jobqueue, configured by jobqueue.slurm.*; foldfarm[slurm]).")
JobsOpt = typer.Option(None, "--jobs", help="SLURM worker jobs to keep: N, or MIN:MAX by load; ended jobs are "
                       "replaced.")
JobCoresOpt = typer.Option(None, "--job-cores", help="Cores of a SLURM worker job (default: jobqueue.slurm.cores).")
JobMemoryOpt = typer.Option(None, "--job-memory", help="Memory of a SLURM worker job, e.g. 64GB (default: "
                            "jobqueue.slurm.memory).")
WalltimeOpt = typer.Option(None, "--walltime", help="Walltime of a SLURM worker job, e.g. 12:00:00 (default: "
                           "jobqueue.slurm.walltime).")
PartitionOpt = typer.Option(None, "--partition", help="SLURM partition (default: jobqueue.slurm.queue).")
AccountOpt = typer.Option(None, "--account", help="SLURM account (default: jobqueue.slurm.account).")
JobDirectiveOpt = typer.Option(None, "--job-directive", help="Extra #SBATCH option of the worker jobs, e.g. "
                               "--qos=long (repeatable; added to jobqueue.slurm.job-extra-directives).")
InsecureOpt = typer.Option(False, "--insecure-plain-tcp", help="Let --cluster slurm start a scheduler without "
                           "TLS beyond loopback: anyone who reaches it can run code as you on every worker.")
TlsCaOpt = typer.Option(None, "--tls-ca-file", help="CA certificate of a tls:// scheduler (default: "
                        "distributed.comm.tls.ca-file of your Dask configuration).")
TlsCertOpt = typer.Option(None, "--tls-cert", help="This client's certificate for a tls:// scheduler (default: "
                          "distributed.comm.tls.client.cert).")
TlsKeyOpt = typer.Option(None, "--tls-key", help="This client's private key for a tls:// scheduler (default: "
                         "distributed.comm.tls.client.key).")


def _budget(task_seconds: str | None, task_nodes: str | None) -> dict:
    """Run settings from the budget options; one line and exit 2 for a bad value."""
    values: dict = {}
    if task_seconds is not None:
        values["task_seconds"] = _seconds(task_seconds, "--task-seconds")
    if task_nodes is not None:
        values["task_nodes"] = _whole(task_nodes, "--task-nodes")
    return values


def _seconds(text: str, option: str) -> float:
    """``text`` as a finite number of seconds >= 0; one line and exit 2 otherwise."""
    try:
        value = float(text)
    except ValueError:
        value = -1.0
    if not 0 <= value < float("inf"):
        fail(f"{option} must be a number of seconds >= 0, not {text!r}")
    return value


def _open_store(url: str | None, create: bool = False):
    """The store at ``url``; only the commands that start runs (``create``) may make a new one."""
    from foldfarm.store import Store

    return Store(url, create=create)


def _show_progress(quiet: bool):
    """A progress callback for :func:`foldfarm.run.drive`, or None when quiet or not a terminal."""
    if quiet or not sys.stderr.isatty():
        return None, None
    from rich.console import Console
    from rich.live import Live

    live = Live(console=Console(stderr=True), refresh_per_second=4, transient=True)

    def show(tally) -> None:
        eta = tally.eta()
        eta_text = "unknown" if eta is None else time.strftime("%H:%M:%S", time.gmtime(eta))
        live.update(f"tasks {tally.done:,} / {tally.known:,}   foldings counted {tally.counted:,}   "
                    f"{tally.rate():,.0f} nodes/s   ETA {eta_text}")

    return show, live


def _dashboard_hint(cluster) -> str:
    """What the printed dashboard address lacks: a local cluster draws its graphs only with bokeh installed."""
    import importlib.util

    if cluster is None or importlib.util.find_spec("bokeh") is not None:
        return ""
    return " (its graphs need bokeh: pip install 'foldfarm[dashboard]')"


def _drive(store, run_id: int, spec, identity: dict | None, as_json: bool, quiet: bool, take_over: bool,
           new_shape: str | None = None, settings=None, run_file: str | None = None,
           plan_only: bool = False) -> None:
    """Start or join the cluster of ``spec``, plan ``new_shape`` if given, drive the run; print the outcome.

    With ``run_file``, the id of a new run is kept there as soon as it is planned.  With
    ``plan_only``, stop once the plan is stored: print the run id and how to resume it.
    """
    import signal

    from foldfarm import check
    from foldfarm import run as runner
    from foldfarm.reconnect import scheduler_lost
    from foldfarm.report import verdict_lines

    def terminate(signum, frame):  # a batch system's SIGTERM stops the run as cleanly as Ctrl-C
        raise KeyboardInterrupt

    def resume_command() -> str:
        return shlex.join(["foldfarm", "resume", str(run_id), "--store", store.display_url,
                           *runner.spec_arguments(spec)])

    def stopped(why: str, say: bool = False) -> None:
        """Say how to go on from a clean stop (a run not planned yet has nothing to resume); exit 130.

        ``say``: the reason is news (not a stop the loop reported already).
        """
        if not run_id:
            typer.echo(f"foldfarm: {why} before the run was planned; nothing was stored", err=True)
        else:
            if say:
                typer.echo(f"foldfarm: {why}", err=True)
            typer.echo(f"foldfarm: stopped run {run_id}; resume with: {resume_command()}", err=True)
        raise typer.Exit(130) from None

    signal.signal(signal.SIGTERM, terminate)
    holder = runner.holder_name()
    if new_shape is None:  # become the run's driver before a cluster starts for nothing
        _take_lease(store, run_id, holder, take_over)
    try:
        client = cluster = None
        try:
            client, cluster, threads = runner.open_cluster(spec, identity=identity)
            if new_shape is not None:  # planned on a worker, which has the kernel loaded
                run_id = runner.create(store, new_shape, settings, threads, client)
                if run_file:
                    from foldfarm.batch import write_run_file

                    write_run_file(run_file, run_id)
            if not (quiet or as_json):
                if "dashboard" in client.scheduler_info().get("services", {}):  # a scheduler may run without one
                    typer.echo(f"dashboard: {client.dashboard_link}{_dashboard_hint(cluster)}", err=True)
                if new_shape is not None:
                    typer.echo(f"run {run_id}: {new_shape} planned in {store.display_url}", err=True)
            if plan_only:
                if as_json:
                    emit_json({"run": run_id, "shape": new_shape, "state": "planned",
                               "tasks": store.progress(run_id).tasks["pending"]})
                else:
                    typer.echo(run_id)
                    typer.echo(f"run {run_id}: planned, not counted; count it with: {resume_command()}", err=True)
                return
            show, live = _show_progress(quiet or as_json)
            with live if live is not None else nullcontext():
                summary = runner.drive(store, client, run_id, holder=holder, take_over=take_over, on_progress=show,
                                       threads=threads)
        except (runner.Stopped, KeyboardInterrupt) as exc:  # Ctrl-C in the loop, or before it began
            run_id = run_id or getattr(exc, "run", 0)  # a run stopped while its plan was being stored
            stopped("interrupted")
        except Exception as exc:  # the scheduler lost outside the loop that waits for it (planning, the checks)
            if client is None or not scheduler_lost(client.status, exc):
                raise
            run_id = run_id or getattr(exc, "run", 0)  # lost while the plan was being stored
            where = f" at {spec.scheduler}" if spec.scheduler else " of the cluster foldfarm started"
            stopped(f"lost the Dask scheduler{where}", say=True)
        finally:
            if client is not None:
                runner.disconnect(client, cluster)
    finally:
        if new_shape is None:  # drive gave it up already, unless it never got that far
            runner.release_lease(store, run_id, holder)
    checked = summary.checks is not None and summary.count is not None
    if as_json:
        emit_json({**summary.as_json(), "passed": check.passed(summary.checks) if checked else None})
    else:
        typer.echo(summary.count if summary.count is not None else f"run {summary.run}: {summary.state}")
        if not quiet:
            typer.echo(f"run {summary.run}: {summary.shape}, {summary.tasks:,} tasks done ({summary.splits:,} split), "
                       f"{summary.nodes:,} nodes, {summary.core_seconds:,.1f} core-s, {summary.seconds:,.1f} s",
                       err=True)
        if checked:
            typer.echo("\n".join(verdict_lines(summary.run, summary.state, summary.checks)), err=True)
    if summary.count is None:
        typer.echo(f"foldfarm: run {summary.run} is not finished: {summary.failed:,} tasks failed "
                   f"(foldfarm resume {summary.run} runs them again)", err=True)
        raise typer.Exit(1)
    if checked and not check.passed(summary.checks):
        raise typer.Exit(1)


def _take_lease(store, run_id: int, holder: str, take_over: bool) -> None:
    """Become the driver of run ``run_id``, or say in one line who drives it and how to take over."""
    from foldfarm import run as runner
    from foldfarm.store import LeaseHeld

    try:
        runner.take_lease(store, run_id, holder, force=take_over)
    except LeaseHeld as exc:
        fail(f"{exc} (foldfarm resume {run_id} --take-over)")


@app.command("run", context_settings={"ignore_unknown_options": True})
@user_errors
def run_cmd(
    target: str = typer.Argument(..., metavar="SHAPE|JOB.toml", help="Map shape (e.g. 3x8) or job file (e.g. jobs/tern-3x8.toml)."),
    store: str = StoreOpt,
    workers: str = WorkersOpt,
    scheduler: str = SchedulerOpt,
    task_seconds: str = TaskSecondsOpt,
    task_nodes: str = TaskNodesOpt,
    tasks: str = typer.Option(None, "--tasks", help="Tasks to plan (default: 64 per worker thread, at least 256)."),
    given_order: bool = typer.Option(False, "--given-order", help="Search the sides in the order given."),
    store_wait: str = typer.Option(None, "--store-wait", help="Seconds to wait for a store that stops answering "
                                   "(a database restart) before stopping the run cleanly (default 300)."),
    scheduler_wait: str = typer.Option(None, "--scheduler-wait", help="Seconds to try reconnecting to a --scheduler "
                                       "that goes away (killed, its node rebooted) before stopping the run cleanly "
                                       "(default 300)."),
    cluster: str = ClusterOpt,
    jobs: str = JobsOpt,
    job_cores: str = JobCoresOpt,
    job_memory: str = JobMemoryOpt,
    walltime: str = WalltimeOpt,
    partition: str = PartitionOpt,
    account: str = AccountOpt,
    job_directive: list[str] = JobDirectiveOpt,
    insecure_plain_tcp: bool = InsecureOpt,
    tls_ca_file: str = TlsCaOpt,
    tls_cert: str = TlsCertOpt,
    tls_key: str = TlsKeyOpt,
    run_file: str = typer.Option(None, "--run-file", help="Keep the run's id in this file; if it holds one "
                                 "already, resume that run instead (what a requeued batch job does)."),
    sbatch: str = typer.Option(None, "--sbatch", help="Write a batch script that runs this command as a SLURM job "
                               "that requeues itself before its walltime, and exit (then: sbatch FILE)."),
    plan_only: bool = typer.Option(False, "--plan-only", help="Plan the run and store its tasks, then stop "
                                   "without counting (print the run id; foldfarm resume RUN counts it)."),
    as_json: bool = JsonOpt,
    quiet: bool = QuietOpt,
) -> None:
    """Count SHAPE (or a job file's shape) on a Dask cluster, checkpointing every task in the store."""
    from foldfarm.job import is_job_file, load_job
    from foldfarm.run import Settings
    from foldfarm.shape import parse_shape

    workers = _whole(workers, "--workers", 1)
    values: dict = {}
    options: dict = {}
    name = None
    if is_job_file(target):
        job = load_job(target)
        shape_text = job.shape
        values.update(job.settings)
        values.pop("name", None)
        options = job.options
        name = job.name
        store = store or job.store
        scheduler = scheduler or job.scheduler
        workers = job.workers if workers is None else workers
    else:
        shape_text = parse_shape(target).text
    spec = _cluster_spec(options, scheduler=scheduler, workers=workers, cluster=cluster, jobs=jobs,
                         job_cores=job_cores, job_memory=job_memory, walltime=walltime, partition=partition,
                         account=account, job_directive=job_directive, insecure_plain_tcp=insecure_plain_tcp,
                         tls_ca_file=tls_ca_file, tls_cert=tls_cert, tls_key=tls_key)
    values.update(_budget(task_seconds, task_nodes))
    if tasks is not None:
        values["tasks"] = _whole(tasks, "--tasks", 1)
    if given_order:
        values["order"] = "given"
    if store_wait is not None:
        values["store_wait"] = _seconds(store_wait, "--store-wait")
    if scheduler_wait is not None:
        values["scheduler_wait"] = _seconds(scheduler_wait, "--scheduler-wait")
    settings = Settings.from_dict(values)
    if sbatch is not None:
        _write_batch_script(sbatch, name or f"foldfarm-{shape_text}", spec)
        return
    from foldfarm.batch import read_run_file

    known = read_run_file(run_file) if run_file else None
    identity = _cluster_ready(spec)
    opened = _open_store(store, create=True)
    try:
        if known is not None:  # a requeued batch job: the run it started before
            opened.get_run(known)
            _drive(opened, known, spec, identity, as_json, quiet, False)
        else:
            _drive(opened, 0, spec, identity, as_json, quiet, False, new_shape=shape_text, settings=settings,
                   run_file=run_file, plan_only=plan_only)
    finally:
        opened.close()


def _cluster_spec(job_options: dict, **given):
    """The :class:`foldfarm.run.ClusterSpec` of the command-line options over a job file's (one line if they clash)."""
    from foldfarm.run import cluster_spec

    def pick(key: str, option: str | None = None):
        value = given.get(key)
        return value if value not in (None, [], False) else job_options.get(option or key)

    cores = pick("job_cores")
    return cluster_spec(
        cluster=pick("cluster"), jobs=pick("jobs"), scheduler=given.get("scheduler"), workers=given.get("workers"),
        job_cores=_whole(cores, "--job-cores") if isinstance(cores, str) else cores,
        job_memory=pick("job_memory"), walltime=pick("walltime"), partition=pick("partition"),
        account=pick("account"), directives=tuple(pick("job_directive", "job_directives") or ()),
        insecure=bool(given.get("insecure_plain_tcp")), tls_ca_file=pick("tls_ca_file"), tls_cert=pick("tls_cert"),
        tls_key=pick("tls_key"))


def _write_batch_script(path: str, name: str, spec) -> None:
    """``--sbatch FILE``: the coordinator's batch script for this very command line (without ``--sbatch``)."""
    from foldfarm.batch import coordinator_script, without_option

    if spec.slurm is None and spec.scheduler is None:
        fail("--sbatch writes a coordinator job for worker jobs or a scheduler elsewhere: add --cluster slurm "
             "--jobs N (or --scheduler ADDRESS)")
    if "run" not in sys.argv:
        fail("--sbatch writes the command line it was given: use it from a shell")
    arguments = without_option(sys.argv[sys.argv.index("run") + 1:], "--sbatch")
    request = spec.slurm
    text = coordinator_script(sys.executable, arguments, name=name.replace(" ", "-"), cwd=os.getcwd(),
                              partition=request.partition if request else None,
                              account=request.account if request else None)
    _write_file(path, lambda handle: handle.write(text))
    os.chmod(path, 0o700)
    typer.echo(f"wrote {path}; submit it with: sbatch {path}   (add --time=... for the coordinator's walltime)",
               err=True)


def _cluster_ready(spec) -> dict | None:
    """Check the cluster of ``spec`` before the store opens; return a scheduler's identity (None: no scheduler yet).

    A scheduler is probed now (:func:`foldfarm.run.probe_scheduler`), so a
    wrong address ends in one line with nothing written to the store.  For
    a local cluster, with ``--workers`` checked, the workers' fork server
    starts now: it loads Dask and the kernel (about a second, on the other
    core) while this process opens the store, imports Dask and starts the
    scheduler: 0.25 s off the start of a local run (3x8 runs, 8 each,
    median 1.98 s started after the store opened, 1.74 s before;
    :func:`foldfarm.run.start_fork_server`).  Not before the arguments are
    checked: the server holds this process's stdout and stderr until it has
    loaded, so a command that fails keeps a caller who reads its output
    through a pipe waiting that long (it does for a bad store URL or an
    unknown run id).  A ``tcp://`` scheduler outside loopback gets its
    warning line before it is reached.  SLURM and the worker jobs asked of
    it are checked too (:func:`foldfarm.slurm.check`).
    """
    from foldfarm.run import local_workers, probe_scheduler, scheduler_security, start_fork_server
    from foldfarm.security import plain_warning

    if spec.slurm is not None:
        from foldfarm import slurm
        from foldfarm.worker import DASK_SETTINGS

        slurm.check(spec.slurm, DASK_SETTINGS)
        return None
    if spec.scheduler is not None:
        if spec.workers is not None:
            fail("--workers sets the size of a local cluster; a scheduler brings its own workers: give one or "
                 "the other")
        warning = plain_warning(spec.scheduler)
        if warning:
            typer.echo(warning, err=True)
        return probe_scheduler(spec.scheduler, security=scheduler_security(spec))
    local_workers(spec.workers)  # the last argument to check
    start_fork_server()
    return None


def _run_id(text: str) -> int:
    if not text.isdigit() or int(text) < 1:
        fail(f"{text!r} is not a run id: run ids are positive whole numbers (see foldfarm status)")
    return int(text)


@app.command("resume")
@user_errors
def resume_cmd(
    run: str = typer.Argument(..., metavar="RUN", help="Run id (see foldfarm status)."),
    store: str = StoreOpt,
    workers: str = WorkersOpt,
    scheduler: str = SchedulerOpt,
    cluster: str = ClusterOpt,
    jobs: str = JobsOpt,
    job_cores: str = JobCoresOpt,
    job_memory: str = JobMemoryOpt,
    walltime: str = WalltimeOpt,
    partition: str = PartitionOpt,
    account: str = AccountOpt,
    job_directive: list[str] = JobDirectiveOpt,
    insecure_plain_tcp: bool = InsecureOpt,
    tls_ca_file: str = TlsCaOpt,
    tls_cert: str = TlsCertOpt,
    tls_key: str = TlsKeyOpt,
    as_json: bool = JsonOpt,
    quiet: bool = QuietOpt,
    take_over: bool = TakeOverOpt,
) -> None:
    """Continue a stopped or crashed run where its store says it stands, on the search tree it was planned on."""
    from foldfarm.symmetry import tree_of

    run_id = _run_id(run)
    workers = _whole(workers, "--workers", 1)
    spec = _cluster_spec({}, scheduler=scheduler, workers=workers, cluster=cluster, jobs=jobs, job_cores=job_cores,
                         job_memory=job_memory, walltime=walltime, partition=partition, account=account,
                         job_directive=job_directive, insecure_plain_tcp=insecure_plain_tcp,
                         tls_ca_file=tls_ca_file, tls_cert=tls_cert, tls_key=tls_key)
    identity = _cluster_ready(spec)
    opened = _open_store(store)
    try:
        tree_of(opened.get_run(run_id).settings)  # a tree this version cannot search: say so before the cluster starts
        _drive(opened, run_id, spec, identity, as_json, quiet, take_over)
    finally:
        opened.close()


@app.command("status")
@user_errors
def status_cmd(
    run: str = typer.Argument(None, metavar="[RUN]", help="Run id: show that run in detail (default: list the runs)."),
    store: str = StoreOpt,
    as_json: bool = JsonOpt,
) -> None:
    """List the runs in a store, or show one RUN: state, progress, total so far, checks."""
    if run is not None:
        _run_status(_run_id(run), store, as_json)
        return
    opened = _open_store(store)
    try:
        runs = opened.list_runs()
    finally:
        opened.close()
    if as_json:
        emit_json({"runs": [
            {"run": r.id, "shape": r.shape, "state": r.state, "done": r.done, "pending": r.pending,
             "running": r.running, "split": r.split, "failed": r.failed, "counted": r.counted, "total": r.total}
            for r in runs]})
        return
    if not runs:
        typer.echo("no runs in this store")
        return
    typer.echo(f"{'run':>5}  {'shape':<10} {'state':<9} {'done':>9} {'pending':>9} {'split':>7} {'failed':>6}  counted")
    for r in runs:
        typer.echo(f"{r.id:>5}  {r.shape:<10} {r.state:<9} {r.done:>9,} {r.pending + r.running:>9,} {r.split:>7,} "
                   f"{r.failed:>6,}  {r.total if r.total is not None else r.counted}")


@app.command("upgrade")
@user_errors
def upgrade_cmd(store: str = StoreOpt) -> None:
    """Upgrade a store made by an older foldfarm to this version's schema, in one transaction."""
    from foldfarm.store import upgrade_store

    typer.echo(upgrade_store(store))


# ---- checks and queries -----------------------------------------------------------------

def _whole(text: str | None, option: str, minimum: int = 0) -> int | None:
    """``text`` as a whole number >= ``minimum`` (None stays None); one line and exit 2 otherwise."""
    if text is None:
        return None
    value = text.strip()
    if not value.lstrip("-").isdigit() or int(value) < minimum:
        fail(f"{option} must be a whole number of at least {minimum}, not {text!r}")
    return int(value)


def _write_file(path: str, write: Callable) -> None:
    """Write a file through ``write(handle)``: all of it or, on any error, nothing (via a temporary file)."""
    import os

    partial = f"{path}.partial"
    try:
        with open(partial, "w", newline="", encoding="utf-8") as handle:
            write(handle)
        os.replace(partial, path)
    except OSError as exc:
        try:
            os.unlink(partial)
        except OSError:
            pass
        fail(f"cannot write {path}: {exc.strerror or exc}")


def _run_status(run_id: int, store: str | None, as_json: bool) -> None:
    from foldfarm import report

    opened = _open_store(store)
    try:
        run = opened.get_run(run_id)
        detail = report.run_detail(run, opened.progress(run_id), opened.audit_summary(run_id), opened.lease(run_id))
    finally:
        opened.close()
    if as_json:
        emit_json(detail)
    else:
        typer.echo("\n".join(report.detail_lines(detail)))


@app.command("verify")
@user_errors
def verify_cmd(
    run: str = typer.Argument(..., metavar="RUN", help="Run id (see foldfarm status)."),
    store: str = StoreOpt,
    workers: str = WorkersOpt,
    scheduler: str = SchedulerOpt,
    audit: str = typer.Option(None, "--audit", help="Fraction of done tasks to count again on another worker "
                              "(default: the run's setting, 0.01; 0: no audit, no cluster)."),
    transpose: bool = typer.Option(False, "--transpose", help="Also count the map with its sides in another order."),
    seed: str = typer.Option(None, "--seed", help="Seed that picks the audited tasks (default: a fresh one)."),
    as_json: bool = JsonOpt,
    quiet: bool = QuietOpt,
) -> None:
    """Check RUN's total (completeness, divisibility, audit, published values, certificate); exit 1 if a check fails."""
    import secrets

    from foldfarm import check, report
    from foldfarm import run as runner

    run_id = _run_id(run)
    workers = _whole(workers, "--workers", 1)
    chosen_seed = _whole(seed, "--seed")
    chosen_seed = secrets.randbelow(2**31) if chosen_seed is None else chosen_seed
    opened = _open_store(store)
    try:
        info = opened.get_run(run_id)
        fraction = check.parse_fraction(info.settings.get("audit", check.DEFAULT_AUDIT) if audit is None else audit)
        # Only audits and the transposed run need a cluster.
        with (runner.connected(scheduler, workers) if fraction > 0 or transpose else nullcontext()) as client:
            checks = check.verify_run(opened, run_id, client=client, audit_fraction=fraction, seed=chosen_seed,
                                      recount=runner.recounter(opened, client) if transpose else None)
        info = opened.get_run(run_id)
    finally:
        opened.close()
    ok = check.passed(checks)
    if as_json:
        emit_json({"run": run_id, "shape": info.shape, "state": info.state, "passed": ok,
                   "total": checks["total"]["value"], "certificate": checks["certificate"]["digest"],
                   "checks": checks})
    else:
        typer.echo(f"run {run_id}: {info.shape}, total {checks['total']['value']}")
        if not quiet:
            typer.echo("\n".join(report.check_lines(checks)))
        typer.echo(f"certificate {checks['certificate']['digest']}")
        if info.state not in check.FINISHED:
            typer.echo(f"run {run_id}: {info.state}, not finished: nothing stored")
        else:
            typer.echo(report.verdict_line(run_id, info.state, checks))
    if not ok:
        raise typer.Exit(1)


@app.command("tasks")
@user_errors
def tasks_cmd(
    run: str = typer.Argument(..., metavar="RUN", help="Run id (see foldfarm status)."),
    store: str = StoreOpt,
    state: list[str] = typer.Option(None, "--state", help="Only tasks in this state (repeatable): pending, "
                                    "running, done, split, failed."),
    sort: str = typer.Option("id", "--sort", help="id, time (seconds spent, longest first), count (largest "
                             "first) or finished (latest first)."),
    limit: str = typer.Option("20", "--limit", help="Show at most this many tasks (0: all)."),
    as_json: bool = JsonOpt,
) -> None:
    """List RUN's tasks, filtered by state and sorted by id, time, count or finishing time."""
    from foldfarm import report

    run_id = _run_id(run)
    most = _whole(limit, "--limit")
    opened = _open_store(store)
    try:
        tasks = opened.tasks(run_id, state or (), sort, most or None)
    finally:
        opened.close()
    if as_json:
        emit_json({"run": run_id, "tasks": [report.task_dict(t) for t in tasks]})
    else:
        typer.echo("\n".join(report.task_lines(tasks)))


@app.command("export")
@user_errors
def export_cmd(
    run: str = typer.Argument(..., metavar="RUN", help="Run id (see foldfarm status)."),
    store: str = StoreOpt,
    fmt: str = typer.Option("json", "--format", help="json (the run, its audits and tasks) or csv (one table)."),
    as_json: bool = typer.Option(False, "--json", help="Same as --format json."),
    table: str = typer.Option("tasks", "--table", help="CSV table: tasks, run or audits."),
    output: str = typer.Option(None, "--output", "-o", help="Write to this file (default: standard output)."),
) -> None:
    """Export RUN and its tasks as JSON or CSV, with exact integers."""
    from foldfarm import report

    if fmt not in ("json", "csv"):
        fail(f"--format must be json or csv, not {fmt!r}")
    if as_json and fmt == "csv":
        fail("--json and --format csv contradict each other; give one")
    if table not in ("tasks", "run", "audits"):
        fail(f"--table must be tasks, run or audits, not {table!r}")
    run_id = _run_id(run)
    opened = _open_store(store)
    try:
        info = opened.get_run(run_id)
        detail = report.run_detail(info, opened.progress(run_id), opened.audit_summary(run_id))

        def write(handle) -> None:
            if fmt == "json":
                report.write_json(handle, detail, opened.audits(run_id), opened.iter_tasks(run_id))
            elif table == "run":
                report.write_csv(handle, report.RUN_COLUMNS, [report.run_row(detail)])
            elif table == "audits":
                rows = ({**vars(a), "audited_at": report.when(a.audited_at)} for a in opened.audits(run_id))
                report.write_csv(handle, report.AUDIT_COLUMNS, rows)
            else:
                report.write_csv(handle, report.TASK_COLUMNS, (report.task_dict(t) for t in opened.iter_tasks(run_id)))

        if output is None:
            write(sys.stdout)
        else:
            _write_file(output, write)
    finally:
        opened.close()


@app.command("sweep")
@user_errors
def sweep_cmd(
    family: str = typer.Argument(..., metavar="FAMILY", help="Family of shapes: a shape with N for the varying side (3xN, NxN) "
                                 "or S^N for N sides of S (2^N)."),
    first: str = typer.Option("1", "--from", help="First index N."),
    last: str = typer.Option(..., "--to", help="Last index N."),
    store: str = StoreOpt,
    workers: str = WorkersOpt,
    scheduler: str = SchedulerOpt,
    task_seconds: str = TaskSecondsOpt,
    task_nodes: str = TaskNodesOpt,
    fresh: bool = typer.Option(False, "--fresh", help="Count every member anew, even if the store has a run of it."),
    table: str = typer.Option(None, "--table", help="Also write 'index value' lines to this file."),
    as_json: bool = JsonOpt,
    quiet: bool = QuietOpt,
) -> None:
    """Count a family of shapes as runs in one store; tabulate values, checks and published values."""
    from foldfarm import run as runner
    from foldfarm import sweep

    shapes = sweep.members(sweep.parse_family(family), _whole(first, "--from", 1), _whole(last, "--to", 1))
    workers = _whole(workers, "--workers", 1)
    settings = runner.Settings.from_dict(_budget(task_seconds, task_nodes))

    def show(row) -> None:
        if not (quiet or as_json):
            typer.echo(f"N={row.index} {row.shape}: {row.count} (run {row.run}, {row.state})", err=True)

    opened = _open_store(store, create=True)
    try:
        with runner.connected(scheduler, workers) as client:
            rows = sweep.sweep(opened, client, shapes, settings, fresh=fresh, on_row=show)
    finally:
        opened.close()
    if table is not None:
        _write_file(table, lambda handle: handle.write("".join(f"{line}\n" for line in sweep.sequence_lines(rows))))
    if as_json:
        emit_json({"family": family, "members": [r.as_json() for r in rows]})
    else:
        typer.echo("\n".join(sweep.table_lines(rows)))
    if any(r.failed for r in rows):
        raise typer.Exit(1)


@app.command("estimate", context_settings={"ignore_unknown_options": True})
@user_errors
def estimate_cmd(
    shape: str = typer.Argument(..., metavar="SHAPE", help="Map shape, e.g. 8x8."),
    probes: str = typer.Option(None, "--probes", help="Random probes in all (default 5,000,000)."),
    seed: str = typer.Option("0", "--seed", help="Seed of the probes: the same seed gives the same estimate."),
    cores: str = typer.Option(None, "--cores", help="Cores to project the wall time for (default: this machine's)."),
    given_order: bool = typer.Option(False, "--given-order", help="Search the sides in the order given."),
    as_json: bool = typer.Option(False, "--json", help="Print one JSON object."),
) -> None:
    """Estimate the foldings of SHAPE, the size of its search and the cost of counting it (Knuth's probes)."""
    from foldfarm.shape import parse_shape

    parsed = parse_shape(shape)
    n_probes = _whole(probes, "--probes", 1)
    n_seed = _whole(seed, "--seed", 0)
    n_cores = _whole(cores, "--cores", 1) or os.cpu_count() or 1
    from foldfarm import estimate, kernel

    kernel.warm()
    tables = kernel.prepare(parsed, "given" if given_order else "fast")
    est = estimate.estimate(tables, n_probes or estimate.DEFAULT_PROBES, n_seed)
    spend = estimate.cost(est, estimate.calibrate(tables, seed=n_seed), n_cores)
    if as_json:
        emit_json({"shape": parsed.text, "cells": parsed.cells, "side_order": "x".join(map(str, tables.sides)) or "1",
                   "tree": tables.tree, **estimate.as_json(est, spend)})
    else:
        for line in estimate.describe(parsed.text, est, spend):
            typer.echo(line)


def usage_line(exc) -> str:
    """A click usage error (unknown option, bad value, missing argument) as one line.

    Commands that take a shape accept unknown options as arguments (so that
    ``-2x3`` reaches the shape parser, which explains it); a misspelt option
    then arrives as an extra argument, and is named as the option it is.
    """
    import difflib
    import re

    ctx = exc.ctx
    where = ctx.command_path if ctx is not None else "foldfarm"
    message = " ".join(exc.format_message().split())
    extra = re.fullmatch(r"Got unexpected extra argument(?:s|\(s\))? \((-\S*).*\)", message)
    if extra and ctx is not None:
        known = [o for p in ctx.command.params for o in p.opts if o.startswith("--")]
        close = difflib.get_close_matches(extra[1].split("=")[0], known, n=1)
        message = f"No such option: {extra[1]}" + (f" (did you mean {close[0]}?)" if close else "")
    return f"{message.rstrip('.')}; see {where} --help"


def main() -> None:
    """Console-script entry point."""
    try:  # typer 0.29 and later carry their own copy of click
        from typer._click import exceptions as clicks
    except ImportError:
        from click import exceptions as clicks

    try:
        code = app(standalone_mode=False)
    except clicks.NoArgsIsHelpError as exc:  # a bare command: its help, as typer shows it
        from typer import rich_utils

        rich_utils.rich_format_error(exc)
        code = 2
    except clicks.UsageError as exc:
        typer.echo(f"foldfarm: {usage_line(exc)}", err=True)
        code = 2
    except typer.Abort:  # (not in the exceptions module of the click that typer 0.29 carries)
        code = 130
    except KeyboardInterrupt:
        typer.echo("foldfarm: interrupted", err=True)
        code = 130
    finally:
        # Every command has written and closed everything by now.  Freezing the collector's
        # objects spares the interpreter's final collections over everything numba, Dask and
        # SQLAlchemy created: exit takes milliseconds instead of about 0.7 s.
        gc.freeze()
    sys.exit(code if isinstance(code, int) else 0)


if __name__ == "__main__":
    main()

"""The ``foldfarm`` command line (typer).  Thin: parse, call, print.

Every user error (:class:`foldfarm.errors.UserError`) becomes one line on
stderr, ``foldfarm: <message>``, and exit code 2.
"""

from __future__ import annotations

import functools
import json
import sys
import time
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
    """Turn :class:`UserError` raised by a command into :func:`fail`."""

    @functools.wraps(fn)
    def wrapper(*args, **kwargs):
        try:
            return fn(*args, **kwargs)
        except UserError as exc:
            fail(str(exc))

    return wrapper


def emit_json(obj: dict) -> None:
    """One JSON object on stdout; integers stay exact."""
    typer.echo(json.dumps(obj))


@app.command("count", context_settings={"ignore_unknown_options": True})
@user_errors
def count_cmd(
    shape: str = typer.Argument(..., help="Map shape, e.g. 3x5 or 2x2x2."),
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


def _open_store(url: str | None):
    from foldfarm.store import Store

    return Store(url)


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


def _drive(store, run_id: int, scheduler, workers, as_json: bool, quiet: bool, take_over: bool,
           new_shape: str | None = None, settings=None) -> None:
    import signal

    from foldfarm import run as runner

    def terminate(signum, frame):  # a batch system's SIGTERM stops the run as cleanly as Ctrl-C
        raise KeyboardInterrupt

    signal.signal(signal.SIGTERM, terminate)
    client, cluster = runner.connect(scheduler, workers)
    try:
        if not (quiet or as_json):
            typer.echo(f"dashboard: {client.dashboard_link}", err=True)
        if new_shape is not None:
            threads = max(1, sum(client.nthreads().values()))
            run_id = runner.create(store, new_shape, settings, threads)
            if not (quiet or as_json):
                typer.echo(f"run {run_id}: {new_shape} planned in {store.display_url}", err=True)
        show, live = _show_progress(quiet or as_json)
        try:
            if live is not None:
                with live:
                    summary = runner.drive(store, client, run_id, take_over=take_over, on_progress=show)
            else:
                summary = runner.drive(store, client, run_id, take_over=take_over)
        except runner.Stopped:
            typer.echo(f"foldfarm: stopped run {run_id}; resume with: foldfarm resume {run_id} "
                       f"--store {store.display_url}", err=True)
            raise typer.Exit(130)
    finally:
        client.close()
        if cluster is not None:
            cluster.close()
    if as_json:
        emit_json(summary.as_json())
    else:
        typer.echo(summary.count if summary.count is not None else f"run {summary.run}: {summary.state}")
    if summary.count is None:
        typer.echo(f"foldfarm: run {summary.run} is not finished: {summary.failed:,} tasks failed "
                   f"(foldfarm resume {summary.run} runs them again)", err=True)
        raise typer.Exit(1)
        if not quiet:
            typer.echo(f"run {summary.run}: {summary.shape}, {summary.tasks:,} tasks done ({summary.splits:,} split), "
                       f"{summary.nodes:,} nodes, {summary.core_seconds:,.1f} core-s, {summary.seconds:,.1f} s",
                       err=True)


@app.command("run", context_settings={"ignore_unknown_options": True})
@user_errors
def run_cmd(
    target: str = typer.Argument(..., help="Map shape (e.g. 3x8) or job file (e.g. jobs/tern-3x8.toml)."),
    store: str = StoreOpt,
    workers: int = WorkersOpt,
    scheduler: str = SchedulerOpt,
    task_seconds: float = typer.Option(None, "--task-seconds", help="Budget of one task in seconds (default 120)."),
    task_nodes: int = typer.Option(None, "--task-nodes", help="Budget of one task in search nodes (default: none)."),
    tasks: int = typer.Option(None, "--tasks", help="Tasks to plan (default: 64 per worker thread, at least 256)."),
    given_order: bool = typer.Option(False, "--given-order", help="Search the sides in the order given."),
    as_json: bool = JsonOpt,
    quiet: bool = QuietOpt,
) -> None:
    """Count SHAPE (or a job file's shape) on a Dask cluster, checkpointing every task in the store."""
    from foldfarm.job import is_job_file, load_job
    from foldfarm.run import Settings
    from foldfarm.shape import parse_shape

    values: dict = {}
    if is_job_file(target):
        job = load_job(target)
        shape_text = job.shape
        values.update(job.settings)
        values.pop("name", None)
        store = store or job.store
        scheduler = scheduler or job.scheduler
        workers = workers or job.workers
    else:
        shape_text = parse_shape(target).text
    for key, value in (("task_seconds", task_seconds), ("task_nodes", task_nodes), ("tasks", tasks)):
        if value is not None:
            if value < 0:
                fail(f"--{key.replace('_', '-')} must not be negative")
            values[key] = value
    if given_order:
        values["order"] = "given"
    settings = Settings.from_dict(values)
    opened = _open_store(store)
    try:
        _drive(opened, 0, scheduler, workers, as_json, quiet, False, new_shape=shape_text, settings=settings)
    finally:
        opened.close()


def _run_id(text: str) -> int:
    if not text.isdigit() or int(text) < 1:
        fail(f"{text!r} is not a run id: run ids are positive whole numbers (see foldfarm status)")
    return int(text)


@app.command("resume")
@user_errors
def resume_cmd(
    run: str = typer.Argument(..., help="Run id (see foldfarm status)."),
    store: str = StoreOpt,
    workers: int = WorkersOpt,
    scheduler: str = SchedulerOpt,
    as_json: bool = JsonOpt,
    quiet: bool = QuietOpt,
    take_over: bool = TakeOverOpt,
) -> None:
    """Continue a stopped or crashed run where its store says it stands."""
    run_id = _run_id(run)
    opened = _open_store(store)
    try:
        opened.get_run(run_id)
        _drive(opened, run_id, scheduler, workers, as_json, quiet, take_over)
    finally:
        opened.close()


@app.command("status")
@user_errors
def status_cmd(
    store: str = StoreOpt,
    as_json: bool = JsonOpt,
) -> None:
    """List the runs in a store: id, shape, state, tasks done and pending, foldings counted."""
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


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except KeyboardInterrupt:
        typer.echo("foldfarm: interrupted", err=True)
        sys.exit(130)


if __name__ == "__main__":
    main()

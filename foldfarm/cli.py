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


def main() -> None:
    """Console-script entry point."""
    try:
        app()
    except KeyboardInterrupt:
        typer.echo("foldfarm: interrupted", err=True)
        sys.exit(130)


if __name__ == "__main__":
    main()

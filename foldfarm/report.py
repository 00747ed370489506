"""What the query commands show: one run in detail, task listings, and exports to CSV and JSON.

Plain functions from store records to plain dicts and lines of text; the
command line (:mod:`foldfarm.cli`) prints them.

Exact integers.  ``--json`` output writes every integer as a JSON integer
(exact for Python, jq 1.7 and other big-number readers).  Exports are
meant for any reader, so there an integer above ``2**53 - 1`` (where
JavaScript and other readers that parse numbers as doubles round) is
written as a decimal string instead; :func:`exact` reads both back.  CSV
holds every value as text.  Times are UTC, ISO 8601 with a ``Z``.
"""

from __future__ import annotations

import csv
import json
from collections.abc import Iterable
from dataclasses import asdict
from datetime import datetime
from typing import IO

from foldfarm.store.queries import AuditRecord, TaskRecord
from foldfarm.symmetry import LEGACY_TREE

#: Largest integer every JSON reader keeps exactly (doubles have 53 bits).
SAFE_INT = 2**53 - 1
#: Format tag of an export document.
EXPORT_FORMAT = "foldfarm-export-1"
#: Columns of the run table of a CSV export.
RUN_COLUMNS = ("run", "shape", "side_order", "tree", "state", "created_at", "finished_at", "total", "counted", "tasks",
               "done", "split", "pending", "running", "failed", "nodes", "core_seconds", "verification",
               "certificate", *(f"check_{name}" for name in
                                ("total", "completeness", "divisibility", "audit", "published", "transpose",
                                 "certificate")))
TASK_COLUMNS = tuple(TaskRecord.__dataclass_fields__)
AUDIT_COLUMNS = tuple(AuditRecord.__dataclass_fields__)
#: Integer fields that an export writes with :func:`portable_int`.
_BIG = {"total", "counted", "count", "nodes", "recorded", "value", "stored"}


def portable_int(value: int | None) -> int | str | None:
    """``value`` as a JSON integer if every reader keeps it exactly, else as a decimal string.

    >>> portable_int(2**53 - 1), portable_int(2**53), portable_int(None)
    (9007199254740991, '9007199254740992', None)
    """
    if value is None or isinstance(value, bool) or not isinstance(value, int) or abs(value) <= SAFE_INT:
        return value
    return str(value)


def exact(value: int | str | None) -> int | None:
    """Read back a count written by :func:`portable_int` (or a CSV cell).

    >>> exact("9007199254740993"), exact(12), exact(""), exact(None)
    (9007199254740993, 12, None, None)
    """
    return None if value is None or value == "" else int(value)


def when(moment: datetime | None) -> str | None:
    """A stored (naive UTC) time as ISO 8601 with ``Z``."""
    return None if moment is None else moment.isoformat() + "Z"


def _portable(obj):
    """Deep copy of ``obj`` with the count-like integers made portable (see :func:`portable_int`)."""
    if isinstance(obj, dict):
        return {k: portable_int(v) if k in _BIG and isinstance(v, int) else _portable(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_portable(v) for v in obj]
    return obj


# --------------------------------------------------------------------------
# One run
# --------------------------------------------------------------------------

def run_detail(run, progress, audits: tuple[int, int], lease=None) -> dict:
    """One run as a plain dict: state, progress, total so far, checks (exact integers)."""
    tasks = dict(progress.tasks)
    known = sum(tasks.values())
    closed = tasks.get("done", 0) + tasks.get("split", 0)
    estimated = run.settings.get("estimated_nodes")
    return {
        "run": run.id,
        "shape": run.shape,
        "side_order": run.side_order,
        "tree": run.settings.get("tree", LEGACY_TREE),  # the search tree it was planned on (foldfarm.symmetry)
        "state": run.state,
        "created_at": when(run.created_at),
        "finished_at": when(run.finished_at),
        "settings": run.settings,
        "tasks": tasks,
        "known": known,
        "closed": closed,
        "nodes": progress.nodes,
        "estimated_nodes": estimated,
        "core_seconds": round(progress.core_seconds, 3),
        "counted": progress.counted,
        "total": run.total,
        "verification": run.verification,
        "certificate": run.certificate,
        "checks": run.checks,
        "audits": audits[0],
        "audit_mismatches": audits[1],
        "driver": None if lease is None else {"holder": lease.holder, "heartbeat_at": when(lease.heartbeat_at)},
    }


def _mark(ok) -> str:
    return {True: "ok", False: "FAIL", None: "-"}[ok]


def _names(checks: dict) -> list[str]:
    """Check names in the order they are reported (stored JSON sorts its keys)."""
    from foldfarm.check import CHECKS

    return [n for n in CHECKS if n in checks] + sorted(set(checks) - set(CHECKS))


def check_lines(checks: dict | None) -> list[str]:
    """One line per check: mark, name, detail."""
    if not checks:
        return ["  not verified yet (foldfarm verify RUN)"]
    return [f"  {_mark(checks[n].get('ok')):<4} {n:<13} {checks[n].get('detail', '')}" for n in _names(checks)]


def verdict_line(run_id: int, state: str, checks: dict) -> str:
    """The outcome of a run's checks in one line: the checks that failed, else those that passed.

    >>> verdict_line(3, "verified", {"total": {"ok": True}, "audit": {"ok": None}, "published": {"ok": True}})
    'run 3: verified: total, published passed'
    >>> verdict_line(3, "suspect", {"total": {"ok": True}, "divisibility": {"ok": False}})
    'run 3: suspect: divisibility failed'
    """
    failed = [n for n in _names(checks) if checks[n].get("ok") is False]
    if failed:
        return f"run {run_id}: {state}: {', '.join(failed)} failed"
    return f"run {run_id}: {state}: {', '.join(n for n in _names(checks) if checks[n].get('ok'))} passed"


def verdict_lines(run_id: int, state: str, checks: dict) -> list[str]:
    """What a finished run closes with: :func:`verdict_line`, then each failed check with its detail."""
    failed = {n: c for n, c in checks.items() if c.get("ok") is False}
    return [verdict_line(run_id, state, checks)] + (check_lines(failed) if failed else [])


def detail_lines(d: dict, now: datetime | None = None) -> list[str]:
    """The text of ``foldfarm status RUN``."""
    t = d["tasks"]
    lines = [f"run {d['run']}: {d['shape']} (searched as {d['side_order']} on tree {d['tree']}), {d['state']}",
             f"  created {d['created_at']}" + (f", finished {d['finished_at']}" if d["finished_at"] else "")]
    share = f" ({100 * d['closed'] / d['known']:.1f}% of the tasks known so far)" if d["known"] else ""
    lines.append(f"  tasks: {t.get('done', 0):,} done, {t.get('split', 0):,} split, {t.get('pending', 0):,} pending, "
                 f"{t.get('running', 0):,} running, {t.get('failed', 0):,} failed{share}")
    nodes = f"  nodes: {d['nodes']:,}"
    if d["estimated_nodes"]:
        nodes += f" of about {d['estimated_nodes']:,.0f} estimated ({100 * d['nodes'] / d['estimated_nodes']:.1f}%)"
    lines.append(nodes + f"; {d['core_seconds']:,.1f} core-seconds")
    if d["total"] is not None:
        lines.append(f"  total: {d['total']}")
    else:
        lines.append(f"  counted so far: {d['counted']}")
    if d["driver"]:
        lines.append(f"  driven by {d['driver']['holder']}, last heartbeat {d['driver']['heartbeat_at']}")
    lines.append(f"  audits: {d['audits']} ({d['audit_mismatches']} disagreed)")
    if d["certificate"]:
        lines.append(f"  certificate: {d['certificate']}")
    lines.append(f"  checks ({d['verification']}):")
    return lines + check_lines(d["checks"])


# --------------------------------------------------------------------------
# Tasks
# --------------------------------------------------------------------------

def task_dict(t: TaskRecord) -> dict:
    """A task as a plain dict, times as text."""
    out = asdict(t)
    for key in ("created_at", "started_at", "finished_at"):
        out[key] = when(out[key])
    return out


def task_lines(tasks: list[TaskRecord]) -> list[str]:
    """The table of ``foldfarm tasks``."""
    if not tasks:
        return ["no tasks match"]
    width = max(8, max(len(t.prefix) for t in tasks))
    wide = max(2, max(len(str(t.id)) for t in tasks))  # a run's ids start at run x 10^10 (store schema 2)
    out = [f"{'id':>{wide}}  {'prefix':<{width}}  {'state':<7} {'count':>20} {'nodes':>14} {'seconds':>9}  worker"]
    for t in tasks:
        count = "" if t.count is None else str(t.count)
        nodes = "" if t.nodes is None else f"{t.nodes:,}"
        seconds = "" if t.seconds is None else f"{t.seconds:.3f}"
        out.append(f"{t.id:>{wide}}  {t.prefix:<{width}}  {t.state:<7} {count:>20} {nodes:>14} {seconds:>9}  "
                   f"{t.worker or ''}")
    return out


# --------------------------------------------------------------------------
# Exports
# --------------------------------------------------------------------------

def run_row(d: dict) -> dict:
    """The run table's one row (see :data:`RUN_COLUMNS`) from :func:`run_detail`."""
    checks = d["checks"] or {}
    row = {key: d.get(key) for key in RUN_COLUMNS if key in d}
    row.update({state: d["tasks"].get(state, 0) for state in ("done", "split", "pending", "running", "failed")})
    row["tasks"] = d["known"]
    marks = {True: "ok", False: "failed", None: "skipped"}
    for name in RUN_COLUMNS:
        check = name.removeprefix("check_")
        if check != name:
            row[name] = marks[checks[check].get("ok")] if check in checks else ""
    return row


def write_csv(out: IO[str], columns: Iterable[str], rows: Iterable[dict]) -> int:
    """Write a header and ``rows`` as CSV; return how many rows."""
    writer = csv.DictWriter(out, fieldnames=list(columns), extrasaction="ignore", lineterminator="\n")
    writer.writeheader()
    n = 0
    for row in rows:
        writer.writerow({k: "" if v is None else v for k, v in row.items()})
        n += 1
    return n


def write_json(out: IO[str], detail: dict, audits: list[AuditRecord], tasks: Iterable[TaskRecord]) -> int:
    """Write one export document, streaming the tasks; return how many tasks.

    ``{"format", "run", "audits", "tasks"}``; integers per :func:`portable_int`.
    """
    head = {"format": EXPORT_FORMAT, "run": _portable(detail),
            "audits": [_portable({**asdict(a), "audited_at": when(a.audited_at)}) for a in audits]}
    text = json.dumps(head)
    out.write(text[:-1] + ', "tasks": [')
    n = 0
    for task in tasks:
        out.write(("\n" if n == 0 else ",\n") + json.dumps(_portable(task_dict(task))))
        n += 1
    out.write("\n]}\n")
    return n

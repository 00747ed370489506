"""The query commands as a user runs them: status, tasks, export, verify and sweep in a subprocess.

Runs are counted by the kernel (tests/local_driver.py) and compared with
the published table (OEIS, named beside each value).
"""

from __future__ import annotations

import csv
import io
import json
import subprocess
import sys
from datetime import datetime

import pytest
from local_driver import count_here
from sqlalchemy import update

from foldfarm import report
from foldfarm.published import published
from foldfarm.store import Store, TaskRecord
from foldfarm.store.models import Task

SHAPE = "3x4"
(PUBLISHED,) = published(SHAPE)  # OEIS A001416


def foldfarm(*args: str, timeout: float = 180) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "foldfarm", *args], capture_output=True, text=True, timeout=timeout)


def assert_one_line_error(out: subprocess.CompletedProcess, *words: str) -> None:
    assert out.returncode == 2, (out.stdout, out.stderr)
    assert out.stdout == "" and "Traceback" not in out.stderr
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("foldfarm: "), out.stderr
    for word in words:
        assert word in lines[0], lines[0]


@pytest.fixture
def filled(new_store_url):
    """A store URL holding one verified run of SHAPE; yields (url, run id)."""
    url = new_store_url()
    with Store(url) as store:
        run_id = count_here(store, SHAPE)
    return url, run_id


@pytest.fixture(scope="module")
def sqlite_filled(tmp_path_factory):
    """A SQLite store with run 1 of SHAPE, shared by the tests of input checking."""
    url = f"sqlite:///{tmp_path_factory.mktemp('inputs') / 'tern.sqlite'}"
    with Store(url) as store:
        assert count_here(store, SHAPE) == 1
    return url


def test_status_lists_runs_and_shows_one(filled):
    url, run_id = filled
    runs = json.loads(foldfarm("status", "--store", url, "--json").stdout)["runs"]
    assert [(r["run"], r["total"]) for r in runs] == [(run_id, PUBLISHED.count)]
    out = foldfarm("status", str(run_id), "--store", url, "--json")
    assert out.returncode == 0, out.stderr
    detail = json.loads(out.stdout)
    assert detail["total"] == detail["counted"] == PUBLISHED.count, f"{SHAPE}: {PUBLISHED.source}"
    assert detail["state"] == "verified" and detail["tasks"]["pending"] == 0 and detail["closed"] == detail["known"]
    assert detail["certificate"].startswith("sha256:") and detail["driver"] is None
    assert PUBLISHED.source in detail["checks"]["published"]["detail"]
    text = foldfarm("status", str(run_id), "--store", url).stdout
    assert f"total: {PUBLISHED.count}" in text and PUBLISHED.source in text and "verified" in text
    names = [line.split()[1] for line in text.splitlines() if line.startswith(("  ok ", "  -  ", "  FAIL"))]
    assert names == ["total", "completeness", "divisibility", "audit", "published", "transpose", "certificate"]


def test_tasks_are_filtered_and_sorted(filled):
    url, run_id = filled
    out = foldfarm("tasks", str(run_id), "--store", url, "--state", "split", "--sort", "count", "--limit", "3",
                   "--json")
    assert out.returncode == 0, out.stderr
    tasks = json.loads(out.stdout)["tasks"]
    assert len(tasks) == 3 and {t["state"] for t in tasks} == {"split"}
    assert [t["count"] for t in tasks] == sorted((t["count"] for t in tasks), reverse=True)
    everything = json.loads(foldfarm("tasks", str(run_id), "--store", url, "--limit", "0", "--json").stdout)["tasks"]
    assert sum(t["count"] for t in everything if t["state"] in ("done", "split")) == PUBLISHED.count
    assert [t["id"] for t in everything] == sorted(t["id"] for t in everything)
    text = foldfarm("tasks", str(run_id), "--store", url, "--state", "done", "--state", "split", "--sort", "time")
    assert text.returncode == 0 and len(text.stdout.splitlines()) == 21  # header and the default 20
    assert foldfarm("tasks", str(run_id), "--store", url, "--state", "failed").stdout.strip() == "no tasks match"


def test_json_export_round_trips_exact_integers(filled):
    url, run_id = filled
    out = foldfarm("export", str(run_id), "--store", url)
    assert out.returncode == 0, out.stderr
    doc = json.loads(out.stdout)
    assert doc["format"] == report.EXPORT_FORMAT and doc["run"]["run"] == run_id
    counts = [report.exact(t["count"]) for t in doc["tasks"] if t["state"] in ("done", "split")]
    assert all(type(t["count"]) is int for t in doc["tasks"])  # small counts stay JSON integers
    assert sum(counts) == report.exact(doc["run"]["total"]) == PUBLISHED.count, PUBLISHED.source
    with Store(url) as store:
        assert [t["id"] for t in doc["tasks"]] == [t.id for t in store.tasks(run_id)]
        assert doc["run"]["certificate"] == store.get_run(run_id).certificate


def test_csv_export_round_trips_exact_integers(filled, tmp_path):
    url, run_id = filled
    path = tmp_path / "tern-3x4-tasks.csv"
    out = foldfarm("export", str(run_id), "--store", url, "--format", "csv", "--output", str(path))
    assert out.returncode == 0 and out.stdout == "", out.stderr
    rows = list(csv.DictReader(path.open()))
    assert list(rows[0]) == list(report.TASK_COLUMNS)
    assert sum(int(r["count"]) for r in rows if r["state"] in ("done", "split")) == PUBLISHED.count
    assert not (tmp_path / "tern-3x4-tasks.csv.partial").exists()
    run_rows = list(csv.DictReader(io.StringIO(foldfarm("export", str(run_id), "--store", url, "--format", "csv",
                                                        "--table", "run").stdout)))
    assert len(run_rows) == 1 and int(run_rows[0]["total"]) == PUBLISHED.count
    assert run_rows[0]["check_published"] == "ok" and run_rows[0]["check_audit"] == "skipped"
    audits = foldfarm("export", str(run_id), "--store", url, "--format", "csv", "--table", "audits").stdout
    assert audits.splitlines() == [",".join(report.AUDIT_COLUMNS)]


def test_exports_write_each_task_as_it_is_read_and_the_same_bytes_as_from_the_whole_list(filled):
    """An export of a run of any size holds one task at a time: the writers write a task before they read the
    next one, and the command's streamed output is byte for byte what the writers make of the whole list."""
    url, run_id = filled
    with Store(url) as store:
        tasks = store.tasks(run_id)  # the whole list, in id order
        detail = report.run_detail(store.get_run(run_id), store.progress(run_id), store.audit_summary(run_id))
        audits = store.audits(run_id)
    whole_json, whole_csv = io.StringIO(), io.StringIO()
    report.write_json(whole_json, detail, audits, tasks)
    report.write_csv(whole_csv, report.TASK_COLUMNS, (report.task_dict(t) for t in tasks))
    assert foldfarm("export", str(run_id), "--store", url).stdout == whole_json.getvalue()
    assert foldfarm("export", str(run_id), "--store", url, "--format", "csv").stdout == whole_csv.getvalue()

    def one_at_a_time(out: io.StringIO, written: str):
        for n, task in enumerate(tasks):
            if n:  # the previous task is out before this one is handed over
                assert written.format(tasks[n - 1].id) in out.getvalue()
            yield task

    out = io.StringIO()
    assert report.write_json(out, detail, audits, one_at_a_time(out, '{{"id": {}, ')) == len(tasks)
    assert out.getvalue() == whole_json.getvalue()
    out = io.StringIO()
    report.write_csv(out, report.TASK_COLUMNS, (report.task_dict(t) for t in one_at_a_time(out, "\n{},")))
    assert out.getvalue() == whole_csv.getvalue()


def test_export_keeps_integers_beyond_double_precision_exact():
    """JSON readers that use doubles round above 2**53, so the export writes such integers as text."""
    moment = datetime(2026, 1, 2, 3, 4, 5)
    big = 2**62 + 1  # not a folding count: an integer a double cannot hold
    task = TaskRecord(7, "/1/2", "done", big, 2**53 + 1, 1.5, 1, "tcp://127.0.0.1:9", None, 2, None, moment, moment,
                      moment)
    detail = {"run": 1, "total": 3 * big, "counted": 3 * big, "checks": {"total": {"ok": True, "value": 3 * big}}}
    out = io.StringIO()
    assert report.write_json(out, detail, [], [task, task]) == 2
    doc = json.loads(out.getvalue())
    assert doc["run"]["total"] == str(3 * big) and report.exact(doc["run"]["total"]) == 3 * big
    assert report.exact(doc["run"]["checks"]["total"]["value"]) == 3 * big
    assert [report.exact(t["count"]) for t in doc["tasks"]] == [big, big]
    assert doc["tasks"][0]["nodes"] == str(2**53 + 1) and doc["tasks"][0]["id"] == 7
    assert doc["tasks"][0]["finished_at"] == "2026-01-02T03:04:05Z"
    text = io.StringIO()
    report.write_csv(text, report.TASK_COLUMNS, [report.task_dict(task)])
    assert int(next(csv.DictReader(io.StringIO(text.getvalue())))["count"]) == big


@pytest.mark.parametrize("command", [["status"], ["tasks"], ["export"], ["export", "--format", "csv"],
                                     ["verify", "--audit", "0"]])
def test_a_missing_run_is_one_line(filled, command):
    url, _ = filled
    out = foldfarm(command[0], "999", *command[1:], "--store", url)
    assert_one_line_error(out, "no run 999")


@pytest.mark.parametrize("args, words", [
    (["tasks", "1", "--state", "finished"], ["'finished' is not a task state"]),
    (["tasks", "1", "--sort", "size"], ["cannot sort tasks by 'size'"]),
    (["tasks", "1", "--limit", "ten"], ["--limit must be a whole number"]),
    (["tasks", "one"], ["is not a run id"]),
    (["status", "0"], ["is not a run id"]),
    (["export", "1", "--format", "xml"], ["--format must be json or csv"]),
    (["export", "1", "--table", "leases"], ["--table must be"]),
    (["verify", "1", "--audit", "2"], ["audit fraction"]),
    (["verify", "1", "--audit", "0", "--seed", "x"], ["--seed"]),
    (["sweep", "3xM", "--to", "3"], ["not a family"]),
    (["sweep", "3xN", "--to", "0"], ["--to"]),
    (["sweep", "3xN", "--from", "5", "--to", "2"], ["must not be below"]),
    (["sweep", "NxN", "--to", "40"], ["N=33", "cells"]),
    (["sweep", "1^N", "--to", "4"], ["single cell"]),
])
def test_bad_input_is_one_line(sqlite_filled, args, words):
    out = foldfarm(*args, "--store", sqlite_filled)
    assert_one_line_error(out, *words)


def test_verify_passes_then_fails_after_tampering(filled):
    url, run_id = filled
    out = foldfarm("verify", str(run_id), "--store", url, "--audit", "0")
    assert out.returncode == 0, out.stderr
    assert PUBLISHED.source in out.stdout and out.stdout.strip().splitlines()[-1].startswith(f"run {run_id}: verified: total, completeness, divisibility")
    with Store(url) as store:
        certificate = store.get_run(run_id).certificate
        victim = store.tasks(run_id, ["done"], limit=1)[0]
        with store.engine.begin() as conn:
            conn.execute(update(Task).where(Task.id == victim.id).values(count=Task.count + 1))
    out = foldfarm("verify", str(run_id), "--store", url, "--audit", "0", "--json")
    assert out.returncode == 1, out.stderr
    result = json.loads(out.stdout)
    assert result["passed"] is False and result["state"] == "suspect"
    assert result["total"] == PUBLISHED.count + 1 and result["certificate"] != certificate
    assert {n for n, c in result["checks"].items() if c["ok"] is False} == \
        {"total", "divisibility", "published", "certificate"}
    text = foldfarm("verify", str(run_id), "--store", url, "--audit", "0")
    assert text.returncode == 1 and "FAIL published" in " ".join(text.stdout.split()) and victim.prefix in text.stdout


@pytest.mark.slow
def test_sweep_counts_a_family_beside_the_published_values(tmp_path):
    url = f"sqlite:///{tmp_path / 'halvorsen-2xN.sqlite'}"
    table = tmp_path / "2xN.txt"
    out = foldfarm("sweep", "2xN", "--from", "1", "--to", "5", "--workers", "1", "--store", url,
                   "--table", str(table), "--json")
    assert out.returncode == 0, out.stderr
    members = json.loads(out.stdout)["members"]
    assert [m["shape"] for m in members] == ["2x1", "2x2", "2x3", "2x4", "2x5"]
    for m in members:
        expected = [v for v in published(m["shape"]) if v.source == "OEIS A001415"]
        assert m["count"] == expected[0].count, f"{m['shape']}: OEIS A001415"
        assert m["state"] == "verified" and m["failed_checks"] == []
        assert {"count": m["count"], "source": "OEIS A001415"} in m["published"]
    assert table.read_text() == "".join(f"{m['index']} {m['count']}\n" for m in members)
    again = foldfarm("sweep", "2xN", "--to", "5", "--workers", "1", "--store", url)
    assert again.returncode == 0, again.stderr
    lines = again.stdout.splitlines()
    assert lines[0].split() == ["N", "shape", "run", "count", "checks", "published"]
    assert len(lines) == 6 and all("same (OEIS" in line and "A001415" in line for line in lines[1:])
    runs = json.loads(foldfarm("status", "--store", url, "--json").stdout)["runs"]
    assert len(runs) == 5  # the second sweep re-used the runs


def test_the_task_table_keeps_its_columns_under_their_headings_with_long_ids():
    """Schema 2 numbers run r's tasks from r x 10^10: the id column widens to the widest id."""
    when = datetime(2026, 12, 3)
    tasks = [TaskRecord(30000000012, "/1/2", "done", 48, 900, 0.5, 1, "tcp://127.0.0.1:1", None, 2, None, when,
                        when, when),
             TaskRecord(7, "/3", "pending", None, None, None, 0, None, None, 1, None, when, None, None)]
    header, *rows = report.task_lines(tasks)
    for heading in ("prefix", "state", "worker"):
        column = header.index(heading)
        assert rows[0][column - 1] == " " and rows[0][column] != " ", (heading, header, rows[0])
    assert header.index("id") + 2 == len(str(tasks[0].id)) == rows[1].index("7") + 1

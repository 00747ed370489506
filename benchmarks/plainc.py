"""Build and run the plain-C baseline (``lunnon1971.c``) for kernel benchmarks.

``build(workdir)`` compiles the transcription with plain ``gcc -O3`` and
returns the binary's path; ``run(binary, sides)`` counts one shape and
returns ``(count, seconds)``, where seconds is the binary's own
CLOCK_MONOTONIC measurement of its search loop (table set-up and process
start-up excluded); ``run_timed`` also returns the CPU seconds of that loop
(CLOCK_PROCESS_CPUTIME_ID), which other processes on a shared machine
disturb far less.

Run this file directly for a self-check: it builds the binary in a
temporary directory and compares its counts with the published table
(foldfarm/data/published_counts.csv) and with the brute-force oracle in
tests/oracle.py.
"""

from __future__ import annotations

import csv
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

SOURCE = Path(__file__).resolve().with_name("lunnon1971.c")
REPO = Path(__file__).resolve().parents[1]
PUBLISHED_CSV = REPO / "foldfarm" / "data" / "published_counts.csv"

# The baseline is meant to be what a plain optimising build of a plain
# transcription gives, so no -march=native or other tuning flags.
CFLAGS = ["-O3"]


class PlainCError(RuntimeError):
    """The C baseline could not be built or did not run; the message is one line."""


def build(workdir: str | Path) -> Path:
    """Compile ``lunnon1971.c`` into ``workdir`` with ``gcc -O3``; return the binary path."""
    gcc = shutil.which("gcc")
    if gcc is None:
        raise PlainCError("gcc not found on PATH: the plain-C baseline needs gcc to build lunnon1971.c")
    out = Path(workdir) / "lunnon1971"
    out.parent.mkdir(parents=True, exist_ok=True)
    proc = subprocess.run([gcc, *CFLAGS, "-o", str(out), str(SOURCE)], capture_output=True, text=True)
    if proc.returncode != 0:
        first = (proc.stderr.strip().splitlines() or ["(no compiler output)"])[0]
        raise PlainCError(f"gcc failed to build {SOURCE.name}: {first}")
    return out


def run(binary: str | Path, sides: tuple[int, ...]) -> tuple[int, float]:
    """Count the foldings of ``sides`` with the C baseline.

    Returns ``(count, seconds)``: the number of foldings and the seconds the
    binary spent in its search loop.
    """
    count, seconds, _ = run_timed(binary, sides)
    return count, seconds


def run_timed(binary: str | Path, sides: tuple[int, ...]) -> tuple[int, float, float]:
    """:func:`run`, also returning the CPU seconds of the search loop: ``(count, seconds, cpu_seconds)``."""
    proc = subprocess.run([str(binary), *(str(p) for p in sides)], capture_output=True, text=True)
    if proc.returncode != 0:
        msg = proc.stderr.strip() or f"exit status {proc.returncode}"
        raise PlainCError(f"{Path(binary).name} {'x'.join(map(str, sides))}: {msg}")
    try:
        wall, cpu = proc.stderr.split()
        return int(proc.stdout.strip()), float(wall), float(cpu)
    except ValueError:
        raise PlainCError(
            f"{Path(binary).name} {'x'.join(map(str, sides))}: unexpected output "
            f"{proc.stdout.strip()!r} / {proc.stderr.strip()!r}"
        ) from None


def _published() -> dict[str, tuple[int, str]]:
    """``shape -> (count, source)`` from the project's published table."""
    with PUBLISHED_CSV.open(newline="") as fh:
        lines = [line for line in fh if line.strip() and not line.lstrip().startswith("#")]
    return {r["shape"]: (int(r["count"]), r["source"]) for r in csv.DictReader(lines)}


def _self_check() -> int:
    """Compare the baseline with published counts and the oracle; return an exit status."""
    sys.path.insert(0, str(REPO / "tests"))
    from oracle import count_by_permutations

    published = _published()
    failures = 0
    with tempfile.TemporaryDirectory() as tmp:
        binary = build(tmp)
        checks: list[tuple[tuple[int, ...], int, str]] = []
        for shape in ("1x5", "2x3", "3x3", "4x4", "3x5", "2x12", "3x8", "5x5"):
            count, source = published[shape]
            checks.append((tuple(int(p) for p in shape.split("x")), count, f"{source}, published_counts.csv"))
        # Shapes with no published row here (2x2x2 among them) are held to the oracle.
        for sides in [(2, 2, 2), (1, 2, 4), (4, 2), (2, 1, 2, 2), (1, 9), (9,)]:
            checks.append((sides, count_by_permutations(sides), "brute-force oracle, tests/oracle.py"))
        for sides, want, source in checks:
            got, seconds = run(binary, sides)
            ok = got == want
            failures += not ok
            shape = "x".join(map(str, sides))
            print(f"{'ok  ' if ok else 'FAIL'} {shape:>8} {got:>12} (want {want}, {source}) {seconds:.4f} s")
    print("self-check passed" if failures == 0 else f"self-check FAILED: {failures} mismatch(es)")
    return 0 if failures == 0 else 1


if __name__ == "__main__":
    try:
        sys.exit(_self_check())
    except PlainCError as exc:
        print(f"plainc: {exc}", file=sys.stderr)
        sys.exit(2)

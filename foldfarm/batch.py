"""The coordinator as a SLURM batch job that survives its walltime: requeue, and resume by itself.

``foldfarm run ... --sbatch FILE`` writes a batch script that runs that
same ``foldfarm run`` command (:func:`coordinator_script`);
``deploy/slurm-coordinator.sh`` is the same script for any arguments
(:func:`generic_script`, kept equal by a test).  The script:

1. asks SLURM to send the batch shell ``SIGTERM`` :data:`STOP_MINUTES`
   minutes before the walltime (``--signal=B:TERM@...``), and to allow a
   requeue (``--requeue``); its output file is appended to, not rewritten;
2. runs the coordinator in the background with ``--run-file``, a file
   named after the job id that holds the run's id once it is planned (a
   requeued job keeps its id, so it finds the file and resumes that run
   instead of starting another);
3. on ``SIGTERM`` (the walltime signal, a preemption, ``scancel --signal=TERM
   --batch``) passes it to the coordinator, which stops cleanly (what is in
   flight goes back to pending, the worker jobs end) and exits with 130;
   the script then requeues its own job, which starts again later and
   resumes the run.  A run that ends, or fails, ends the job.
"""

from __future__ import annotations

import shlex

#: Minutes before the walltime at which SLURM tells the coordinator to stop (a clean stop takes seconds).
STOP_MINUTES = 5
#: The run file of a job, relative to the directory the job runs in.
RUN_FILE = "foldfarm-job-$SLURM_JOB_ID.run"

_TEMPLATE = """\
#!/usr/bin/env bash
# {what}
#SBATCH --job-name={name}
#SBATCH --requeue
#SBATCH --signal=B:TERM@{stop_seconds}
#SBATCH --open-mode=append
#SBATCH --output=%x-%j.out
#SBATCH --ntasks=1
#SBATCH --cpus-per-task=1
{directives}
# SLURM sends SIGTERM {stop_minutes} minutes before the walltime (and on preemption); the coordinator then
# stops cleanly and this job requeues itself; started again, it finds its run in the run file and resumes it.
set -uo pipefail
{cd}run_file="{run_file}"
echo "foldfarm: job $SLURM_JOB_ID start $(( ${{SLURM_RESTART_COUNT:-0}} + 1 )) on $(hostname) at $(date -Is)"
{command} --run-file "$run_file" &
coordinator=$!
stopping=0
trap 'stopping=1; kill -TERM "$coordinator" 2>/dev/null' TERM
while :; do
    wait "$coordinator"
    status=$?
    kill -0 "$coordinator" 2>/dev/null || break   # wait returned for the signal: the coordinator still stops
done
if [[ $stopping == 1 && $status == 130 ]]; then
    echo "foldfarm: job $SLURM_JOB_ID stopped cleanly; requeued to resume the run of $run_file"
    scontrol requeue "$SLURM_JOB_ID"
fi
exit "$status"
"""


def _render(what: str, command: str, name: str, directives: list[str], cd: str | None,
            stop_minutes: int) -> str:
    return _TEMPLATE.format(
        what=what, name=name, stop_seconds=stop_minutes * 60, stop_minutes=stop_minutes,
        directives="\n".join(f"#SBATCH {d}" for d in directives) + ("\n" if directives else ""),
        cd=f"cd {shlex.quote(cd)} || exit 1\n" if cd else "", run_file=RUN_FILE, command=command,
    ).replace("\n\n\n", "\n\n")


def coordinator_script(python: str, arguments: list[str], *, name: str = "foldfarm", cwd: str,
                       walltime: str | None = None, partition: str | None = None, account: str | None = None,
                       stop_minutes: int = STOP_MINUTES) -> str:
    """The batch script of one ``foldfarm run`` command line (``arguments`` after ``run``).

    It runs in ``cwd`` (where the command was typed, so relative paths
    still hold) with ``python``; ``walltime``, ``partition`` and
    ``account`` become ``#SBATCH`` lines of the coordinator's own job.

    >>> text = coordinator_script("/opt/venv/bin/python", ["3x8", "--cluster", "slurm", "--jobs", "8"],
    ...                           name="tern-3x8", cwd="/home/halvorsen", walltime="1-00:00:00")
    >>> [line for line in text.splitlines() if line.startswith(("#SBATCH --time", "cd ", "/opt"))]
    ['#SBATCH --time=1-00:00:00', 'cd /home/halvorsen || exit 1', '/opt/venv/bin/python -m foldfarm run 3x8 \
--cluster slurm --jobs 8 --run-file "$run_file" &']
    """
    directives = [f"--time={walltime}"] if walltime else []
    directives += [f"--partition={partition}"] if partition else []
    directives += [f"--account={account}"] if account else []
    command = " ".join(shlex.quote(p) for p in [python, "-m", "foldfarm", "run", *arguments])
    what = f"foldfarm coordinator of: foldfarm run {' '.join(shlex.quote(a) for a in arguments)}"
    return _render(what, command, name, directives, cwd, stop_minutes)


def generic_script() -> str:
    """``deploy/slurm-coordinator.sh``: the coordinator of ``foldfarm run "$@"``, run where it was submitted."""
    what = ("foldfarm coordinator as a requeueable SLURM job; the arguments are those of `foldfarm run`:\n"
            "#   sbatch --time=2-00:00:00 deploy/slurm-coordinator.sh jobs/skua-4x6-cluster.toml "
            "--cluster slurm --jobs 16\n"
            "# (`foldfarm run ... --sbatch FILE` writes this script for one command line.)")
    command = '"${FOLDFARM_PYTHON:-python3}" -m foldfarm run "$@"'
    return _render(what, command, "foldfarm", [], None, STOP_MINUTES)


def without_option(argv: list[str], option: str) -> list[str]:
    """``argv`` without ``option VALUE`` / ``option=VALUE`` (the ``--sbatch FILE`` that asked for the script).

    >>> without_option(["3x8", "--sbatch", "x.sh", "--jobs", "2"], "--sbatch")
    ['3x8', '--jobs', '2']
    >>> without_option(["3x8", "--sbatch=x.sh"], "--sbatch")
    ['3x8']
    """
    out, skip = [], False
    for arg in argv:
        if skip:
            skip = False
        elif arg == option:
            skip = True
        elif not arg.startswith(option + "="):
            out.append(arg)
    return out


def read_run_file(path: str) -> int | None:
    """The run id a run file holds, or None if there is no such file yet; UserError if it holds something else."""
    from foldfarm.errors import UserError

    try:
        with open(path, encoding="utf-8") as handle:
            text = handle.read().strip()
    except FileNotFoundError:
        return None
    except OSError as exc:
        raise UserError(f"cannot read the run file {path}: {exc.strerror or exc}") from None
    if not text.isdigit() or int(text) < 1:
        raise UserError(f"the run file {path} should hold a run id, not {text[:40]!r}")
    return int(text)


def write_run_file(path: str, run_id: int) -> None:
    """Store ``run_id`` in ``path`` all at once (a crash leaves the old file or the new one)."""
    import os

    partial = f"{path}.partial"
    with open(partial, "w", encoding="utf-8") as handle:
        handle.write(f"{run_id}\n")
    os.replace(partial, path)

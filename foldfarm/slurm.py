"""Worker jobs on a SLURM cluster, through dask-jobqueue (the optional extra ``foldfarm[slurm]``).

``foldfarm run SHAPE --cluster slurm --jobs N`` starts the Dask scheduler in
the coordinator and asks SLURM for ``N`` worker jobs with dask-jobqueue's
``SLURMCluster``.  What a job asks for (cores, memory, walltime, partition,
account, extra ``#SBATCH`` directives, and everything else dask-jobqueue
knows) comes from dask-jobqueue's own configuration, ``jobqueue.slurm.*`` in
the user's Dask config or environment (``~/.config/dask/jobqueue.yaml``,
``DASK_JOBQUEUE__SLURM__CORES=32``, ...); values on the command line or in
the job file override it (:class:`Request`).

What foldfarm fixes, whatever the configuration says:

- one single-threaded worker process per core of a job (the kernel is
  single-threaded and holds the GIL);
- the Dask settings of a counting cluster (:data:`foldfarm.worker.DASK_SETTINGS`)
  in every worker job's environment;
- TLS (:mod:`foldfarm.security`): temporary certificates made at start,
  unless Dask's TLS configuration names certificates of the user's own;
  plain TCP beyond loopback only with ``--insecure-plain-tcp``;
- adaptive scaling with the wanted number of jobs as both minimum and
  maximum (or the range ``--jobs MIN:MAX``): a worker job that ends
  (walltime, preemption, a failed node, ``scancel``) is replaced once Dask's
  ``distributed.deploy.lost-worker-timeout`` has passed; its tasks run again
  elsewhere.  Workers load the kernel before their first task (the
  coordinator registers :class:`foldfarm.worker.ReadyWorker`).

:func:`cluster_options` (what to ask dask-jobqueue for) and
:func:`parse_jobs` are plain; :func:`check_slurm` and :func:`start` do the I/O.
"""

from __future__ import annotations

import shutil
import subprocess
import sys
from dataclasses import dataclass

from foldfarm.errors import UserError
from foldfarm.security import refuse_plain


class SlurmError(UserError):
    """SLURM cannot be used as asked (not installed, not answering, no such partition, bad values)."""


def parse_jobs(text: str | int) -> tuple[int, int]:
    """``--jobs``: ``N`` (keep N worker jobs) or ``MIN:MAX`` (between MIN and MAX, by load).

    >>> parse_jobs("8"), parse_jobs("2:16"), parse_jobs(3)
    ((8, 8), (2, 16), (3, 3))
    >>> parse_jobs("4:2")
    Traceback (most recent call last):
    ...
    foldfarm.slurm.SlurmError: --jobs must be N or MIN:MAX worker jobs with 1 <= MIN <= MAX, not '4:2'
    """
    low, _, high = str(text).strip().partition(":")
    high = high or low
    if not (low.isdigit() and high.isdigit() and 1 <= int(low) <= int(high)):
        raise SlurmError(f"--jobs must be N or MIN:MAX worker jobs with 1 <= MIN <= MAX, not {text!r}")
    return int(low), int(high)


@dataclass(frozen=True)
class Request:
    """What the user asked of SLURM; None (or empty) leaves it to ``jobqueue.slurm.*``.

    ``jobs`` is (minimum, maximum) worker jobs; ``cores`` and ``memory`` are
    per job (``memory`` as dask-jobqueue writes it, e.g. ``"64GB"``);
    ``walltime`` as SLURM writes it (``"2-00:00:00"``); ``directives`` are
    extra ``#SBATCH`` options (``"--qos=long"``).
    """

    jobs: tuple[int, int]
    cores: int | None = None
    memory: str | None = None
    walltime: str | None = None
    partition: str | None = None
    account: str | None = None
    directives: tuple[str, ...] = ()
    insecure: bool = False

    def threads(self, config: dict) -> int:
        """Worker threads of the cluster at its largest (one per core of every job)."""
        return self.jobs[1] * int(self.cores or config.get("cores") or 1)


#: dask-jobqueue's names for the values a Request overrides.
_OVERRIDES = {"cores": "cores", "memory": "memory", "walltime": "walltime", "partition": "queue",
              "account": "account"}


def cluster_options(request: Request, config: dict, dask_settings: dict, tls_configured: bool) -> dict:
    """Keyword arguments for ``SLURMCluster``: the request over ``config`` (``jobqueue.slurm``), plus foldfarm's.

    Only what the request sets, and what foldfarm fixes, is passed;
    dask-jobqueue reads the rest of ``config`` itself.  ``dask_settings``
    go into every job's environment; ``tls_configured`` says whether Dask's
    configuration names certificates (then those are used, else temporary
    ones).  Raises :class:`SlurmError` for a job without cores or memory
    and :class:`foldfarm.security.SecurityError` for plain TCP beyond loopback.

    >>> opts = cluster_options(Request((2, 2), cores=4, partition="long"), {"memory": "8GB"},
    ...                        {"distributed.admin.tick.interval": "1s"}, tls_configured=False)
    >>> opts["cores"], opts["processes"], opts["queue"], opts["security"], opts["protocol"]
    (4, 4, 'long', True, 'tls://')
    >>> opts["job_script_prologue"]
    ['export DASK_DISTRIBUTED__ADMIN__TICK__INTERVAL=1s']
    """
    options: dict = {}
    for name, key in _OVERRIDES.items():
        value = getattr(request, name)
        if value is not None:
            options[key] = value
    cores = options.get("cores", config.get("cores"))
    memory = options.get("memory", config.get("memory"))
    if not cores or not memory:
        raise SlurmError("SLURM worker jobs need cores and memory: set jobqueue.slurm.cores and "
                         "jobqueue.slurm.memory in your Dask configuration (~/.config/dask/jobqueue.yaml), or "
                         "pass --job-cores and --job-memory")
    if not isinstance(cores, int) or isinstance(cores, bool) or cores < 1:
        raise SlurmError(f"a worker job's cores must be a whole number of at least 1, not {cores!r}")
    options["processes"] = cores  # one single-threaded worker per core
    if request.directives:
        options["job_extra_directives"] = list(config.get("job-extra-directives") or []) + list(request.directives)
    options["job_script_prologue"] = list(config.get("job-script-prologue") or []) + [
        f"export {_env_name(key)}={_env_value(value)}" for key, value in dask_settings.items()]
    scheduler = dict(config.get("scheduler-options") or {})
    protocol = str(scheduler.pop("protocol", None) or config.get("protocol") or "")
    if protocol.startswith("tcp") or request.insecure:
        host = scheduler.get("host") or ("" if scheduler.get("interface") is None else scheduler["interface"])
        refuse_plain(host, request.insecure)
        options["protocol"] = "tcp://"
        options["security"] = None
    else:
        options["protocol"] = "tls://"
        options["security"] = "config" if tls_configured else True
    if scheduler:
        options["scheduler_options"] = scheduler
    return options


def _env_name(key: str) -> str:
    return "DASK_" + "__".join(part.replace("-", "_").upper() for part in key.split("."))


def _env_value(value) -> str:
    text = str(value)
    return {"False": "False", "True": "True"}.get(text, text)


# --------------------------------------------------------------------------
# I/O
# --------------------------------------------------------------------------

def check_slurm(partition: str | None) -> None:
    """One line if SLURM cannot take jobs here: no sbatch, no controller answering, no such partition."""
    if shutil.which("sbatch") is None or shutil.which("sinfo") is None:
        raise SlurmError("--cluster slurm needs SLURM, and there is no sbatch on this machine's PATH "
                         "(run foldfarm on a cluster's login node, or start one with deploy/slurm-single-node.sh)")
    try:
        out = subprocess.run(["sinfo", "--noheader", "--format", "%R"], capture_output=True, text=True, timeout=30)
    except subprocess.TimeoutExpired:
        raise SlurmError("SLURM does not answer: sinfo took more than 30 s") from None
    if out.returncode != 0:
        detail = (out.stderr.strip().splitlines() or ["sinfo failed"])[-1]
        raise SlurmError(f"SLURM does not answer: {detail}")
    partitions = sorted(set(out.stdout.split()))
    if partition is not None and partition not in partitions:
        raise SlurmError(f"SLURM has no partition {partition!r} (partitions here: {', '.join(partitions) or 'none'})")


def slurm_config() -> dict:
    """dask-jobqueue's configuration for SLURM (``jobqueue.slurm``), with its defaults; SlurmError if not installed."""
    try:
        import dask
        import dask_jobqueue  # noqa: F401  (loads jobqueue's defaults into Dask's configuration)
    except ImportError:
        raise SlurmError("--cluster slurm needs dask-jobqueue: pip install 'foldfarm[slurm]'") from None
    # Keys set through the environment (DASK_JOBQUEUE__SLURM__SCHEDULER_OPTIONS) are spelled with "_".
    return {key.replace("_", "-"): value for key, value in dask.config.get("jobqueue.slurm", {}).items()}


def tls_configured() -> bool:
    """Whether Dask's configuration names TLS certificates (``distributed.comm.tls.ca-file``)."""
    import dask
    import distributed  # noqa: F401

    return bool(dask.config.get("distributed.comm.tls.ca-file", None))


def check(request: Request, dask_settings: dict) -> tuple[dict, dict]:
    """Everything that can be checked before a scheduler starts: ``(SLURMCluster options, jobqueue.slurm config)``.

    One line (:class:`SlurmError`, :class:`foldfarm.security.SecurityError`)
    for dask-jobqueue missing, a job without cores or memory, plain TCP beyond
    loopback, no SLURM here, or an unknown partition.
    """
    config = slurm_config()
    options = cluster_options(request, config, dask_settings, tls_configured())
    check_slurm(options.get("queue", config.get("queue")))
    return options, config


def start(request: Request, dask_settings: dict):
    """Start the scheduler here and the adaptive worker jobs; returns ``(cluster, threads)``.

    ``threads`` is the cluster's worker threads at its largest, for the
    coordinator's window: tasks wait on the scheduler for jobs still queued.
    """
    import dask

    options, config = check(request, dask_settings)
    from dask_jobqueue import SLURMCluster
    from distributed.security import Security

    if options["security"] == "config":
        options["security"] = Security(require_encryption=True)
    options.setdefault("python", sys.executable)
    if options["security"] is True and not config.get("shared-temp-directory"):
        import os

        options["shared_temp_directory"] = os.getcwd()  # the temporary certificates' files (mode 600) go here
    with dask.config.set(dask_settings):
        try:
            cluster = SLURMCluster(**options)
        except (ValueError, TypeError, OSError) as exc:
            raise SlurmError(f"cannot start the SLURM cluster: {_first_line(exc)}") from None
    cluster.adapt(minimum_jobs=request.jobs[0], maximum_jobs=request.jobs[1])
    return cluster, request.threads(config)


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__

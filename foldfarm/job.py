"""Job files: a run described in TOML, so it can be kept, reviewed and started again.

A job file names the shape and, optionally, where to store the run and how
to cut and drive it; command-line options override it.  Example
(``jobs/tern-3x8.toml``)::

    name = "tern-3x8"
    shape = "3x8"
    store = "sqlite:///tern.sqlite"
    task_seconds = 60
    workers = 2

Keys: ``name``, ``shape`` (required), ``store``, ``scheduler``, ``workers``;
for SLURM (:mod:`foldfarm.slurm`) ``cluster`` (``"local"`` or ``"slurm"``),
``jobs`` (``8`` or ``"4:16"``), ``job_cores``, ``job_memory``, ``walltime``,
``partition``, ``account``, ``job_directives`` (a list of ``#SBATCH``
options); for a ``tls://`` scheduler ``tls_ca_file``, ``tls_cert``,
``tls_key``; and the run settings of :class:`foldfarm.run.Settings` (``task_seconds``,
``task_nodes``, ``tasks``, ``probes``, ``seed``, ``order``, ``window``,
``max_attempts``, ``audit``, ``store_wait``, ``scheduler_wait``).
"""

from __future__ import annotations

import tomllib
from dataclasses import dataclass, field
from pathlib import Path

from foldfarm.errors import UserError
from foldfarm.shape import parse_shape

_TYPES = {
    "name": str, "shape": str, "store": str, "scheduler": str, "workers": int,
    "task_seconds": (int, float), "task_nodes": int, "tasks": int, "probes": int, "seed": int,
    "order": str, "window": int, "max_attempts": int, "audit": (int, float), "store_wait": (int, float),
    "scheduler_wait": (int, float),
    "cluster": str, "jobs": (int, str), "job_cores": int, "job_memory": str, "walltime": str, "partition": str,
    "account": str, "job_directives": list, "tls_ca_file": str, "tls_cert": str, "tls_key": str,
}
#: Keys that say where the run goes, not how it is cut.
_PLACE = {"name", "shape", "store", "scheduler", "workers"}
#: Keys of the SLURM worker jobs and of TLS, passed on as the command-line options of the same name.
OPTIONS = ("cluster", "jobs", "job_cores", "job_memory", "walltime", "partition", "account", "job_directives",
           "tls_ca_file", "tls_cert", "tls_key")


class JobError(UserError):
    """A job file cannot be used; the message names the file and the problem."""


@dataclass(frozen=True)
class Job:
    """A parsed job file: where and what to run, and the run settings it sets."""

    path: str
    shape: str
    name: str | None = None
    store: str | None = None
    scheduler: str | None = None
    workers: int | None = None
    settings: dict = field(default_factory=dict)
    options: dict = field(default_factory=dict)


def is_job_file(argument: str) -> bool:
    """Whether a ``run`` argument names a job file rather than a shape."""
    return argument.endswith(".toml")


def load_job(path: str) -> Job:
    """Read and check a job file; raise :class:`JobError` with one clear sentence."""
    try:
        data = tomllib.loads(Path(path).read_text())
    except FileNotFoundError:
        raise JobError(f"job file {path} does not exist") from None
    except (OSError, UnicodeDecodeError) as exc:
        raise JobError(f"cannot read job file {path}: {exc}") from None
    except tomllib.TOMLDecodeError as exc:
        raise JobError(f"job file {path} is not valid TOML: {exc}") from None
    unknown = sorted(set(data) - set(_TYPES))
    if unknown:
        raise JobError(f"job file {path}: unknown key {unknown[0]!r} (known: {', '.join(sorted(_TYPES))})")
    for key, value in data.items():
        if isinstance(value, bool) or not isinstance(value, _TYPES[key]):
            raise JobError(f"job file {path}: {key} = {value!r} has the wrong type")
    if not all(isinstance(d, str) for d in data.get("job_directives", [])):
        raise JobError(f"job file {path}: job_directives must be a list of texts, like [\"--qos=long\"]")
    if "shape" not in data:
        raise JobError(f"job file {path} has no shape (for example: shape = \"3x8\")")
    try:
        parse_shape(data["shape"])
    except UserError as exc:
        raise JobError(f"job file {path}: {exc}") from None
    settings = {k: v for k, v in data.items() if k not in _PLACE and k not in OPTIONS}
    options = {k: v for k, v in data.items() if k in OPTIONS}
    return Job(path=path, shape=data["shape"], name=data.get("name"), store=data.get("store"),
               scheduler=data.get("scheduler"), workers=data.get("workers"), settings=settings, options=options)

"""Who may talk to a foldfarm cluster: TLS beyond loopback.

Dask sends pickled code: whoever reaches a scheduler can run code as the
researcher on every worker.  So foldfarm keeps to three rules, decided here
in plain functions (the connecting happens in :mod:`foldfarm.run`):

1. A scheduler foldfarm starts listens on loopback (the local cluster), or
   uses TLS (SLURM: temporary certificates made at start through Dask's
   ``Security.temporary()``, or the certificates of Dask's TLS
   configuration).  Plain TCP on another interface is refused in one line
   (:func:`refuse_plain`) unless the user passes the flag named
   :data:`INSECURE_FLAG`.
2. ``--scheduler tls://HOST:PORT`` takes certificates the way ``dask
   scheduler`` and ``dask worker`` do (``--tls-ca-file``, ``--tls-cert``,
   ``--tls-key``) or from Dask's TLS configuration
   (``distributed.comm.tls.ca-file``, ``distributed.comm.tls.client.cert``
   and ``.key``); :func:`client_tls` checks the files exist and builds the
   ``Security``.
3. ``--scheduler tcp://HOST:PORT`` to a host outside loopback works, with
   one warning line (:func:`plain_warning`).
"""

from __future__ import annotations

import ipaddress
import os
from dataclasses import dataclass

from foldfarm.errors import UserError

#: The opt-out of rule 1; its name says what it does.
INSECURE_FLAG = "--insecure-plain-tcp"


class SecurityError(UserError):
    """A TLS option cannot be used (a missing file, a wrong combination)."""


def is_loopback(host: str | None) -> bool:
    """Whether ``host`` (an address or a name) stays on this machine.

    Names other than ``localhost`` are not resolved (that would ask a DNS
    server): they count as outside.  An empty host or ``0.0.0.0`` means every
    interface, so it is outside too.

    >>> [is_loopback(h) for h in ("127.0.0.1", "127.4.5.6", "::1", "[::1]", "localhost")]
    [True, True, True, True, True]
    >>> [is_loopback(h) for h in ("", None, "0.0.0.0", "::", "10.1.2.3", "head.halvorsen.example")]
    [False, False, False, False, False, False]
    """
    if not host:
        return False
    host = host.strip("[]")
    if host.lower() == "localhost":
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def split_address(address: str) -> tuple[str, str, int | None]:
    """``scheme://host:port`` as (scheme, host, port); the scheme defaults to ``tcp``.

    >>> split_address("tls://head.halvorsen.example:8786"), split_address("127.0.0.1:8786")
    (('tls', 'head.halvorsen.example', 8786), ('tcp', '127.0.0.1', 8786))
    >>> split_address("tcp://[::1]:8786")
    ('tcp', '::1', 8786)
    """
    from urllib.parse import urlsplit

    parts = urlsplit(address if "://" in address else f"tcp://{address}")
    try:
        port = parts.port
    except ValueError:
        port = None
    return parts.scheme, parts.hostname or "", port


def plain_warning(address: str) -> str | None:
    """The warning line for a plain-TCP scheduler outside loopback, or None.

    >>> plain_warning("tcp://127.0.0.1:8786") is None, plain_warning("tls://head:8786") is None
    (True, True)
    >>> print(plain_warning("tcp://head.halvorsen.example:8786"))
    foldfarm: warning: tcp://head.halvorsen.example:8786 is not encrypted: anyone who can reach it can run code as you on every worker; use tls:// with --tls-ca-file, --tls-cert and --tls-key (deploy/README.md)
    """
    scheme, host, _ = split_address(address)
    if scheme != "tcp" or is_loopback(host):
        return None
    return (f"foldfarm: warning: {address} is not encrypted: anyone who can reach it can run code as you on every "
            "worker; use tls:// with --tls-ca-file, --tls-cert and --tls-key (deploy/README.md)")


def refuse_plain(host: str | None, insecure: bool) -> None:
    """Rule 1: refuse to start a plain-TCP scheduler on ``host`` outside loopback unless ``insecure``.

    >>> refuse_plain("127.0.0.1", False), refuse_plain("0.0.0.0", True)
    (None, None)
    >>> refuse_plain("0.0.0.0", False)
    Traceback (most recent call last):
    ...
    foldfarm.security.SecurityError: will not start a scheduler without TLS on 0.0.0.0: anyone who can reach it could run code as you on every worker; let foldfarm use TLS (drop protocol tcp:// from jobqueue.slurm.scheduler-options), or pass --insecure-plain-tcp
    """
    if insecure or is_loopback(host):
        return
    where = host or "every interface"
    raise SecurityError(f"will not start a scheduler without TLS on {where}: anyone who can reach it could run "
                        "code as you on every worker; let foldfarm use TLS (drop protocol tcp:// from "
                        f"jobqueue.slurm.scheduler-options), or pass {INSECURE_FLAG}")


@dataclass(frozen=True)
class TlsFiles:
    """Certificate files of a TLS client: the CA that signed the scheduler's, and this client's own."""

    ca_file: str | None = None
    cert: str | None = None
    key: str | None = None

    def given(self) -> bool:
        return any((self.ca_file, self.cert, self.key))


def tls_files(ca_file: str | None, cert: str | None, key: str | None, config: dict | None = None) -> TlsFiles:
    """The files to use: those given on the command line, else those of Dask's TLS configuration.

    ``config`` is ``distributed.comm.tls`` (read from Dask when None).  A
    key may live in the certificate file (``--tls-cert`` alone), as Dask allows.
    """
    given = TlsFiles(ca_file, cert, key)
    if given.given():
        return given
    if config is None:
        import dask
        import distributed  # noqa: F401  (loads Dask's distributed defaults)

        def get(key: str):  # Dask takes "ca-file" and "ca_file" (as from DASK_..._CA_FILE) alike
            return dask.config.get(f"distributed.comm.tls.{key}", None)
    else:
        def get(key: str):
            node = config
            for part in key.split("."):
                node = (node or {}).get(part, (node or {}).get(part.replace("-", "_")))
            return node
    paths = (get("ca-file"), get("client.cert"), get("client.key"))
    return TlsFiles(*(os.path.expanduser(p) if p else None for p in paths))


def check_tls_files(files: TlsFiles, address: str) -> None:
    """One line for what is missing: both the CA and the client certificate are needed, and must exist."""
    if not files.ca_file or not files.cert:
        raise SecurityError(f"{address} needs certificates: give --tls-ca-file and --tls-cert (and --tls-key unless "
                            "the key is in the certificate file), or set distributed.comm.tls.ca-file and "
                            "distributed.comm.tls.client.cert in your Dask configuration (deploy/README.md)")
    for option, path in (("--tls-ca-file", files.ca_file), ("--tls-cert", files.cert), ("--tls-key", files.key)):
        if path is not None and not os.path.isfile(path):
            raise SecurityError(f"{option} {path}: no such file")


def client_security(files: TlsFiles):
    """A Dask ``Security`` for a client with ``files`` that refuses unencrypted connections."""
    from distributed.security import Security

    return Security(tls_ca_file=files.ca_file, tls_client_cert=files.cert, tls_client_key=files.key,
                    require_encryption=True)


def tls_options_for_plain(address: str, files: TlsFiles) -> None:
    """TLS files given with a ``tcp://`` scheduler would be ignored: say so rather than connect in the clear."""
    if files.given() and split_address(address)[0] == "tcp":
        raise SecurityError(f"--tls-ca-file, --tls-cert and --tls-key are for a tls:// scheduler, not {address}")

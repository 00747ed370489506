"""TLS: a run on a TLS cluster on loopback, certificates made by deploy/make-certificates.sh in the test.

The cluster (a ``dask scheduler`` and ``dask worker`` processes on
127.0.0.1) accepts only certificates signed by the test's CA; a client with
none, or with one of another CA, is refused.  Counts: OEIS A001416 (3x5).
"""

from __future__ import annotations

import json
import os
import subprocess
import sys
from pathlib import Path

import pytest

from test_cluster import Cluster

ROOT = Path(__file__).resolve().parent.parent
SHAPE, COUNT = "3x5", 201240  # OEIS A001416


def make_certificates(folder: Path) -> Path:
    subprocess.run(["bash", str(ROOT / "deploy" / "make-certificates.sh"), str(folder)], check=True,
                   capture_output=True)
    return folder


@pytest.fixture(scope="module")
def certs(tmp_path_factory) -> Path:
    return make_certificates(tmp_path_factory.mktemp("tls"))


@pytest.fixture(scope="module")
def tls_cluster(certs, tmp_path_factory):
    from distributed.security import Security

    def role(name: str) -> tuple:
        return ("--tls-ca-file", str(certs / "ca.pem"), "--tls-cert", str(certs / f"{name}.pem"),
                "--tls-key", str(certs / f"{name}.key"))

    client = Security(tls_ca_file=str(certs / "ca.pem"), tls_client_cert=str(certs / "client.pem"),
                      tls_client_key=str(certs / "client.key"), require_encryption=True)
    cluster = Cluster(tmp_path_factory.mktemp("dask-tls"), scheduler_args=("--protocol", "tls", *role("scheduler")),
                      worker_args=role("worker"), security=client)
    assert cluster.address.startswith("tls://127.0.0.1:")
    yield cluster
    cluster.close()


def foldfarm(*args: str, env: dict | None = None) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "foldfarm", *args], capture_output=True, text=True, timeout=120,
                          env=env)


def one_line(out: subprocess.CompletedProcess, *words: str) -> None:
    assert out.returncode == 2, (out.returncode, out.stdout, out.stderr)
    assert out.stderr.count("\n") == 1 and "Traceback" not in out.stderr, out.stderr
    for word in words:
        assert word in out.stderr, out.stderr


@pytest.mark.slow
def test_a_run_on_a_tls_cluster_gives_the_exact_total(tls_cluster, certs, tmp_path):
    url = f"sqlite:///{tmp_path / 'tls.sqlite'}"
    out = foldfarm("run", SHAPE, "--scheduler", tls_cluster.address, "--tls-ca-file", str(certs / "ca.pem"),
                   "--tls-cert", str(certs / "client.pem"), "--tls-key", str(certs / "client.key"),
                   "--store", url, "--json")
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout)["count"] == COUNT, f"{SHAPE}: OEIS A001416 publishes {COUNT}"
    assert "warning" not in out.stderr


@pytest.mark.slow
def test_dask_tls_configuration_is_enough(tls_cluster, certs, tmp_path):
    env = {**os.environ, "DASK_DISTRIBUTED__COMM__TLS__CA_FILE": str(certs / "ca.pem"),
           "DASK_DISTRIBUTED__COMM__TLS__CLIENT__CERT": str(certs / "client.pem"),
           "DASK_DISTRIBUTED__COMM__TLS__CLIENT__KEY": str(certs / "client.key")}
    out = foldfarm("resume", "1", "--scheduler", tls_cluster.address, "--store",
                   f"sqlite:///{tmp_path / 'none.sqlite'}", env=env)
    one_line(out, "there is no store")  # the scheduler was probed over TLS before the store was opened
    url = f"sqlite:///{tmp_path / 'tls-config.sqlite'}"
    out = foldfarm("run", SHAPE, "--scheduler", tls_cluster.address, "--store", url, "--json", env=env)
    assert out.returncode == 0, out.stderr
    assert json.loads(out.stdout)["count"] == COUNT, f"{SHAPE}: OEIS A001416 publishes {COUNT}"


def test_a_client_without_the_certificate_is_refused(tls_cluster, tmp_path):
    out = foldfarm("run", SHAPE, "--scheduler", tls_cluster.address, "--store", f"sqlite:///{tmp_path / 'a.sqlite'}")
    one_line(out, "needs certificates", "--tls-ca-file")


def test_a_certificate_of_another_authority_is_refused(tls_cluster, tmp_path):
    stranger = make_certificates(tmp_path / "stranger")
    out = foldfarm("run", SHAPE, "--scheduler", tls_cluster.address, "--tls-ca-file", str(stranger / "ca.pem"),
                   "--tls-cert", str(stranger / "client.pem"), "--tls-key", str(stranger / "client.key"),
                   "--store", f"sqlite:///{tmp_path / 'b.sqlite'}")
    one_line(out, "do not trust each other's certificates", "--tls-cert")

    from distributed import Client
    from distributed.security import Security

    intruder = Security(tls_ca_file=str(stranger / "ca.pem"), tls_client_cert=str(stranger / "client.pem"),
                        tls_client_key=str(stranger / "client.key"), require_encryption=True)
    with pytest.raises((OSError, TimeoutError)):
        Client(tls_cluster.address, security=intruder, timeout="3s")
    plain = tls_cluster.address.replace("tls://", "tcp://")
    with pytest.raises((OSError, TimeoutError)):
        Client(plain, timeout="3s")


@pytest.mark.parametrize("args, words", [
    (["--tls-ca-file", "/nonexistent/ca.pem", "--tls-cert", "/nonexistent/client.pem"], ["--tls-ca-file", "no such file"]),
    (["--tls-cert", "client.pem"], ["needs certificates"]),
])
def test_bad_certificate_options_are_one_line(tls_cluster, certs, args, words, tmp_path):
    out = foldfarm("run", SHAPE, "--scheduler", tls_cluster.address, *args, "--store",
                   f"sqlite:///{tmp_path / 'c.sqlite'}")
    one_line(out, *words)
    assert not (tmp_path / "c.sqlite").exists()


def test_certificate_options_need_a_tls_scheduler(certs, tmp_path):
    out = foldfarm("run", SHAPE, "--scheduler", "tcp://127.0.0.1:1", "--tls-ca-file", str(certs / "ca.pem"),
                   "--store", f"sqlite:///{tmp_path / 'd.sqlite'}")
    one_line(out, "tls://")
    out = foldfarm("run", SHAPE, "--tls-ca-file", str(certs / "ca.pem"), "--store", f"sqlite:///{tmp_path / 'd.sqlite'}")
    one_line(out, "--scheduler tls://")


def test_a_wrong_scheduler_scheme_is_one_line(tmp_path):
    out = foldfarm("run", SHAPE, "--scheduler", "http://127.0.0.1:8786", "--store", f"sqlite:///{tmp_path / 'e.sqlite'}")
    one_line(out, "tls://")


def test_plain_tcp_beyond_loopback_warns_in_one_line_before_connecting(monkeypatch, capsys, tmp_path):
    """In process, with the connection itself replaced: nothing is sent to an address outside loopback."""
    from foldfarm import cli, run

    def unreachable(address, *args, **kwargs):
        raise run.SchedulerError(f"cannot reach the Dask scheduler at {address}: stand-in")

    monkeypatch.setattr(run, "probe_scheduler", unreachable)
    with pytest.raises(SystemExit) as stop:
        cli.app(["run", SHAPE, "--scheduler", "tcp://head.halvorsen.example:8786", "--store", f"sqlite:///{tmp_path / 'f.sqlite'}"],
                standalone_mode=True)
    assert stop.value.code == 2
    lines = capsys.readouterr().err.strip().splitlines()
    assert len(lines) == 2, lines
    assert lines[0].startswith("foldfarm: warning: tcp://head.halvorsen.example:8786 is not encrypted")
    assert "--tls-ca-file" in lines[0] and "stand-in" in lines[1]

"""The worker side: the Dask settings of a counting cluster, and workers that start ready."""

from __future__ import annotations

import gc
from pathlib import Path

import pytest
import yaml

from foldfarm import run as runner
from foldfarm.worker import DASK_SETTINGS, ReadyWorker, work

DEPLOY = Path(__file__).resolve().parents[1] / "deploy"


def _flatten(tree: dict, prefix: str = "") -> dict:
    flat = {}
    for key, value in tree.items():
        if isinstance(value, dict):
            flat.update(_flatten(value, f"{prefix}{key}."))
        else:
            flat[f"{prefix}{key}"] = value
    return flat


def test_deploy_config_carries_the_local_cluster_settings():
    assert _flatten(yaml.safe_load((DEPLOY / "dask.yaml").read_text())) == DASK_SETTINGS


def test_deploy_scripts_point_dask_at_the_config():
    assert "DASK_CONFIG=" in (DEPLOY / "slurm-workers.sh").read_text()
    assert "DASK_CONFIG=" in (DEPLOY / "foldfarm-worker@.service").read_text()


class _Closing:
    def __init__(self, status):
        self.status = status


def test_ready_worker_freezes_the_collector_only_on_the_way_out():
    from distributed.core import Status

    plugin = ReadyWorker()
    gc.unfreeze()  # from a process with nothing frozen
    try:
        plugin.teardown(_Closing(Status.running))  # replaced on a live worker: leave its collector alone
        assert gc.get_freeze_count() == 0
        plugin.teardown(_Closing(Status.closing))
        assert gc.get_freeze_count() > 0
    finally:
        gc.unfreeze()


@pytest.mark.parametrize("tree", [1, 2])
def test_work_outside_a_worker_counts_and_names_no_worker(tree):
    out = work((3, 4), ["/"], 0, 0, tree=tree)  # the whole 3x4 map in one task
    assert out == [{"count": 15552, "nodes": out[0]["nodes"], "seconds": out[0]["seconds"], "complete": True,
                    "remainder": [], "worker": None}]  # 15552: OEIS A001416, 3x4


def test_work_needs_the_runs_tree():
    with pytest.raises(TypeError, match="tree"):  # a prefix names a subtree of one tree: no default
        work((3, 4), ["/"], 0, 0)
    legacy, symmetric = work((3, 4), ["/1/2/2"], 0, 0, tree=1)[0], work((3, 4), ["/1/2/2"], 0, 0, tree=2)[0]
    assert legacy["count"] != symmetric["count"]


def _worker_state(dask_worker) -> dict:
    import logging
    import sys

    from foldfarm import kernel

    return {
        "forked from the preloaded server": "foldfarm.preload" in sys.modules,
        "kernel loaded": bool(kernel._search.signatures) and bool(kernel._replay.signatures),
        "heartbeat errors hushed": not logging.getLogger("distributed.worker").filter(logging.makeLogRecord(
            {"msg": "Failed to communicate with scheduler during heartbeat.", "levelno": logging.ERROR})),
        "other errors shown": bool(logging.getLogger("distributed.worker").filter(logging.makeLogRecord(
            {"msg": "Compute Failed", "levelno": logging.ERROR}))),
        "periodic ms": {k: v.callback_time for k, v in dask_worker.periodic_callbacks.items()},
    }


def _periodic_ms(dask_scheduler) -> dict:
    return {k: v.callback_time for k, v in dask_scheduler.periodic_callbacks.items()}


@pytest.mark.slow
def test_local_workers_start_with_the_kernel_loaded_and_quiet_settings():
    import gc

    client, cluster = runner.connect(None, 2)
    try:
        # A Ctrl-C raised inside a collector callback is "ignored" by Python: the run went on counting.
        assert not [c for c in gc.callbacks if "GCDiagnosis" in repr(c)]
        states = client.run(_worker_state)
        scheduler = client.run_on_scheduler(_periodic_ms)
        nannies = [{k: v.callback_time for k, v in n.periodic_callbacks.items()} for n in cluster.workers.values()]
    finally:
        runner.disconnect(client, cluster)
    assert len(states) == 2 and len(nannies) == 2
    for state in states.values():
        assert state["forked from the preloaded server"] == runner.start_fork_server()
        assert state["kernel loaded"]
        # A heartbeat in flight when the coordinator closes its cluster would print a traceback on the terminal.
        assert state["heartbeat errors hushed"] == state["forked from the preloaded server"]
        assert state["other errors shown"]
        assert "profile" not in state["periodic ms"]  # distributed.worker.profile.enabled: False
    # The settings of DASK_SETTINGS, in milliseconds, as each server scheduled its bookkeeping.
    for periodic in [scheduler, *nannies, *(s["periodic ms"] for s in states.values())]:
        assert periodic["tick"] == 1000 and periodic["monitor"] == 5000, periodic
    for periodic in nannies:
        assert periodic["memory_monitor"] == 1000, periodic

"""Knuth-probe estimates against published counts (OEIS, named per check) and the exact kernel.

Every random quantity here has a fixed seed.  Node counts are checked against
``count_below(...).nodes``, the exhaustive search that tests/test_kernel.py
ties to the brute-force oracle and the published table.
"""

from __future__ import annotations

import json
import math
import subprocess
import sys

import pytest

from foldfarm.estimate import (
    Estimate,
    EstimateError,
    as_json,
    calibrate,
    cost,
    describe,
    estimate,
    estimate_below,
    interior_nodes,
)
from foldfarm.kernel import count_below, prepare
from foldfarm.plan import plan
from foldfarm.prefix import PrefixError
from foldfarm.published import published, table


def one_published(shape: str):
    value = published(shape)[0]
    return value.count, value.source


def covers(est: Estimate, truth: float) -> bool:
    return est.low <= truth <= est.high


@pytest.mark.parametrize("shape", ["5x5", "3x9", "2x12", "1x20"])  # 3x8 is small enough to be counted outright
def test_default_estimate_is_within_ten_percent_of_published(shape):
    truth, source = one_published(shape)
    est = estimate(prepare(shape))
    assert abs(est.count / truth - 1) <= 0.10, f"{shape}: {source} publishes {truth}, estimated {est.count:.6g}"
    assert est.low < est.count < est.high, "a map this size is estimated, not counted outright"


@pytest.mark.parametrize("shape", ["5x5", "3x8", "2x12", "1x20"])
def test_probes_alone_are_within_ten_percent_of_published(shape):
    # No strata and nothing counted outright: Knuth's plain estimator from the root.
    truth, source = one_published(shape)
    est = estimate(prepare(shape), probes=300_000, seed=1, strata=1, exact_nodes=0)
    assert est.exact_strata == 0 and est.strata == 1
    assert abs(est.count / truth - 1) <= 0.10, f"{shape}: {source} publishes {truth}, estimated {est.count:.6g}"


@pytest.mark.parametrize("strata", [1, None])
def test_interval_covers_the_true_count_over_50_seeds(strata):
    tables = prepare("3x6")
    truth, source = one_published("3x6")
    nodes = count_below(tables).nodes
    runs = [estimate(tables, probes=20_000, seed=seed, strata=strata, exact_nodes=0) for seed in range(50)]
    assert not any(e.exact for e in runs)
    hits = sum(covers(e, truth) for e in runs)
    node_hits = sum(e.nodes_low <= nodes <= e.nodes_high for e in runs)
    assert hits >= 43, f"3x6 ({source}: {truth}): the 95% interval held it {hits} times of 50"
    assert node_hits >= 43, f"3x6 ({nodes} nodes, exhaustive search): held {node_hits} times of 50"


SMALL_ROWS = [v for v in table() if v.count <= 10**9]


def test_no_zero_width_interval_unless_counted_outright():
    for value in SMALL_ROWS:
        est = estimate(prepare(value.shape), probes=3_000, seed=2)
        if est.exact:
            assert est.count == value.count, f"{value.shape}: {value.source} publishes {value.count}"
        else:
            assert est.high > est.low, f"{value.shape}: zero-width interval at {est.count:.6g}"


def test_probes_that_all_agree_still_give_an_interval():
    # Nothing counted outright: on the smallest maps every probe takes the same path, which proves nothing.
    misses = []
    for value in SMALL_ROWS:
        tables = prepare(value.shape)
        if tables.n < 2:
            continue
        est = estimate(tables, probes=2_000, seed=3, strata=1, exact_nodes=0)
        assert not est.exact and est.high > est.low, f"{value.shape}: zero-width interval"
        assert est.nodes_high > est.nodes_low, f"{value.shape}: zero-width node interval"
        if not covers(est, value.count):
            misses.append(value.shape)
    assert len(misses) <= 0.15 * len(SMALL_ROWS), f"published counts ({len(SMALL_ROWS)} rows) missed: {misses}"


@pytest.mark.parametrize("shape", ["4x4", "3x5"])
def test_small_tree_is_counted_outright(shape):
    tables = prepare(shape)
    truth, source = one_published(shape)
    est = estimate(tables)
    assert est.exact and est.exact_strata == est.strata
    assert est.count == est.low == est.high == truth, f"{shape}: {source} publishes {truth}"
    assert est.nodes == count_below(tables).nodes


def test_strata_and_interior_add_up_to_the_whole_search():
    tables = prepare("3x6")
    truth, source = one_published("3x6")
    frontier = list(plan(tables, 300))
    est = estimate(tables, strata=300, exact_nodes=10**9)
    assert est.exact and est.count == truth, f"3x6: {source} publishes {truth}"
    assert est.nodes == count_below(tables).nodes
    assert interior_nodes(frontier) + sum(count_below(tables, s).nodes for s in frontier) == est.nodes


def test_same_seed_same_estimate():
    tables = prepare("5x5")
    a = estimate(tables, probes=50_000, seed=7)
    b = estimate(tables, probes=50_000, seed=7)
    c = estimate(tables, probes=50_000, seed=8)
    assert (a.count, a.high, a.nodes, a.probes) == (b.count, b.high, b.nodes, b.probes)
    assert a.count != c.count


def test_estimate_below_the_pending_tasks():
    tables = prepare("3x7")
    tasks = list(plan(tables, 200))
    pending = tasks[::2]
    left = [count_below(tables, t) for t in pending]
    count, nodes = sum(o.count for o in left), sum(o.nodes for o in left)
    est = estimate_below(tables, pending, probes=50_000, seed=4, exact_nodes=0)
    assert not est.exact
    assert abs(est.count / count - 1) <= 0.10 and abs(est.nodes / nodes - 1) <= 0.10
    assert estimate_below(tables, [], probes=10).count == 0


@pytest.mark.parametrize("steps, why", [((2,), "/2 is not a node"), ((1, 1), "/1/1 is not a node"),
                                        (tuple([1] * 14), "is not a node")])
def test_estimate_below_rejects_what_is_not_a_node(steps, why):
    with pytest.raises(PrefixError, match=why):
        estimate_below(prepare("3x5"), [(1,), steps], probes=100)


def test_cost_arithmetic():
    est = Estimate(count=1e12, low=9e11, high=1.1e12, count_se=5e10, nodes=3.6e10, nodes_low=1.8e10,
                   nodes_high=7.2e10, nodes_se=1e10, exact=False, strata=1, exact_strata=0, probes=1, seed=0,
                   seconds=0.0)
    spend = cost(est, nodes_per_second=1e6, cores=4)
    assert math.isclose(spend.core_hours, 10.0) and math.isclose(spend.wall_hours, 2.5)
    assert math.isclose(spend.core_hours_low, 5.0) and math.isclose(spend.core_hours_high, 20.0)
    assert math.isclose(spend.wall_hours_high, 5.0)
    assert math.isclose(spend.core_years, 10.0 / 8766)
    with pytest.raises(ValueError):
        cost(est, 0.0, 1)
    with pytest.raises(ValueError):
        cost(est, 1e6, 0)


def test_calibrate_measures_a_rate():
    assert calibrate(prepare("3x5"), seconds=0.2) > 0
    one = prepare("1x1")
    assert calibrate(one, seconds=0.2) == 0.0
    assert cost(estimate(one), 0.0, 2).core_hours == 0.0  # one cell: nothing to search, nothing to pay


def test_reports_keep_exact_values_whole_and_overflow_out_of_json():
    exact = estimate(prepare("3x3"))
    obj = as_json(exact, cost(exact, 1e6, 2))
    assert obj["estimate"] == obj["low"] == obj["high"] == 1368 and isinstance(obj["estimate"], int)  # OEIS A001416
    assert "counted outright" in describe("3x3", exact, cost(exact, 1e6, 2))[0]
    huge = Estimate(count=float("inf"), low=0.0, high=float("inf"), count_se=float("inf"), nodes=1e300,
                    nodes_low=1.0, nodes_high=float("inf"), nodes_se=float("inf"), exact=False, strata=1,
                    exact_strata=0, probes=10, seed=0, seconds=0.0)
    obj = as_json(huge, cost(huge, 1e7, 2))
    assert obj["estimate"] is None and obj["nodes"] == 1e300
    json.loads(json.dumps(obj, allow_nan=False))
    assert any(line.startswith("rough:") for line in describe("9x9", huge, cost(huge, 1e7, 2)))


@pytest.mark.parametrize("probes", [0, -5, 10**13])
def test_probe_budget_out_of_range(probes):
    with pytest.raises(EstimateError, match="number of probes"):
        estimate(prepare("3x3"), probes=probes)


def foldfarm(*args: str) -> subprocess.CompletedProcess:
    return subprocess.run([sys.executable, "-m", "foldfarm", *args], capture_output=True, text=True, timeout=120)


def test_cli_json():
    out = foldfarm("estimate", "8x3", "--json", "--probes", "200000", "--cores", "16")
    assert out.returncode == 0, out.stderr
    obj = json.loads(out.stdout)
    truth, source = one_published("3x8")
    assert obj["shape"] == "8x3" and obj["side_order"] == "3x8" and obj["cores"] == 16 and obj["tree"] == 2
    assert abs(obj["estimate"] / truth - 1) <= 0.10, f"3x8: {source} publishes {truth}"
    assert obj["low"] < obj["estimate"] < obj["high"] and obj["exact"] is False
    assert obj["nodes"] > 0 and obj["core_hours"] > 0 and obj["nodes_per_second"] > 0
    assert math.isclose(obj["wall_hours"] * 16, obj["core_hours"])


def test_cli_human_output():
    out = foldfarm("estimate", "6x6", "--probes", "100000", "--seed", "3")
    assert out.returncode == 0, out.stderr
    text = out.stdout
    assert text.startswith("6x6: about ") and "95% interval" in text and "an estimate" in text
    assert "core-hours" in text and "nodes/s" in text and "wall time" in text
    assert "published: 123912532224 (OEIS A001418)" in text


@pytest.mark.parametrize("args", [("8x0",), ("3x", "--json"), ("3x3", "--probes", "0"), ("3x3", "--cores", "two"),
                                  ("3x3", "--seed", "-4"), ("3x3", "--probes", str(10**13))])
def test_cli_bad_input_exits_2_with_one_line(args):
    out = foldfarm("estimate", *args)
    assert out.returncode == 2 and out.stdout == ""
    lines = out.stderr.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith("foldfarm: ") and "Traceback" not in out.stderr

"""Estimate before counting: size, count and cost of a map's search, from random probes.

Quantities
==========
Below a node ``v`` of the reduced tree (see :mod:`foldfarm.kernel`) let
``N(v)`` be the node expansions of a full search (``count_below(v).nodes``)
and ``L(v)`` its reduced-tree leaves; the map has ``f * L(root)`` foldings,
``f`` = :attr:`Tables.factor`.

Knuth's 1975 estimator
======================
A *probe* from ``v`` walks down, choosing each step uniformly among the
``d_k`` children met at the ``k``-th step, until a dead end or a last-leaf
node (whose ``d`` is its number of foldings).  Then::

    N^ = 1 + d_1 + d_1 d_2 + ... + d_1 ... d_j        (expected value N(v))
    L^ = d_1 d_2 ... d_j,  or 0 at a dead end         (expected value L(v))

because a node at depth ``k`` below ``v`` is reached with probability
``1 / (d_1 ... d_k)`` along its own path.  One probe is unbiased, its
spread is large and heavy-tailed (one probe's standard deviation is 5 times
its mean on 5x5, 20 to 90 times on 7x7 and 8x8), so we take many:
:func:`foldfarm.kernel._probe` runs them compiled, 0.36 (8x8) to 1.6 (1x20)
million a second on one core.

Variance reduction: stratify by partial enumeration
===================================================
The frontier ``F = plan(tables, K)`` (:func:`foldfarm.plan.plan`, ``K``
= :data:`DEFAULT_STRATA`, or ``P /`` :data:`PROBES_PER_STRATUM` when the
``P`` probes are fewer) cuts the tree into ``H`` disjoint subtrees, the
*strata*; its *interior* ``I`` (the proper ancestors of the strata) is
enumerated exactly by the planner.  So::

    N = |I| + sum_h N(h)        L = sum_h L(h)

and each stratum ``h`` is estimated on its own, in three compiled passes
(:func:`_strata`):

1. *pilot*: ``m_0`` = :data:`PILOT` probes, on their own seeds, give
   ``nu_h``, a rough node count; they are used only for steps 2 and 3 and
   then discarded, so the estimate stays unbiased given what they decided;
2. *outright*: a stratum with ``nu_h <=`` :data:`SMALL` ``B`` is counted
   with a node budget ``B`` = ``exact_nodes``; if the search finishes, its
   ``N(h)`` and ``L(h)`` are exact and its variance really is 0 (a wrong
   guess costs at most ``B`` nodes);
3. *probes*: every other stratum gets ``m_h`` probes, with mean ``Lbar_h``
   and sample variance ``s_h^2`` of ``L^`` (nodes alike).

The count estimate is ``f L^`` with ``L^ = sum_h Lbar_h`` (exact strata
as they are), its standard error ``se = f sqrt(V)``, and the 95% interval
``f (L^ +- 1.96 sqrt(V))``, clipped below at the exact part.  Nodes alike,
plus ``|I|``, clipped below at what is certain.

Allocation: ``m_h = m_min + (P - H m_0 - H' m_min) (1/(2 H') + nu_h /
(2 sum nu))`` over the ``H'`` probed strata, ``m_min`` =
:data:`MIN_PROBES`: half the probes evenly, half in proportion to the
pilot's size.  Measured error at equal time, 30-40 seeds, 10,000 strata:
6x6 0.023 half-and-half, 0.026 all even, 0.026 all by size, 0.055 in
proportion to each stratum's chance of being entered by a plain probe (the
textbook proportional allocation); 7x7 0.165, 0.173, 0.210.  Size alone
also starves strata whose 8-probe pilot came out small: on 8x8 one of them
met a rare huge probe with 2 probes to average it over and put the
estimate 100 times too high.

Variance ``V``.  Probe values have heavy right tails: in a short run most
strata have not met their rare large values, so both the mean and ``s_h^2``
come out low.  With ``rho^2 = sum s_h^2 / sum Lbar_h^2`` over the strata
whose probes varied (1 if none did), ``V`` is the larger of

* ``sum_h s_h^2 / m_h``, where a stratum whose probes all agreed (which
  proves nothing unless it was counted outright) uses ``rho^2 max(Lbar_h,
  lambda nubar_h)^2``, ``lambda`` the leaves per node over the probed
  strata (1 if none) and ``nubar_h`` its mean node estimate;
* ``rho^2 sum_h Lbar_h^2 / m_h``: a tail met in one stratum is assumed
  possible in all of them (on 7x7, 2 million probes, 10,000 strata, 30
  seeds, this lifted the coverage of the 95% interval from 77% to 87% and
  widened it by a median 25%; on 5x5 it changes the width by 3%).

So an interval has zero width only when every stratum was counted outright,
and then :attr:`Estimate.exact` says so.

What was measured (``benchmarks/estimate.py``, 2-core development machine,
20 seeds, same probes): the error at equal time (RMS relative error x
sqrt(seconds), time including planning and pilot) of the stratified
estimator is 1.8 times smaller than plain probes from the root on 5x5, 2.5
on 3x8, 2.1 on 1x20, 2.4 on 6x6 and 3.0 on 7x7 (3 to 9 times less
variance); its 95% interval held the published count in 95-100% of the
runs, the plain one in 75% (7x7) to 100%.  On maps of up to ~10^7 nodes
most strata are small enough to count outright, which is why the default
estimates of 5x5, 3x8 and 2x12 are within 0.01%.  Two other ideas did
*not* pay at equal time and are not used: choosing a child in proportion to
its own number of children (one-step look-ahead: 3 to 4 times slower per
probe, more variance per second on every shape but 1xN strips) and
enumerating the last 4 to 12 levels below each probe (the variance comes
from the upper levels: 1.5 to 30 times worse per second).  A log-normal
interval instead of the normal one moved no measured coverage by more than
2 points.

Cost
====
:func:`calibrate` times a short count on this machine: ``r`` node
expansions per second on one core.  The full run costs ``N / (3600 r)``
core-hours, its interval ``[N_low, N_high] / (3600 r)``; on ``c`` cores the
wall time is that over ``c`` (perfect scaling assumed; splitting overhead
is about 3%, ``benchmarks/split.py``).  The spread of ``r`` itself is not
carried: it is about 10% between corners of the tree, which is why the
calibration samples several.
"""

from __future__ import annotations

import itertools
import math
import random
import time
from dataclasses import dataclass, replace

import numba
import numpy as np

from foldfarm.errors import UserError
from foldfarm.kernel import Tables, _node_seed, _probe, _replay, _scratch, _search, count_below
from foldfarm.plan import plan
from foldfarm.prefix import PrefixError, Steps, prefix_text
from foldfarm.published import published

#: Random probes per estimate (8x8: about 12 s on one core, standard error 15-25%).
DEFAULT_PROBES = 5_000_000
#: Most probes one estimate takes (10^12 probes would take days).
MAX_PROBES = 10**12
#: Most strata the tree is cut into before probing (``plan(tables, strata)``) ...
DEFAULT_STRATA = 30_000
#: ... and fewer when the probes would leave less than this many for each.
PROBES_PER_STRATUM = 150
#: A stratum of at most this many nodes is counted outright instead of probed.
EXACT_NODES = 1_000
#: Strata whose pilot estimate is at most this many times EXACT_NODES are tried for counting outright.
SMALL = 4
#: Pilot probes per stratum, used only to share out the rest.
PILOT = 8
#: Fewest probes a probed stratum gets after the pilot (a variance needs two).
MIN_PROBES = 2
#: Tasks a calibration times in turn.
CALIBRATE_PIECES = 8
#: Two-sided 95% point of the normal distribution.
Z95 = 1.959963984540054
#: Hours in a year (365.25 days), for core-years.
HOURS_PER_YEAR = 8766.0

#: Seeds are taken modulo this (the compiled code mixes them in 64-bit integers).
SEED_MODULUS = 2**31
# Seed salts keep the pilot, the estimate and the planner's probes on separate random streams.
_PILOT_SALT = 0x51_7CC1_B727
_MAIN_SALT = 0x2F_6B3D_8A41


class EstimateError(UserError, ValueError):
    """An estimate was asked for with settings it cannot use; the message says which."""


def _check_probes(probes: int) -> None:
    if not 1 <= probes <= MAX_PROBES:
        raise EstimateError(f"the number of probes must be between 1 and {MAX_PROBES:,}, not {probes:,}")


@numba.njit(cache=True, nogil=True)
def _strata(table, constrained, n, above, below, mark, gap, gapter, flat, offsets, first, arcs, probes, seed, budgets):
    """Count or probe each stratum ``j``: the node ``flat[offsets[j]:offsets[j+1]]``.

    A stratum whose subtree has at most ``budgets[j]`` nodes is counted
    outright (its ``exact`` entry is then 1); otherwise it gets
    ``probes[j]`` probes seeded by its steps and ``seed``.  Returns ``(bad,
    exact, sums)``: ``bad`` is the index of the first illegal stratum or -1;
    ``sums[j]`` is ``(nodes, nodes^2, leaves, leaves^2)`` summed over the
    probes, or the exact nodes and leaves (squares 0) of a counted stratum.
    """
    k = offsets.shape[0] - 1
    exact = np.zeros(k, np.int64)
    sums = np.zeros((k, 4), np.float64)
    for j in range(k):
        steps = flat[offsets[j]:offsets[j + 1]]
        floor = steps.shape[0] + 2
        bad, stamp = _replay(table, constrained, n, above, below, mark, gap, gapter, steps, first, arcs)
        if bad:
            return j, exact, sums
        if budgets[j] > 0:
            leaves, nodes, level, stamp = _search(table, constrained, n, above, below, mark, gap, gapter, floor, floor,
                                                  budgets[j], first, arcs, stamp)
            if level < floor:
                exact[j] = 1
                sums[j, 0] = nodes
                sums[j, 2] = leaves
                continue
            # the budget ran out mid-search: put the stratum back to its own leaves
            bad, stamp = _replay(table, constrained, n, above, below, mark, gap, gapter, steps, first, arcs)
        if probes[j] > 0:
            a, b, c, d, stamp = _probe(table, constrained, n, above, below, mark, gap, floor, first, arcs, stamp,
                                       probes[j], _node_seed(steps, seed))
            sums[j, 0] = a
            sums[j, 1] = b
            sums[j, 2] = c
            sums[j, 3] = d
    return -1, exact, sums


@dataclass(frozen=True)
class Estimate:
    """Estimated size of a search and its count, with 95% intervals.

    ``count``, ``low``, ``high``, ``count_se`` are in foldings (already
    times :attr:`Tables.factor`); ``nodes``, ``nodes_low``, ``nodes_high``,
    ``nodes_se`` in node expansions (``count_below(...).nodes``).  When
    ``exact`` every stratum was counted outright: the values are exact ints
    and the intervals have zero width.  ``probes`` counts every probe run,
    pilot included; ``seconds`` is the time taken.
    """

    count: float
    low: float
    high: float
    count_se: float
    nodes: float
    nodes_low: float
    nodes_high: float
    nodes_se: float
    exact: bool
    strata: int
    exact_strata: int
    probes: int
    seed: int
    seconds: float


@dataclass(frozen=True)
class Cost:
    """Projected cost of a full count: core-hours and wall hours on ``cores`` cores, with intervals."""

    nodes_per_second: float
    cores: int
    core_hours: float
    core_hours_low: float
    core_hours_high: float

    @property
    def core_years(self) -> float:
        """Core-hours in core-years (365.25 days)."""
        return self.core_hours / HOURS_PER_YEAR

    @property
    def wall_hours(self) -> float:
        """Wall-clock hours on :attr:`cores` cores, assuming perfect scaling."""
        return self.core_hours / self.cores

    @property
    def wall_hours_low(self) -> float:
        """Low end of the wall time's 95% interval, in hours."""
        return self.core_hours_low / self.cores

    @property
    def wall_hours_high(self) -> float:
        """High end of the wall time's 95% interval, in hours."""
        return self.core_hours_high / self.cores


def _run_strata(tables: Tables, strata: list[Steps], probes: np.ndarray, seed: int,
                budgets: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """One compiled pass of :func:`_strata`; raises :class:`PrefixError` for an illegal stratum."""
    lengths = np.fromiter((len(s) for s in strata), np.int64, len(strata))
    offsets = np.zeros(len(strata) + 1, np.int64)
    np.cumsum(lengths, out=offsets[1:])
    flat = np.fromiter((m for s in strata for m in s), np.int64, int(offsets[-1]))
    state = _scratch(tables.n)
    bad, exact, sums = _strata(tables.table, tables.constrained, tables.n, state.above, state.below, state.mark,
                               state.gap, state.gapter, flat, offsets, tables.first, tables.arcs, probes, seed,
                               budgets)
    if bad >= 0:
        raise PrefixError(f"{prefix_text(strata[bad])} is not a node of the {tables.n}-cell map's tree")
    return exact.astype(bool), sums


def _check_lengths(tables: Tables, strata: list[Steps]) -> None:
    """Reject prefixes that place the last leaf or step outside the placed leaves (the kernel would not)."""
    for steps in strata:
        if len(steps) > max(tables.n - 2, 0) or any(not 1 <= m <= k for k, m in enumerate(steps, start=1)):
            raise PrefixError(f"{prefix_text(steps)} is not a node of the {tables.n}-cell map's tree")


def _allocate(pilot_nodes: np.ndarray, probed: np.ndarray, spare: int) -> np.ndarray:
    """Probes per stratum after the pilot: :data:`MIN_PROBES` each, the rest half evenly, half by size.

    ``pilot_nodes`` is each stratum's pilot node estimate, ``spare`` the
    probes left after the pilot; exact strata (``probed`` false) get none.
    The even half keeps a stratum whose pilot came out small from being
    starved (module docstring).
    """
    out = np.where(probed, MIN_PROBES, 0).astype(np.int64)
    spare -= int(out.sum())
    size = np.where(probed, pilot_nodes, 0.0)
    if spare > 0:
        share = 0.5 * probed / probed.sum() + 0.5 * size / size.sum()
        out += np.floor(spare * share).astype(np.int64)
    return out


def _variance(mean: np.ndarray, var: np.ndarray, size: np.ndarray, m: np.ndarray) -> float:
    """Variance of a stratified sum of means, from each probed stratum's probes.

    ``mean``/``var`` are each stratum's mean and sample variance per probe,
    ``m`` its probes, ``size`` what a stratum whose probes all agreed is
    measured by.  With ``rho^2`` the pooled relative variance of the strata
    that varied (1 if none did): such a stratum gets ``rho^2 size^2``, and
    the sum is at least ``rho^2 sum mean^2 / m`` (module docstring).
    """
    varied = var > 1e-12 * mean * mean
    rho2 = var[varied].sum() / (mean[varied] ** 2).sum() if varied.any() else 1.0
    own = float((np.where(varied, var, rho2 * size * size) / m).sum())
    return max(own, float(rho2 * (mean * mean / m).sum()))


def estimate_below(tables: Tables, strata: list[Steps], probes: int = DEFAULT_PROBES, seed: int = 0,
                   exact_nodes: int = EXACT_NODES, interior: int = 0) -> Estimate:
    """Estimate nodes and foldings of the union of the disjoint subtrees ``strata``.

    For the runner's progress: pass the pending tasks to get the remaining
    nodes (and foldings) with an interval.  ``probes`` is the total probe
    budget (at least :data:`PILOT` + :data:`MIN_PROBES` per stratum are run
    whatever it is), ``exact_nodes`` the size up to which a stratum is
    counted outright (0: never), ``interior`` a number of exactly known
    nodes added to the node estimate.  Raises :class:`PrefixError` for a
    prefix that is not a node.  The strata must not overlap (not checked).
    """
    started = time.perf_counter()
    _check_probes(probes)
    strata = [tuple(int(m) for m in s) for s in strata]
    h = len(strata)
    if tables.n == 1:
        if any(strata):
            raise PrefixError("a map of one cell has no steps to take")
        return _exact_estimate(h, 0, h, 0, seed, started)  # its one folding has no node to expand
    if not strata:
        return _exact_estimate(0, interior, 0, 0, seed, started)
    _check_lengths(tables, strata)
    f = tables.factor
    none = np.zeros(h, np.int64)
    mix = seed % SEED_MODULUS
    _, pilot = _run_strata(tables, strata, np.full(h, PILOT, np.int64), mix ^ _PILOT_SALT, none)
    # count outright the strata the pilot found small (a wrong guess costs at most exact_nodes nodes)
    tried = pilot[:, 0] / PILOT <= SMALL * exact_nodes
    exact, sums = _run_strata(tables, strata, none, 0, np.where(tried, exact_nodes, 0))
    if exact.all():
        whole = sums.astype(np.int64)  # counted outright: whole numbers, kept exact
        return _exact_estimate(int(whole[:, 2].sum()) * f, interior + int(whole[:, 0].sum()), h, h * PILOT,
                               seed, started)
    p = ~exact
    m = _allocate(pilot[:, 0] / PILOT, p, probes - h * PILOT)
    _, main = _run_strata(tables, strata, m, mix ^ _MAIN_SALT, none)
    main, m = main[p], m[p].astype(np.float64)
    nodes_mean, leaves_mean = main[:, 0] / m, main[:, 2] / m
    nodes_var = _sample_var(main[:, 0], main[:, 1], m)
    leaves_var = _sample_var(main[:, 2], main[:, 3], m)
    per_node = leaves_mean.sum() / nodes_mean.sum() if leaves_mean.sum() > 0 else 1.0
    leaves_se = math.sqrt(_variance(leaves_mean, leaves_var, np.maximum(leaves_mean, per_node * nodes_mean), m))
    nodes_se = math.sqrt(_variance(nodes_mean, nodes_var, nodes_mean, m))

    known_leaves = float(sums[exact, 2].sum())
    known_nodes = interior + float(sums[exact, 0].sum())
    leaves = known_leaves + float(leaves_mean.sum())
    nodes = known_nodes + float(nodes_mean.sum())
    # a probed stratum has at least its own node, more than exact_nodes if counting it was tried
    least_nodes = known_nodes + float(np.where(tried[p], exact_nodes + 1, 1).sum())
    return Estimate(
        count=leaves * f,
        low=max(leaves - Z95 * leaves_se, known_leaves) * f,
        high=(leaves + Z95 * leaves_se) * f,
        count_se=leaves_se * f,
        nodes=nodes,
        nodes_low=max(nodes - Z95 * nodes_se, least_nodes),
        nodes_high=nodes + Z95 * nodes_se,
        nodes_se=nodes_se,
        exact=False,
        strata=h,
        exact_strata=int(exact.sum()),
        probes=h * PILOT + int(m.sum()),
        seed=seed,
        seconds=time.perf_counter() - started,
    )


def _sample_var(s1: np.ndarray, s2: np.ndarray, m: np.ndarray) -> np.ndarray:
    """Unbiased sample variance per probe from sums ``s1``, ``s2`` of ``m`` probes (0 when m < 2)."""
    mean = s1 / m
    var = np.maximum(s2 / m - mean * mean, 0.0) * m / np.maximum(m - 1, 1)
    return np.where(m >= 2, var, 0.0)


def _exact_estimate(count: int, nodes: int, strata: int, probes: int, seed: int, started: float) -> Estimate:
    """An :class:`Estimate` that is exact: every stratum was counted outright (values are ints)."""
    return Estimate(count=count, low=count, high=count, count_se=0.0, nodes=nodes, nodes_low=nodes,
                    nodes_high=nodes, nodes_se=0.0, exact=True, strata=strata, exact_strata=strata, probes=probes,
                    seed=seed, seconds=time.perf_counter() - started)


def interior_nodes(strata: list[Steps]) -> int:
    """Number of proper ancestors of the strata: the nodes a frontier's planning enumerated."""
    return len({s[:k] for s in strata for k in range(len(s))})


def estimate(tables: Tables, probes: int = DEFAULT_PROBES, seed: int = 0, strata: int | None = None,
             exact_nodes: int = EXACT_NODES) -> Estimate:
    """Estimate the foldings and node expansions of the whole map: stratified Knuth probes.

    Cuts the tree into about ``strata`` subtrees with :func:`plan` (1:
    plain probes from the root; default :data:`DEFAULT_STRATA`, fewer for
    few probes), counts the small ones outright and probes the rest with
    ``probes`` probes in all (module docstring).  The same arguments give
    the same estimate (``seed`` is taken modulo :data:`SEED_MODULUS`).
    """
    started = time.perf_counter()
    _check_probes(probes)
    if strata is None:
        strata = max(1, min(DEFAULT_STRATA, probes // PROBES_PER_STRATUM))
    frontier = list(plan(tables, strata, seed=seed % SEED_MODULUS)) if strata > 1 else [()]
    est = estimate_below(tables, frontier, probes, seed, exact_nodes, interior_nodes(frontier))
    return replace(est, seconds=time.perf_counter() - started)


def calibrate(tables: Tables, seconds: float = 2.0, seed: int = 0) -> float:
    """Node expansions per second of the kernel on one core of this machine, timed over about ``seconds``.

    Counts in turn for ``seconds / CALIBRATE_PIECES`` below each of a few
    random tasks of a small plan (expansion cost varies across the tree by
    about 10%, so one corner of it is a poor sample), cycling when the tree
    is small; the rate includes the per-call overhead a task pays.  Returns
    0.0 for a map with no node to expand (one cell).
    """
    if tables.n == 1:
        return 0.0
    count_below(tables, (), budget=1)  # compile or load the kernel outside the timing
    tasks = list(plan(tables, 4 * CALIBRATE_PIECES, probes=1, seed=seed % SEED_MODULUS))
    random.Random(seed).shuffle(tasks)
    piece = seconds / CALIBRATE_PIECES
    nodes, spent = 0, 0.0
    deadline = time.perf_counter() + seconds
    for task in itertools.cycle(tasks):
        left = deadline - time.perf_counter()
        if left <= 0:
            break
        out = count_below(tables, task, seconds=min(piece, left))
        nodes += out.nodes
        spent += out.seconds
    return nodes / spent if nodes else 0.0


def cost(est: Estimate, nodes_per_second: float, cores: int) -> Cost:
    """Core-hours for a full count of ``est.nodes`` nodes at ``nodes_per_second`` per core, on ``cores`` cores."""
    if nodes_per_second <= 0 and est.nodes_high > 0:
        raise ValueError("nodes_per_second must be positive")
    if cores < 1:
        raise ValueError("cores must be at least 1")
    per_hour = nodes_per_second * 3600.0 or 1.0  # a search of no nodes costs nothing at any rate
    return Cost(nodes_per_second=nodes_per_second, cores=cores, core_hours=est.nodes / per_hour,
                core_hours_low=est.nodes_low / per_hour, core_hours_high=est.nodes_high / per_hour)


# --------------------------------------------------------------------------
# Reporting (the command line prints these)
# --------------------------------------------------------------------------

def _number(x: float) -> float | None:
    """A JSON value: the float, or None when it overflowed (JSON has no infinity)."""
    return float(x) if math.isfinite(x) else None


def as_json(est: Estimate, spend: Cost) -> dict:
    """The estimate and its cost as one JSON-ready dict (exact values as ints)."""
    value = int if est.exact else _number
    return {
        "estimate": value(est.count),
        "low": value(est.low),
        "high": value(est.high),
        "count_se": _number(est.count_se),
        "exact": est.exact,
        "nodes": value(est.nodes),
        "nodes_low": value(est.nodes_low),
        "nodes_high": value(est.nodes_high),
        "nodes_se": _number(est.nodes_se),
        "strata": est.strata,
        "exact_strata": est.exact_strata,
        "probes": est.probes,
        "seed": est.seed,
        "estimate_seconds": round(est.seconds, 3),
        "nodes_per_second": round(spend.nodes_per_second, 1),
        "cores": spend.cores,
        "core_hours": _number(spend.core_hours),
        "core_hours_low": _number(spend.core_hours_low),
        "core_hours_high": _number(spend.core_hours_high),
        "core_years": _number(spend.core_years),
        "wall_hours": _number(spend.wall_hours),
        "wall_hours_low": _number(spend.wall_hours_low),
        "wall_hours_high": _number(spend.wall_hours_high),
    }


def _big(x: float) -> str:
    """A count for people: digits with commas below 10^9, else 4 significant figures."""
    return f"{x:,.0f}" if x < 1e9 else f"{x:.3e}"


def _duration(hours: float) -> str:
    """Hours as seconds, minutes, hours, days or years, whichever reads best."""
    seconds = hours * 3600.0
    for unit, size in (("years", HOURS_PER_YEAR * 3600.0), ("days", 86400.0), ("h", 3600.0), ("min", 60.0)):
        if seconds >= size:
            return f"{seconds / size:,.1f} {unit}"
    return f"{seconds:.1f} s"


def _hours(x: float) -> str:
    """Core-hours for people: whole hours with commas from 100 up, else 2 significant figures."""
    return f"{x:,.0f}" if x >= 100 else f"{x:.2g}"


def describe(shape: str, est: Estimate, spend: Cost) -> list[str]:
    """Lines for people: count and nodes with 95% intervals, any published value, the rate, the cost."""
    if est.exact:
        lines = [f"{shape}: {int(est.count)} foldings, counted outright (the tree is small enough: "
                 f"every one of its {est.strata:,} strata was)",
                 f"search tree: {int(est.nodes):,} nodes"]
    else:
        lines = [f"{shape}: about {_big(est.count)} foldings, 95% interval {_big(est.low)} to {_big(est.high)} "
                 f"(an estimate: {est.probes:,} random probes, {est.strata:,} strata of which "
                 f"{est.exact_strata:,} counted outright, seed {est.seed})",
                 f"search tree: about {_big(est.nodes)} nodes, 95% interval {_big(est.nodes_low)} to "
                 f"{_big(est.nodes_high)}"]
    if not est.exact and (est.count_se > est.count / 2 or est.nodes_se > est.nodes / 2):
        lines.append("rough: a standard error above half the estimate; more --probes narrow the intervals")
    lines += [f"published: {v.count} ({v.source})" for v in published(shape)]
    if spend.nodes_per_second > 0:
        lines.append(f"this machine: {spend.nodes_per_second / 1e6:,.1f} million nodes/s on one core")
    years = ""
    if spend.core_hours_high >= HOURS_PER_YEAR / 10:
        years = (f" = {spend.core_years:,.2f} core-years (interval {spend.core_hours_low / HOURS_PER_YEAR:,.2f} "
                 f"to {spend.core_hours_high / HOURS_PER_YEAR:,.2f})")
    lines.append(f"full count: about {_hours(spend.core_hours)} core-hours (interval {_hours(spend.core_hours_low)} "
                 f"to {_hours(spend.core_hours_high)}){years}")
    lines.append(f"on {spend.cores:,} cores: about {_duration(spend.wall_hours)} of wall time "
                 f"({_duration(spend.wall_hours_low)} to {_duration(spend.wall_hours_high)}), "
                 f"assuming every core counts at this machine's rate")
    return lines

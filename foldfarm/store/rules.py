"""Decision rules of the store as plain functions (no database needed to test them).

The store's write methods read the current row under a lock, ask one of
these functions what to do, and then write (or not) in the same transaction.
"""

from __future__ import annotations

import enum
import math
import operator
from datetime import UTC, datetime, timedelta

from foldfarm.store.errors import StoreError

TASK_STATES = ("pending", "running", "done", "split", "failed")
#: Tasks whose subtree is not counted yet: a result may still be recorded.
OPEN_STATES = ("pending", "running", "failed")
#: Tasks whose count (done) or partial count (split) is part of the total.
COUNTED_STATES = ("done", "split")

RUN_STATES = ("planned", "running", "stopped", "done", "verified", "suspect")
VERIFICATION_STATES = ("unchecked", "passed", "failed")

#: Allowed run state changes (a state may always be set to itself).
RUN_TRANSITIONS = {
    "planned": {"running", "stopped"},
    "running": {"stopped", "done"},
    "stopped": {"running"},
    "done": {"verified", "suspect"},
    "verified": {"suspect"},
    "suspect": {"verified"},
}

INT64_MAX = 2**63 - 1
#: Most decimal digits of an exact run total (10**64 is far beyond any enumeration).
TOTAL_DIGITS = 64


class Recorded(enum.Enum):
    """What recording a result did."""

    NEW = "new"  #: the task was open and is now done / split
    SAME = "same"  #: the identical result was already stored; nothing changed


class Verdict(enum.Enum):
    """Decision for one offered result."""

    WRITE = "write"
    SAME = "same"
    CONFLICT = "conflict"


def judge_done(state: str, stored_count: int | None, count: int) -> Verdict:
    """Decide what to do with a *done* result for a task in ``state``.

    >>> judge_done("running", None, 5), judge_done("done", 5, 5), judge_done("done", 5, 6)
    (<Verdict.WRITE: 'write'>, <Verdict.SAME: 'same'>, <Verdict.CONFLICT: 'conflict'>)

    A split task never becomes done: its remainder children are already
    pending, so a full count would count their subtrees twice.
    """
    if state in OPEN_STATES:
        return Verdict.WRITE
    if state == "done" and stored_count == count:
        return Verdict.SAME
    return Verdict.CONFLICT


def judge_split(
    state: str,
    stored_partial: int | None,
    stored_children: frozenset[str],
    partial: int,
    children: frozenset[str],
) -> Verdict:
    """Decide what to do with a *split* result for a task in ``state``.

    >>> judge_split("split", 3, frozenset({"/1/2"}), 3, frozenset({"/1/2"}))
    <Verdict.SAME: 'same'>
    >>> judge_split("done", 7, frozenset(), 3, frozenset({"/1/2"}))
    <Verdict.CONFLICT: 'conflict'>
    """
    if state in OPEN_STATES:
        return Verdict.WRITE
    if state == "split" and stored_partial == partial and stored_children == children:
        return Verdict.SAME
    return Verdict.CONFLICT


def check_run_transition(run_id: int, old: str, new: str) -> None:
    """Raise :class:`StoreError` unless a run may go from ``old`` to ``new``."""
    if new not in RUN_STATES:
        raise StoreError(f"{new!r} is not a run state; use one of {', '.join(RUN_STATES)}")
    if new != old and new not in RUN_TRANSITIONS.get(old, set()):
        allowed = ", ".join(sorted(RUN_TRANSITIONS.get(old, set()))) or "nothing"
        raise StoreError(f"run {run_id} is {old} and cannot become {new} (from {old}: {allowed})")


def check_int64(value: object, what: str) -> int:
    """Return ``value`` as an int in ``0 .. 2**63-1`` or raise :class:`StoreError`.

    Accepts any integer type (numpy integers included), refuses bool and floats.
    """
    try:
        if isinstance(value, bool):
            raise TypeError
        number = operator.index(value)
    except TypeError:
        raise StoreError(f"{what} must be a whole number, got {value!r}") from None
    if not 0 <= number <= INT64_MAX:
        raise StoreError(f"{what} = {number} is outside 0 .. 2**63-1, the range a task count may take")
    return number


def check_total(value: object) -> int:
    """Return ``value`` as an exact run total (int >= 0, at most 64 digits) or raise :class:`StoreError`."""
    try:
        if isinstance(value, bool):
            raise TypeError
        number = operator.index(value)
    except TypeError:
        raise StoreError(f"a run total must be a whole number, got {value!r}") from None
    if number < 0 or len(str(number)) > TOTAL_DIGITS:
        raise StoreError(f"a run total must lie in 0 .. 10**{TOTAL_DIGITS} - 1, got {number}")
    return number


def check_seconds(value: object, what: str) -> float:
    """Return ``value`` as a finite non-negative float (seconds) or raise :class:`StoreError`."""
    try:
        seconds = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        raise StoreError(f"{what} must be a number of seconds, got {value!r}") from None
    if not math.isfinite(seconds) or seconds < 0:
        raise StoreError(f"{what} must be a finite number of seconds >= 0, got {value!r}")
    return seconds


def utc(now: datetime | None = None) -> datetime:
    """``now`` (default: the current time) as a naive UTC datetime, the form stored."""
    if now is None:
        now = datetime.now(UTC)
    if now.tzinfo is not None:
        now = now.astimezone(UTC).replace(tzinfo=None)
    return now


class LeaseVerdict(enum.Enum):
    """What :func:`judge_lease` decided."""

    GRANT = "grant"  #: nobody holds the run
    RENEW = "renew"  #: the caller already holds it
    TAKE_OVER = "take over"  #: someone else held it, but the heartbeat expired or force was asked
    REFUSE = "refuse"  #: someone else holds it and is alive


def judge_lease(
    current_holder: str | None,
    heartbeat_at: datetime | None,
    holder: str,
    ttl_seconds: float,
    now: datetime,
    force: bool = False,
) -> LeaseVerdict:
    """Decide whether ``holder`` may take a run's lease at ``now`` (naive UTC).

    A lease is live while ``now - heartbeat_at <= ttl_seconds``.

    >>> t = datetime(2024, 5, 1, 12, 0, 0)
    >>> judge_lease("tern-a", t, "tern-b", 60, t + timedelta(seconds=30)).value
    'refuse'
    >>> judge_lease("tern-a", t, "tern-b", 60, t + timedelta(seconds=61)).value
    'take over'
    """
    if current_holder is None:
        return LeaseVerdict.GRANT
    if current_holder == holder:
        return LeaseVerdict.RENEW
    assert heartbeat_at is not None
    if force or now - heartbeat_at > timedelta(seconds=ttl_seconds):
        return LeaseVerdict.TAKE_OVER
    return LeaseVerdict.REFUSE

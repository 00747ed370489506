"""The run lease: one driver per run, kept alive by heartbeats.

Functions here run inside a write transaction opened by
:class:`foldfarm.store.Store`; the decision itself is
:func:`foldfarm.store.rules.judge_lease`.
"""

from __future__ import annotations

from dataclasses import dataclass
from datetime import datetime

from sqlalchemy import Connection, delete, insert, select, update

from foldfarm.store.errors import LeaseHeld, LeaseLost, StoreError
from foldfarm.store.models import Lease
from foldfarm.store.rules import LeaseVerdict, judge_lease

MAX_HOLDER_LENGTH = 256


@dataclass(frozen=True)
class LeaseInfo:
    """A run's lease as stored; times are naive UTC."""

    run_id: int
    holder: str
    acquired_at: datetime
    heartbeat_at: datetime


def check_holder(holder: object) -> str:
    """Return ``holder`` if it is a usable holder name (e.g. ``host:pid``)."""
    if not isinstance(holder, str) or not holder.strip() or len(holder) > MAX_HOLDER_LENGTH:
        raise StoreError(
            f"lease holder must be a non-empty name of at most {MAX_HOLDER_LENGTH} characters, got {holder!r}"
        )
    return holder


def current(conn: Connection, run_id: int, lock: bool = False) -> LeaseInfo | None:
    """The lease row of ``run_id``, or ``None``."""
    stmt = select(Lease.run_id, Lease.holder, Lease.acquired_at, Lease.heartbeat_at).where(Lease.run_id == run_id)
    if lock:
        stmt = stmt.with_for_update()
    row = conn.execute(stmt).one_or_none()
    return None if row is None else LeaseInfo(*row)


def acquire(conn: Connection, run_id: int, holder: str, ttl_seconds: float, now: datetime, force: bool) -> LeaseInfo:
    """Take or renew the lease; raise :class:`LeaseHeld` if another live driver has it."""
    lease = current(conn, run_id, lock=True)
    verdict = judge_lease(
        lease.holder if lease else None, lease.heartbeat_at if lease else None, holder, ttl_seconds, now, force
    )
    if verdict is LeaseVerdict.REFUSE:
        assert lease is not None
        age = (now - lease.heartbeat_at).total_seconds()
        raise LeaseHeld(
            f"run {run_id} is driven by {lease.holder!r} since {lease.acquired_at:%Y-%m-%d %H:%M:%S} UTC "
            f"(last heartbeat {age:.0f} s ago); wait until its heartbeat is more than {ttl_seconds:g} s old, "
            "or force a takeover once you are sure that driver is gone"
        )
    if verdict is LeaseVerdict.GRANT:
        conn.execute(insert(Lease).values(run_id=run_id, holder=holder, acquired_at=now, heartbeat_at=now))
        return LeaseInfo(run_id, holder, now, now)
    if verdict is LeaseVerdict.RENEW:
        assert lease is not None
        conn.execute(update(Lease).where(Lease.run_id == run_id).values(heartbeat_at=now))
        return LeaseInfo(run_id, holder, lease.acquired_at, now)
    conn.execute(update(Lease).where(Lease.run_id == run_id).values(holder=holder, acquired_at=now, heartbeat_at=now))
    return LeaseInfo(run_id, holder, now, now)


def beat(conn: Connection, run_id: int, holder: str, now: datetime) -> LeaseInfo:
    """Renew ``holder``'s lease; raise :class:`LeaseLost` if it holds it no more."""
    lease = current(conn, run_id, lock=True)
    if lease is None or lease.holder != holder:
        who = f"now held by {lease.holder!r}" if lease else "released"
        raise LeaseLost(f"{holder!r} no longer drives run {run_id}: the lease was {who}; stop dispatching its tasks")
    conn.execute(update(Lease).where(Lease.run_id == run_id).values(heartbeat_at=now))
    return LeaseInfo(run_id, holder, lease.acquired_at, now)


def release(conn: Connection, run_id: int, holder: str) -> bool:
    """Drop ``holder``'s lease; False if it did not hold it (nothing changes then)."""
    return conn.execute(delete(Lease).where(Lease.run_id == run_id, Lease.holder == holder)).rowcount > 0

"""Riding out a Dask scheduler that goes away (a killed scheduler, a head node that reboots).

When the coordinator's connection to its scheduler drops, Dask cancels
every future of the client (reason :data:`LOST_REASON`) and tries to
reconnect for its own short while (10 s), after which the client is closed
and any call on it raises.  The coordinator does not lean on that: as soon
as it sees the loss (:func:`scheduler_lost`) it

1. says so in one line, records the results it holds, and returns every task
   it had claimed or in flight to pending (the futures carrying them are
   gone with the old client; a result an old future might still bring is
   dropped, and the store would judge a repeat anyway:
   :mod:`foldfarm.store.rules`);
2. closes the old client and makes a new one to the same address, trying
   again after growing pauses (:class:`SchedulerWait`, the same kind of wait
   as for a store outage, :class:`foldfarm.outage.Outage`) until the run's
   ``scheduler_wait`` seconds (default :data:`SCHEDULER_WAIT`) are used up;
3. on success says so, registers the worker plugin again (workers that join
   the new scheduler load the kernel before their first task) and carries
   on submitting; past the wait raises :class:`SchedulerGone`, and the run
   stops as cleanly as on Ctrl-C.

A cluster that foldfarm started itself (local or SLURM) runs its scheduler
inside the coordinator's process: if that scheduler is lost anyway, there
is nothing to reconnect to, and the run stops cleanly at once
(:func:`reconnectable`).

The decisions here are plain functions and a small state object; the
connecting itself is passed in (:func:`foldfarm.run.drive` gives a Dask
client maker), so everything is tested without a cluster.

>>> answers = iter([False, False, True])      # the scheduler is back at the third try
>>> def connect():
...     if not next(answers):
...         raise ConnectionRefusedError("refused")
...     return "client"
>>> clock = [0.0]
>>> wait = SchedulerWait(60)
>>> reconnect(connect, wait, sleep=lambda s: clock.__setitem__(0, clock[0] + s), clock=lambda: clock[0])
('client', 1.5)
"""

from __future__ import annotations

import time
from dataclasses import dataclass, field
from typing import Any, Callable

from foldfarm.outage import Outage

#: Seconds the coordinator tries to reach a scheduler it lost before it stops the run (default).
SCHEDULER_WAIT = 300.0
#: Longest pause between two tries, seconds: a scheduler is cheap to ask, and a short pause
#: finds one that is back soon after it is.
RETRY_MOST = 5.0
#: The reason Dask gives the futures it cancels when the client's connection to the scheduler drops.
LOST_REASON = "scheduler-connection-lost"
#: Client states in which the scheduler does not answer: reconnecting by itself, closing, closed.
_DOWN = frozenset({"connecting", "closing", "closed"})


class SchedulerLost(Exception):
    """The client lost its scheduler (raised inside the coordinator's loop, which handles it)."""


class SchedulerGone(Exception):
    """No scheduler answered at the address within the run's wait, or there is none to reconnect to."""


def scheduler_lost(status: str, error: BaseException | None = None) -> bool:
    """Whether a client in ``status`` (``Client.status``), or the ``error`` of a future or call, means a lost scheduler.

    A future cancelled for any other reason (a task Dask gave up on) is not a
    lost scheduler, nor is an error raised by a task itself.

    >>> scheduler_lost("running"), scheduler_lost("connecting"), scheduler_lost("closed")
    (False, True, True)
    >>> class FutureCancelledError(Exception):
    ...     reason = LOST_REASON
    >>> scheduler_lost("running", FutureCancelledError()), scheduler_lost("running", KeyError("x"))
    (True, False)
    """
    if status in _DOWN:
        return True
    if error is None:
        return False
    return getattr(error, "reason", None) == LOST_REASON or type(error).__name__ == "ClosedClientError"


def reconnectable(address: str | None, own_cluster: bool) -> bool:
    """Whether a lost scheduler is worth waiting for: one at an address of its own, not one of a cluster we started.

    >>> reconnectable("tcp://127.0.0.1:8786", False), reconnectable("tcp://127.0.0.1:40123", True)
    (True, False)
    """
    return bool(address) and not own_cluster


@dataclass
class SchedulerWait:
    """One stretch of time without a scheduler: pauses between tries, the deadline, the length when it ends.

    ``wait`` is the longest it may last, in seconds (0: give up after one try).

    >>> w = SchedulerWait(10)
    >>> [w.failed(t) for t in (100.0, 100.5, 101.5, 103.5, 107.5, 110.0)]
    [0.5, 1.0, 2.0, 4.0, 2.5, None]
    >>> w.over(111.0), w.over(112.0)
    (11.0, None)
    """

    wait: float
    most: float = RETRY_MOST
    outage: Outage = field(init=False)

    def __post_init__(self) -> None:
        self.outage = Outage(self.wait, most=self.most)

    def failed(self, now: float) -> float | None:
        """A try failed at ``now``: seconds to pause before the next, or None when the wait is used up."""
        return self.outage.failed(now)

    def over(self, now: float) -> float | None:
        """A try succeeded at ``now``: how long the scheduler was away (None if it was not)."""
        return self.outage.over(now)


def reconnect(connect: Callable[[], Any], wait: SchedulerWait, *, sleep: Callable[[float], None] = time.sleep,
              clock: Callable[[], float] = time.monotonic) -> tuple[Any, float]:
    """``connect()`` until it returns, pausing as ``wait`` says; return what it gave and the seconds it took.

    ``connect`` raises :class:`OSError` or :class:`foldfarm.errors.UserError`
    (a scheduler that does not answer, :func:`foldfarm.run.probe_scheduler`)
    while the scheduler is away; any other error passes through.  Raises
    :class:`SchedulerGone` when the wait is used up; the clock starts at
    the first try.
    """
    from foldfarm.errors import UserError

    while True:
        try:
            made = connect()
        except (OSError, UserError, TimeoutError) as exc:
            pause = wait.failed(clock())
            if pause is None:
                raise SchedulerGone(f"no Dask scheduler answered for {wait.wait:g} s ({_first_line(exc)})") from None
            sleep(pause)
            continue
        return made, wait.over(clock()) or 0.0


def _first_line(exc: BaseException) -> str:
    text = str(exc).strip().splitlines()
    return text[0] if text else type(exc).__name__

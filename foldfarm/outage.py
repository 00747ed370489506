"""Riding out a store that stops answering for a while (a PostgreSQL restart, a network blip).

The coordinator talks to its store through a :class:`PatientStore`.  A call
that fails with :class:`foldfarm.store.StoreUnavailable` (the store layer
decides what is transient: :func:`foldfarm.store.is_transient`) is tried
again after a growing pause (:func:`retry_delay`) until the store answers or
the outage has lasted :data:`STORE_WAIT` seconds (configurable); then
:class:`StoreGone` ends the run's loop, which stops cleanly and says how to
resume.  Any other error passes through at once.

State of one outage (:class:`Outage`): ``began`` (monotonic seconds of the
first failed try, None while the store answers) and ``tries`` (failed tries
since then).  A call that succeeds ends the outage.

Nothing is lost while it waits: results that arrive stay with the Dask
client (and in the coordinator's unrecorded list) until a call goes through,
and every write the loop repeats is safe to repeat (the store records the
same result once).  The run's lease may expire meanwhile; the heartbeat
renews it when the store is back, and if another coordinator took the run
over, the next beat says so and this one stops.

>>> fake = iter([True, True, False])     # the store fails twice, then answers
>>> def call():
...     from foldfarm.store import StoreUnavailable
...     if next(fake):
...         raise StoreUnavailable("store sqlite:///x: connecting failed: refused")
...     return "answer"
>>> said, clock = [], [0.0]
>>> def sleep(seconds):
...     clock[0] += seconds
>>> patient = PatientStore(None, wait=60, notice=said.append, sleep=sleep, clock=lambda: clock[0])
>>> patient.call(call)
'answer'
>>> clock[0], len(said)
(1.5, 2)
"""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any, Callable

from foldfarm.store import StoreError, StoreUnavailable

#: Seconds the coordinator waits for a store that stopped answering before it stops the run (default).
STORE_WAIT = 300.0
#: First pause between tries, seconds; each next pause doubles, up to RETRY_MOST.
RETRY_FIRST = 0.5
RETRY_MOST = 15.0


class StoreGone(StoreError):
    """The store did not answer for longer than the coordinator was told to wait."""


def retry_delay(tries: int, first: float = RETRY_FIRST, most: float = RETRY_MOST) -> float:
    """Seconds to pause after the ``tries``-th failed try in a row (1, 2, ...): doubling, capped.

    >>> [retry_delay(n) for n in range(1, 8)]
    [0.5, 1.0, 2.0, 4.0, 8.0, 15.0, 15.0]
    """
    return min(most, first * 2 ** (tries - 1))


@dataclass
class Outage:
    """One stretch of time in which the store does not answer; decides how long to pause, and when to stop.

    ``wait`` is the longest the outage may last, in seconds; ``most`` the longest pause between tries.

    >>> o = Outage(wait=10)
    >>> o.failed(100.0), o.failed(100.5), o.failed(101.5), o.failed(109.0), o.failed(110.0)
    (0.5, 1.0, 2.0, 1.0, None)
    >>> o.over(112.0)
    12.0
    >>> o.began is None, o.over(113.0)
    (True, None)
    """

    wait: float
    began: float | None = None
    tries: int = 0
    most: float = RETRY_MOST

    def failed(self, now: float) -> float | None:
        """A try failed at ``now``: seconds to pause before the next, or None when the wait is used up.

        The last pause is cut short so that the final try falls on the deadline.
        """
        if self.began is None:
            self.began = now
        self.tries += 1
        left = self.began + self.wait - now
        if left <= 0:
            return None
        return min(retry_delay(self.tries, most=self.most), left)

    def over(self, now: float) -> float | None:
        """A try succeeded at ``now``: the outage's length in seconds if there was one (and it ends), else None."""
        if self.began is None:
            return None
        lasted = now - self.began
        self.began, self.tries = None, 0
        return lasted


class PatientStore:
    """A :class:`foldfarm.store.Store` whose methods wait out an outage of up to ``wait`` seconds.

    Attributes other than methods (``display_url``, ``url``) are the store's.
    ``notice`` receives one line when an outage begins and one when it ends;
    ``holding`` (optional) says how many results the caller holds unrecorded,
    for the first line.  Raises :class:`StoreGone` when the wait is used up.
    """

    def __init__(self, store, wait: float = STORE_WAIT, notice: Callable[[str], None] | None = None,
                 holding: Callable[[], int] | None = None, *, sleep: Callable[[float], None] = time.sleep,
                 clock: Callable[[], float] = time.monotonic) -> None:
        self.store = store
        self.wait = wait
        self.outage = Outage(wait)
        self._notice = notice or (lambda line: None)
        self._holding = holding
        self._sleep = sleep
        self._clock = clock

    def __getattr__(self, name: str) -> Any:
        value = getattr(self.store, name)
        if not callable(value):
            return value
        return lambda *args, **kwargs: self.call(value, *args, **kwargs)

    def call(self, fn: Callable, *args, **kwargs) -> Any:
        """``fn(*args, **kwargs)``, tried again while the store is unavailable and the wait lasts."""
        while True:
            try:
                result = fn(*args, **kwargs)
            except StoreUnavailable as exc:
                first = self.outage.began is None
                pause = self.outage.failed(self._clock())
                if pause is None:
                    raise StoreGone(f"the store did not answer for {self.wait:g} s ({exc})") from None
                if first:
                    self._notice(self._waiting_line(exc))
                self._sleep(pause)
                continue
            lasted = self.outage.over(self._clock())
            if lasted is not None:
                self._notice(f"foldfarm: the store answers again after {lasted:.0f} s; continuing")
            return result

    def _waiting_line(self, exc: StoreError) -> str:
        held = self._holding() if self._holding is not None else 0
        holds = f"; holding {held:,} result{'s' if held != 1 else ''} not yet recorded" if held else ""
        return f"foldfarm: {exc}{holds}; trying again for up to {self.wait:g} s"

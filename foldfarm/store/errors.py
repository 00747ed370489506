"""Exceptions of the store.  Every message is one line and never shows a password."""

from __future__ import annotations

from foldfarm.errors import UserError


class StoreError(UserError):
    """The store cannot do what was asked: bad URL, unreachable server, bad input, missing run.

    Subclasses :class:`foldfarm.errors.UserError`, so the command line prints
    the message as one line and exits with code 2.
    """

    def __init__(self, message: str) -> None:
        # One line, whatever the driver put in the text we quote.
        super().__init__(" ".join(str(message).split()))


class SchemaVersionError(StoreError):
    """The store was written by a foldfarm with another schema version."""


class ResultConflict(StoreError):
    """A result disagrees with the one already stored for the task; nothing was overwritten.

    Attributes: ``task_id``, ``prefix``, ``stored`` (what the store holds, as
    text) and ``offered`` (the rejected result, as text).
    """

    def __init__(self, task_id: int, prefix: str, stored: str, offered: str) -> None:
        self.task_id = task_id
        self.prefix = prefix
        self.stored = stored
        self.offered = offered
        super().__init__(
            f"task {task_id} ({prefix}) is already {stored}; the new result ({offered}) disagrees and was not recorded"
        )


class LeaseHeld(StoreError):
    """Another driver holds the run's lease and its heartbeat is recent."""


class LeaseLost(StoreError):
    """The caller no longer holds the lease it is renewing (expired and taken over, or released)."""

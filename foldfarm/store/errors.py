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


class StoreUnavailable(StoreError):
    """The store did not answer (server restarting, network down, database busy): trying again may work.

    Whatever the call was doing was rolled back, or, if the connection broke
    while the commit was under way, may have landed: the writes a run makes
    while it counts (claiming tasks, recording results, failures, the lease)
    are safe to repeat, since recording the same result again changes nothing.
    """


#: SQLSTATEs of a PostgreSQL that is restarting or out of room for a while, not of a wrong request:
#: class 08 (connection exception), 57P01..57P03 (admin or crash shutdown, cannot connect now),
#: 53300 (too many connections), 40001 and 40P01 (serialization failure, deadlock: retry the transaction).
TRANSIENT_SQLSTATES = frozenset({"57P01", "57P02", "57P03", "53300", "40001", "40P01"})
#: What a PostgreSQL server that refuses a connection for a while says (libpq reports a refused
#: connection without SQLSTATE, so the text tells a restart from a wrong password or database).
TRANSIENT_FATAL = (
    "the database system is starting up", "the database system is shutting down",
    "the database system is in recovery mode", "the database system is not yet accepting connections",
    "too many clients", "terminating connection due to administrator command",
)
#: What SQLite says when another writer held the lock for longer than the busy timeout.
TRANSIENT_SQLITE = ("database is locked", "database table is locked", "database is busy")


def is_transient(error: BaseException) -> bool:
    """Whether a database error says "not now" rather than "never": the call may succeed if repeated.

    ``error`` is what SQLAlchemy raised (its driver's error in ``.orig``).  A
    PostgreSQL error without SQLSTATE is one the client met on the way (refused,
    reset or timed-out connection), unless the server answered the connection
    with a ``FATAL`` other than those of :data:`TRANSIENT_FATAL`; one with a
    SQLSTATE is transient only if listed in :data:`TRANSIENT_SQLSTATES` or of
    class 08.  A wrong password, a missing database or a broken constraint is
    not.

    >>> from sqlalchemy.exc import OperationalError, IntegrityError
    >>> import psycopg.errors as pg
    >>> is_transient(OperationalError("SELECT 1", {}, pg.OperationalError("connection refused")))
    True
    >>> is_transient(OperationalError("SELECT 1", {}, pg.AdminShutdown("terminating connection")))
    True
    >>> is_transient(OperationalError("SELECT 1", {}, pg.InvalidPassword("password authentication failed")))
    False
    >>> is_transient(OperationalError("", {}, pg.OperationalError('FATAL:  database "tern" does not exist')))
    False
    >>> is_transient(IntegrityError("INSERT", {}, pg.UniqueViolation("duplicate key")))
    False
    """
    from sqlalchemy.exc import DBAPIError, DisconnectionError, OperationalError, TimeoutError

    if isinstance(error, (DisconnectionError, TimeoutError)):
        return True
    if not isinstance(error, DBAPIError):
        return False
    if error.connection_invalidated:
        return True
    orig = error.orig
    module = type(orig).__module__ or ""
    if module.startswith("sqlite3"):
        return isinstance(error, OperationalError) and str(orig).lower().startswith(TRANSIENT_SQLITE)
    state = getattr(orig, "sqlstate", None) or getattr(orig, "pgcode", None)
    if state is None:
        text = str(orig)
        refused = "FATAL:" in text and not any(message in text for message in TRANSIENT_FATAL)
        return isinstance(error, OperationalError) and not refused
    return state in TRANSIENT_SQLSTATES or state.startswith("08")

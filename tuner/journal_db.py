"""The trial journal's tables and engines, the connection settings and the retry after a
lost database connection.

Shared by the trial journal (tuner/journal.py, Optuna's storage on these tables) and the
service's own engine; kept apart from the journal so that creating the schema or
reconnecting loads SQLAlchemy alone, not Optuna.
"""

from __future__ import annotations

import logging
import threading
import time
from collections.abc import Callable
from typing import Any, TypeVar

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.engine import Engine

_META = sa.MetaData()
JOURNAL = sa.Table(
    "gk_trial_journal", _META,
    sa.Column("study", sa.String(255), primary_key=True),
    sa.Column("seq", sa.Integer, primary_key=True, autoincrement=False),
    sa.Column("body", sa.Text, nullable=False),
)
BEATS = sa.Table(
    "gk_trial_beats", _META,
    sa.Column("study", sa.String(255), primary_key=True),
    sa.Column("trial_id", sa.Integer, primary_key=True, autoincrement=False),
    sa.Column("beat_at", sa.Float, nullable=False),  # seconds since the epoch
)
# A lock wait beats a failure: SQLite's default 5 s is short behind a busy writer.
_SQLITE_TIMEOUT_S = 60

# libpq settings for every PostgreSQL connection: give up connecting after 5 s, and drop a
# connection whose peer is gone (keepalives; unacknowledged data after 10 s) instead of
# waiting for the kernel's retransmission timeout of about a quarter of an hour. The
# caller sees an OperationalError it can retry, not a hang. On the server side, a session
# left idle inside a transaction for 30 s is ended: a client cut off mid-transaction (its
# side already gave up) must not hold row locks, e.g. on a job row, until the server's
# own keepalives notice hours later. No transaction of ours waits that long between two
# statements.
POSTGRES_CONNECT_ARGS: dict[str, Any] = {
    "connect_timeout": 5, "keepalives": 1, "keepalives_idle": 5, "keepalives_interval": 2,
    "keepalives_count": 3, "tcp_user_timeout": 10_000,
    "options": "-c idle_in_transaction_session_timeout=30000",
}
# How long a journal operation waits for a lost database to come back before it fails.
RECONNECT_SECONDS = 300.0

log = logging.getLogger("tuner.journal")

_engines: dict[tuple[str, bool], Engine] = {}
_lock = threading.Lock()
_ready: set[str] = set()  # URLs whose tables this process has seen


def _sqlite_connect(dbapi_conn: Any, _record: Any) -> None:
    cur = dbapi_conn.cursor()
    # WAL: readers never wait for the writer. NORMAL: a commit costs no fsync in WAL mode
    # and survives any process crash (only an OS crash can lose the last commits).
    cur.execute("PRAGMA journal_mode=WAL")
    cur.execute("PRAGMA synchronous=NORMAL")
    # After a checkpoint that empties the WAL, cut the file back to 64 MiB: without it the
    # WAL keeps the size of its largest burst for the life of the database.
    cur.execute("PRAGMA journal_size_limit=67108864")
    cur.execute(f"PRAGMA busy_timeout={_SQLITE_TIMEOUT_S * 1000}")
    cur.close()


def _sqlite_autocommit_driver(dbapi_conn: Any, _record: Any) -> None:
    dbapi_conn.isolation_level = None  # SQLAlchemy emits BEGIN itself (see below)


def _begin_immediate(conn: sa.Connection) -> None:
    # Take the write lock at BEGIN: a deferred transaction that read first could find its
    # snapshot outdated when it writes, which WAL reports as an error, not a wait.
    conn.exec_driver_sql("BEGIN IMMEDIATE")


def engine(url: str, *, writer: bool = False) -> Engine:
    """One pooled engine per URL (SQLite: a separate one for writes) per process."""
    sqlite = url.startswith("sqlite")
    key = (url, writer and sqlite)
    with _lock:
        if key not in _engines:
            if sqlite:
                made = sa.create_engine(url, connect_args={"timeout": _SQLITE_TIMEOUT_S,
                                                           "check_same_thread": False})
                event.listen(made, "connect", _sqlite_connect)
                if writer:
                    event.listen(made, "connect", _sqlite_autocommit_driver)
                    event.listen(made, "begin", _begin_immediate)
            else:
                made = sa.create_engine(url, pool_pre_ping=True,
                                        connect_args=POSTGRES_CONNECT_ARGS)
            _engines[key] = made
        return _engines[key]


def dispose_engines(*, close: bool = True) -> None:
    """Drop every pool; a forked child passes ``close=False`` to keep its parent's."""
    with _lock:
        for made in _engines.values():
            made.dispose(close=close)
        _engines.clear()
        _ready.clear()


def create_tables(url: str) -> None:
    """Create the journal tables if missing; once per URL per process.

    Idempotent, and safe when several processes start at once: the loser of the race to
    CREATE TABLE finds the winner's tables (docs/measured-facts.md §2, start-up race).
    """
    if url in _ready:
        return
    try:
        _META.create_all(engine(url, writer=True), checkfirst=True)
    except sa.exc.DBAPIError:
        present = sa.inspect(engine(url)).get_table_names()
        if not all(name in present for name in _META.tables):
            raise
    _ready.add(url)


def is_transient(exc: BaseException) -> bool:
    """Whether ``exc`` is a lost or refused connection (or a busy SQLite file): worth a retry.

    SQLAlchemy wraps driver errors (``OperationalError``, ``InterfaceError``, or any error
    it saw invalidate the connection); the journal's raw driver calls raise the driver's
    own ``OperationalError`` / ``InterfaceError``, which both psycopg and sqlite3 define.
    """
    if isinstance(exc, sa.exc.DBAPIError):
        return bool(exc.connection_invalidated) or isinstance(
            exc, sa.exc.OperationalError | sa.exc.InterfaceError)
    if isinstance(exc, sa.exc.DisconnectionError | sa.exc.TimeoutError):
        return True
    kind = type(exc)
    return any(c.__name__ in ("OperationalError", "InterfaceError")
               and c.__module__.split(".")[0] in ("psycopg", "sqlite3", "psycopg2")
               for c in kind.__mro__)


_T = TypeVar("_T")


def with_reconnect(action: Callable[[], _T], what: str,
                   seconds: float | None = None) -> _T:
    """``action()``, tried again after a lost connection with pauses of 0.1 s doubling up
    to 2 s, for up to ``seconds`` (default ``RECONNECT_SECONDS``); then the error stands."""
    deadline = time.monotonic() + (RECONNECT_SECONDS if seconds is None else seconds)
    pause = 0.1
    warned = False
    while True:
        try:
            result = action()
        except Exception as exc:
            if not is_transient(exc) or time.monotonic() + pause > deadline:
                raise
            if not warned:
                log.warning("%s: database unreachable (%s); retrying", what,
                            type(exc).__name__)
                warned = True
            time.sleep(pause)
            pause = min(2.0, pause * 2)
            continue
        if warned:
            log.warning("%s: database reachable again", what)
        return result

"""Engine, session scope and schema creation for the service's own tables."""

from __future__ import annotations

import contextlib
import threading
import time
from collections.abc import Iterator
from typing import Any

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.engine import CursorResult, Engine, Result
from sqlalchemy.orm import Session, sessionmaker

from tuner.journal_db import POSTGRES_CONNECT_ARGS, is_transient, with_reconnect

__all__ = ["is_transient", "with_reconnect", "describe_outage"]

# Long enough that a writer waiting behind a trial commit never gives up; see
# docs/measured-facts.md §2 (lock waits show up as stalls, not errors, at 30 s and more).
SQLITE_BUSY_TIMEOUT_S = 60


def is_sqlite(url: str) -> bool:
    return url.startswith("sqlite")


def _sqlite_pragmas(dbapi_conn, _record) -> None:  # type: ignore[no-untyped-def]
    cur = dbapi_conn.cursor()
    # WAL lets API reads proceed while a worker writes; it persists in the file.
    cur.execute("PRAGMA journal_mode=WAL")
    # NORMAL is durable across application crashes in WAL mode (only an OS crash
    # can roll back the last commits), and it is much cheaper per trial than FULL.
    cur.execute("PRAGMA synchronous=NORMAL")
    # After a checkpoint that empties the WAL, cut the file back to 64 MiB: without it the
    # WAL keeps the size of its largest burst for the life of the database.
    cur.execute("PRAGMA journal_size_limit=67108864")
    cur.execute("PRAGMA foreign_keys=ON")
    cur.execute(f"PRAGMA busy_timeout={SQLITE_BUSY_TIMEOUT_S * 1000}")
    cur.close()


def make_engine(url: str) -> Engine:
    if is_sqlite(url):
        # A larger pool than SQLAlchemy's 5 + 10: writers waiting for SQLite's one write
        # lock each hold a connection, and readers (WAL lets them read meanwhile) must not
        # starve behind them at checkout.
        engine = sa.create_engine(
            url, connect_args={"timeout": SQLITE_BUSY_TIMEOUT_S, "check_same_thread": False},
            pool_size=10, max_overflow=30,
        )
        event.listen(engine, "connect", _sqlite_pragmas)
        return engine
    # pre-ping: a connection the server dropped (restart, network cut) is replaced on
    # checkout instead of failing the first query after it.
    return sa.create_engine(url, pool_pre_ping=True, pool_size=10, max_overflow=20,
                            pool_timeout=10, connect_args=POSTGRES_CONNECT_ARGS)


_engines: dict[str, Engine] = {}
_makers: dict[str, sessionmaker[Session]] = {}
_lock = threading.Lock()


def get_engine(url: str) -> Engine:
    """One engine (one pool) per URL per process."""
    with _lock:
        if url not in _engines:
            _engines[url] = make_engine(url)
        return _engines[url]


def get_sessionmaker(url: str) -> sessionmaker[Session]:
    engine = get_engine(url)
    with _lock:
        if url not in _makers:
            _makers[url] = sessionmaker(bind=engine, expire_on_commit=False)
        return _makers[url]


def dispose_engines(*, close: bool = True) -> None:
    """Drop every pool; a forked child passes close=False so it never closes the
    parent's connections (SQLAlchemy's advice for multiprocessing)."""
    with _lock:
        for engine in _engines.values():
            engine.dispose(close=close)
        _engines.clear()
        _makers.clear()
    from tuner.journal_db import dispose_engines as dispose_journal

    dispose_journal(close=close)


@contextlib.contextmanager
def session_scope(url: str) -> Iterator[Session]:
    """One unit of work: commit on success, roll back on any error."""
    session = get_sessionmaker(url)()
    try:
        yield session
        session.commit()
    except BaseException:
        session.rollback()
        raise
    finally:
        session.close()


def rows_changed(result: Result[Any]) -> int:
    """How many rows an UPDATE or DELETE touched. Session.execute is typed as returning a
    Result; for those statements it is a CursorResult, the kind that counts rows."""
    if not isinstance(result, CursorResult):
        raise TypeError(f"{type(result).__name__} does not count the rows it changed")
    return result.rowcount


def init_db(url: str, *, attempts: int = 5) -> None:
    """Create or upgrade the service tables (service/migrations.py) and the trial journal's.

    Several processes starting against a fresh database race on CREATE TABLE
    (docs/measured-facts.md §2, start-up race); a retry after a short pause sees the tables
    the winner created.
    """
    from service.migrations import migrate
    from tuner.journal_db import create_tables  # the journal's tables, without Optuna

    for attempt in range(attempts):
        try:
            migrate(get_engine(url))
            create_tables(url)
            return
        except Exception:
            if attempt == attempts - 1:
                raise
            time.sleep(0.5 * (attempt + 1))


def ping(url: str) -> None:
    with get_engine(url).connect() as conn:
        conn.execute(sa.text("SELECT 1"))


def describe_outage(exc: BaseException) -> str:
    """Why the database cannot be used, in words: no host names, ports or paths."""
    text = str(getattr(exc, "orig", None) or exc).lower()
    for needle, words in (
        ("locked", "the database file is locked by another writer"),
        ("busy", "the database file is locked by another writer"),
        ("starting up", "the database is starting up"),
        ("shutting down", "the database is shutting down"),
        ("terminating connection", "the database closed the connection (restart or shutdown)"),
        ("refused", "the database refuses connections (not running?)"),
        ("timeout", "the database did not answer in time"),
        ("timed out", "the database did not answer in time"),
        ("closed", "the connection to the database was lost"),
        ("unable to open", "the database file cannot be opened"),
    ):
        if needle in text:
            return words
    return "the database cannot be reached"

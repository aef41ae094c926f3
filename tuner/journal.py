"""Optuna's journal storage kept in a SQL table: one row per storage operation.

Why not Optuna's ``RDBStorage``: it spreads each trial over a dozen ORM tables, spends
about 30 queries on starting a trial and commits every parameter, report and attribute
apart (50-100 ms of bookkeeping per trial on SQLite, ``benchmarks/overhead.py``), and
hands one enqueued trial to two processes on SQLite (docs/measured-facts.md §2). The journal writes
one small row per operation and each process reads only rows it has not seen yet; the
trials stay in the same database (SQLite file or PostgreSQL) as everything else.

Rows of one study are numbered 0, 1, 2, ... without gaps, and every process replays them
in that order, so all agree on trial numbers and on who took an enqueued trial. A row's
number is one more than the largest committed before it, under the primary key
``(study, seq)``: a writer that raced another for a number gets an IntegrityError and
tries again, so a number becomes visible only after every smaller one. On SQLite each
append is one ``BEGIN IMMEDIATE`` transaction and never races.

Heartbeats (Optuna's ``BaseHeartbeat``, driven by its optimize loop): the process
running a trial stamps a row in ``gk_trial_beats`` every interval; a running trial whose
stamp (or start, before its first stamp) is older than the grace period is failed by the
next trial any process starts, as ``RDBStorage`` does.

A lost connection (a database restart, a network cut) is not an error here: reads,
appends and the stale-trial check wait and try again with growing pauses for up to
``RECONNECT_SECONDS``, so a trial that finishes while the database is away is written
once it is back. An append whose commit may have landed before the connection broke is
looked up by its nonce (``_n``, a key Optuna's replay ignores) before it is tried again,
so a retry never writes an operation twice.

Fencing: a backend may be given a *fence*, a check run inside each append's write
transaction before its rows go in (the service passes one that asks whether the worker
still holds the job under its claim's epoch). When the fence says no, nothing is written
and :class:`JournalFenced` is raised: a writer cut off long enough to be replaced cannot
add trials, parameters or results to a study that is now someone else's. The tuner knows
nothing of jobs or workers; the fence is only a callable over the transaction's connection.
"""

from __future__ import annotations

import json
import logging
import time
import uuid
from collections.abc import Callable, Iterable
from typing import Any

import optuna
import sqlalchemy as sa
from optuna.storages import JournalStorage
from optuna.storages._heartbeat import BaseHeartbeat
from optuna.storages.journal import BaseJournalBackend
from optuna.trial import FrozenTrial, TrialState
from sqlalchemy.engine import Engine

# The tables, engines, connection settings and retry live apart (SQLAlchemy only), so a
# process that only needs them (the API creating the schema) does not load Optuna.
from tuner.journal_db import (  # noqa: F401
    BEATS,
    JOURNAL,
    POSTGRES_CONNECT_ARGS,
    RECONNECT_SECONDS,
    create_tables,
    dispose_engines,
    engine,
    is_transient,
    with_reconnect,
)

_APPEND_ATTEMPTS = 1000
log = logging.getLogger("tuner.journal")

#: Run inside an append's write transaction, with its connection, before the rows are
#: written; False refuses the append (see the module docstring). It may lock rows: they
#: stay locked until the append commits, so the check and the write cannot be split by a
#: competing claim.
Fence = Callable[[sa.Connection], bool]


class JournalFenced(RuntimeError):
    """An append to a study's journal was refused by its fence: this writer no longer
    holds the study. Nothing of the refused operations was written."""


# Numbered in the statement that inserts it, so an append is one round trip. The two
# statements go straight to the driver (through SQLAlchemy's pool): they run a dozen times
# per trial, and SQLAlchemy's own execution path cost 0.6 ms per append and 0.3 ms per
# read here against 0.1 ms and 0.01 ms on the bare connection (SQLite, measured).
_APPEND = ("INSERT INTO gk_trial_journal (study, seq, body) "
           "SELECT {p}, COALESCE(MAX(seq), -1) + 1, {p} FROM gk_trial_journal "
           "WHERE study = {p} RETURNING seq")
_READ = "SELECT body FROM gk_trial_journal WHERE study = {p} AND seq >= {p} ORDER BY seq"
_FIND = "SELECT seq FROM gk_trial_journal WHERE study = {p} AND body = {p}"


def _sql(template: str, made: Engine) -> str:
    return template.format(p="?" if made.dialect.paramstyle == "qmark" else "%s")


class SQLJournalBackend(BaseJournalBackend):
    """The journal of one study, as rows of ``gk_trial_journal``.

    Optuna reads right after each append; when nothing came in between, the rows it asks
    for are the ones just written, and they are handed back without a query.
    """

    def __init__(self, url: str, study: str, fence: Fence | None = None) -> None:
        self.url = url
        self.study = study
        self._fence = fence
        self._last: tuple[int, list[str]] | None = None  # (first seq, bodies) just written
        reader, writer = engine(url), engine(url, writer=True)
        self._read_sql, self._append_sql = _sql(_READ, reader), _sql(_APPEND, writer)
        self._find_sql = _sql(_FIND, reader)
        self._sqlite = url.startswith("sqlite")

    def read_logs(self, log_number_from: int) -> Iterable[dict[str, Any]]:
        last, self._last = self._last, None
        if last is not None and last[0] == log_number_from:
            # Rows after ours (other processes') are picked up by the next read. Parsed
            # back from JSON, so this process sees exactly what the others will.
            return [json.loads(body) for body in last[1]]
        bodies = with_reconnect(lambda: self._read(log_number_from), "journal read")
        return [json.loads(body) for body in bodies]

    def _read(self, log_number_from: int) -> list[str]:
        conn = engine(self.url).raw_connection()
        try:
            cursor = conn.cursor()
            cursor.execute(self._read_sql, (self.study, log_number_from))
            bodies = [row[0] for row in cursor.fetchall()]
            cursor.close()
        except BaseException as exc:
            _discard_if_lost(conn, exc)
            raise
        finally:
            conn.close()  # back to the pool, which rolls back PostgreSQL's read transaction
        return bodies

    def append_logs(self, logs: list[dict[str, Any]]) -> None:
        # The nonce makes each body unique, so an append can be found again (see below).
        nonce = uuid.uuid4().hex
        bodies = [json.dumps({**log, "_n": f"{nonce}{i}"}, separators=(",", ":"))
                  for i, log in enumerate(logs)]
        deadline = time.monotonic() + RECONNECT_SECONDS
        pause = 0.1
        while True:
            try:
                seqs = self._append(bodies)
                break
            except JournalFenced:
                log.warning("study %s: journal append refused by its fence (this process no "
                            "longer holds the study); %d operation(s) dropped: %s",
                            self.study, len(logs), _op_names(logs))
                raise
            except Exception as exc:
                if not is_transient(exc) or time.monotonic() + pause > deadline:
                    raise
                log.warning("journal append: database unreachable (%s); retrying",
                            type(exc).__name__)
            time.sleep(pause)
            pause = min(2.0, pause * 2)
            # The connection may have broken after the commit landed: look before writing.
            try:
                found = self._committed(bodies)
            except Exception as exc:
                if not is_transient(exc):
                    raise
                continue
            if found is not None:
                seqs = found
                break
        # Consecutive within one transaction, so the logs are rows seqs[0], +1, ...
        self._last = (seqs[0], bodies) if seqs else None

    def _committed(self, bodies: list[str]) -> list[int] | None:
        """The rows of ``bodies`` if an earlier try committed them (one transaction: all
        or none), else None."""
        if not bodies:
            return None
        conn = engine(self.url).raw_connection()
        try:
            cursor = conn.cursor()
            cursor.execute(self._find_sql, (self.study, bodies[0]))
            row = cursor.fetchone()
            cursor.close()
        except BaseException as exc:
            _discard_if_lost(conn, exc)
            raise
        finally:
            conn.close()
        return None if row is None else list(range(row[0], row[0] + len(bodies)))

    def _append(self, bodies: list[str]) -> list[int]:
        if self._fence is not None:
            return self._append_fenced(bodies, self._fence)
        made = engine(self.url, writer=True)
        conflict = made.dialect.loaded_dbapi.IntegrityError
        for _ in range(_APPEND_ATTEMPTS):
            conn = made.raw_connection()
            try:
                cursor = conn.cursor()
                if self._sqlite:  # the driver is in autocommit mode on this engine
                    cursor.execute("BEGIN IMMEDIATE")
                seqs = []
                for body in bodies:
                    cursor.execute(self._append_sql, (self.study, body, self.study))
                    seqs.append(_first(cursor.fetchone()))
                if self._sqlite:
                    cursor.execute("COMMIT")
                else:
                    conn.commit()
                cursor.close()
            except conflict:
                conn.rollback()
                continue  # another process took that number first: take the next one
            except BaseException as exc:
                if not _discard_if_lost(conn, exc):
                    conn.rollback()
                raise
            finally:
                conn.close()
            return seqs
        raise RuntimeError(f"could not append to the journal of study '{self.study}'")

    def _append_fenced(self, bodies: list[str], fence: Fence) -> list[int]:
        """``_append`` with the fence checked first in the same transaction. Through a
        SQLAlchemy connection, so the fence can use Core statements; the rows still go
        through the driver's cursor (see ``_APPEND``)."""
        made = engine(self.url, writer=True)
        conflict = made.dialect.loaded_dbapi.IntegrityError
        for _ in range(_APPEND_ATTEMPTS):
            conn = made.connect()
            try:
                trans = conn.begin()  # SQLite: BEGIN IMMEDIATE (the writer engine's event)
                if not fence(conn):
                    trans.rollback()
                    raise JournalFenced(f"study '{self.study}': append refused by its fence")
                cursor = conn.connection.cursor()
                seqs = []
                for body in bodies:
                    cursor.execute(self._append_sql, (self.study, body, self.study))
                    seqs.append(_first(cursor.fetchone()))
                cursor.close()
                trans.commit()
            except conflict:
                conn.rollback()
                continue  # another process took that number first: take the next one
            except BaseException as exc:
                if isinstance(exc, Exception) and is_transient(exc):
                    if not conn.invalidated:
                        conn.invalidate()
                elif conn.in_transaction():
                    conn.rollback()
                raise
            finally:
                conn.close()
            return seqs
        raise RuntimeError(f"could not append to the journal of study '{self.study}'")


def _op_names(logs: list[dict[str, Any]]) -> str:
    """Optuna's operation codes of ``logs`` as words, for the refusal's log line."""
    try:  # a private module of Optuna's: numbers will do if it moves
        from optuna.storages.journal._storage import JournalOperation
    except ImportError:
        return ", ".join(str(entry.get("op_code")) for entry in logs)
    names = []
    for entry in logs:
        try:
            names.append(JournalOperation(int(entry.get("op_code", -1))).name.lower())
        except ValueError:
            names.append(str(entry.get("op_code")))
    return ", ".join(names)


def _discard_if_lost(conn: Any, exc: BaseException) -> bool:
    """Invalidate a pooled connection that ``exc`` shows to be lost, so the pool neither
    hands it out again nor logs a failed rollback of it; True if it was discarded."""
    if isinstance(exc, Exception) and is_transient(exc):
        conn.invalidate()
        return True
    return False


def _first(row: Any) -> int:
    """The first column of a row the append statement returns (it always returns one)."""
    if row is None:
        raise RuntimeError("the journal append returned no row")
    return int(row[0])


class TrialJournal(JournalStorage, BaseHeartbeat):
    """Optuna storage for one study, in the journal tables, with optional heartbeats."""

    def __init__(self, url: str, study: str, *, heartbeat_seconds: int | None = None,
                 grace_seconds: int | None = None, fence: Fence | None = None) -> None:
        self.url = url
        self.study = study
        self._interval = heartbeat_seconds
        self._grace = grace_seconds or (2 * heartbeat_seconds if heartbeat_seconds else None)
        create_tables(url)
        super().__init__(SQLJournalBackend(url, study, fence))

    # -- BaseHeartbeat -------------------------------------------------------------

    def record_heartbeat(self, trial_id: int) -> None:
        now = time.time()
        where = (BEATS.c.study == self.study) & (BEATS.c.trial_id == trial_id)
        # Only the thread running a trial stamps it, so update-else-insert cannot race.
        try:
            with engine(self.url, writer=True).begin() as conn:
                if conn.execute(sa.update(BEATS).where(where)
                                .values(beat_at=now)).rowcount == 0:
                    conn.execute(sa.insert(BEATS).values(study=self.study, trial_id=trial_id,
                                                         beat_at=now))
        except Exception as exc:
            # Optuna's beat thread would die of the error; the next beat tries again.
            if not is_transient(exc):
                raise
            log.warning("trial heartbeat: database unreachable (%s)", type(exc).__name__)

    def _get_stale_trial_ids(self, study_id: int) -> list[int]:
        if self._grace is None:
            return []
        running = self.get_all_trials(study_id, deepcopy=False, states=(TrialState.RUNNING,))
        if not running:
            return []
        def read() -> dict[int, float]:
            with engine(self.url).connect() as conn:
                return dict(conn.execute(
                    sa.select(BEATS.c.trial_id, BEATS.c.beat_at)
                    .where(BEATS.c.study == self.study,
                           BEATS.c.trial_id.in_([t._trial_id for t in running]))
                ).all())

        beats = with_reconnect(read, "trial heartbeat check")
        limit = time.time() - self._grace
        return [t._trial_id for t in running
                if beats.get(t._trial_id, _started(t)) < limit]

    def get_heartbeat_interval(self) -> int | None:
        return self._interval

    def get_heartbeat_stale_trial_callback(
        self,
    ) -> Callable[[optuna.Study, FrozenTrial], None] | None:
        return None  # a stale trial is replaced by a fresh draw (see tuner.search)


def _started(trial: FrozenTrial) -> float:
    # The replayed start time is naive local time, which .timestamp() reads as such.
    return trial.datetime_start.timestamp() if trial.datetime_start else time.time()


def rdb_has_study(url: str, study: str) -> bool:
    """Whether Optuna's own tables (``RDBStorage``, used before the journal) hold ``study``."""
    with engine(url).connect() as conn:
        if not sa.inspect(conn).has_table("studies"):
            return False
        found = conn.execute(sa.text("SELECT 1 FROM studies WHERE study_name = :name"),
                             {"name": study}).first()
    return found is not None


def import_rdb_study(url: str, study: str, into: TrialJournal) -> None:
    """Copy a study from Optuna's own tables into the journal, trial numbers kept.

    A database written before the journal may hold jobs still running; their next
    worker picks them up here instead of starting again from trial 0.
    """
    source = optuna.storages.RDBStorage(url, skip_compatibility_check=True,
                                        skip_table_creation=True)
    try:
        optuna.copy_study(from_study_name=study, from_storage=source, to_storage=into)
    except optuna.exceptions.DuplicatedStudyError:
        pass  # another process imported it first
    finally:
        source.engine.dispose()

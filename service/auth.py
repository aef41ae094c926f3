"""API keys: created once, stored as hashes, checked on every request.

Keys are 32 random bytes, so a plain SHA-256 is enough to store them: there is
no dictionary to attack, unlike passwords, and a lookup by hash stays one query.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import threading
import time
from dataclasses import dataclass
from datetime import datetime, timedelta

import sqlalchemy as sa

from service import audit
from service.db import rows_changed, session_scope
from service.errors import Forbidden, Unauthorized
from service.repository import new_id
from service.tables import ApiKey, AuditEntry, KeyGeneration, utcnow
from vocabulary import SCOPES

KEY_PREFIX = "gk_"
# Longer than any key we issue; longer headers are refused before hashing or a lookup.
_MAX_KEY_LENGTH = 128
# last_used_at is written at most this often per key and process: a cheap, coarse clock.
LAST_USED_EVERY_S = 60.0


def hash_key(secret: str) -> str:
    return hashlib.sha256(secret.encode()).hexdigest()


def _bump_generation(session) -> None:  # type: ignore[no-untyped-def]
    session.execute(sa.update(KeyGeneration).where(KeyGeneration.id == 1)
                    .values(generation=KeyGeneration.generation + 1))


def create_key(url: str, *, scope: str,
               expires_in: timedelta | None = None) -> tuple[str, str]:
    if scope not in SCOPES:
        raise ValueError(f"scope must be one of {', '.join(SCOPES)}")
    if expires_in is not None and expires_in.total_seconds() <= 0:
        raise ValueError("expires_in must be positive")
    secret = KEY_PREFIX + secrets.token_urlsafe(32)
    key_id = new_id("key")
    expires_at = utcnow() + expires_in if expires_in is not None else None
    with session_scope(url) as session:
        session.add(ApiKey(id=key_id, scope=scope, key_hash=hash_key(secret),
                           expires_at=expires_at))
        _bump_generation(session)
        session.add(AuditEntry(action="key.create", target=key_id))
    return key_id, secret


def revoke_key(url: str, key_id: str) -> bool:
    """Revokes ``key_id``; False when no active key has that id."""
    with session_scope(url) as session:
        done = rows_changed(session.execute(
            sa.update(ApiKey).where(ApiKey.id == key_id, ApiKey.revoked_at.is_(None))
            .values(revoked_at=utcnow())))
        if done:
            _bump_generation(session)
            session.add(AuditEntry(action="key.revoke", target=key_id))
    return bool(done)


def list_keys(url: str) -> list[ApiKey]:
    with session_scope(url) as session:
        rows = session.scalars(sa.select(ApiKey).order_by(ApiKey.created_at)).all()
        session.expunge_all()
        return list(rows)


def any_key_exists(url: str) -> bool:
    with session_scope(url) as session:
        return (session.scalar(
            sa.select(sa.func.count()).select_from(ApiKey).where(_usable(utcnow()))
        ) or 0) > 0


def _usable(now: datetime) -> sa.ColumnElement[bool]:
    return sa.and_(ApiKey.revoked_at.is_(None),
                   sa.or_(ApiKey.expires_at.is_(None), ApiKey.expires_at > now))


@dataclass(frozen=True)
class KeyState:
    generation: int
    active_keys: bool

    @property
    def keys_have_existed(self) -> bool:
        return self.generation > 0


def read_key_state(url: str) -> KeyState:
    with session_scope(url) as session:
        generation = session.scalar(
            sa.select(KeyGeneration.generation).where(KeyGeneration.id == 1)) or 0
        active = session.scalar(
            sa.select(sa.func.count()).select_from(ApiKey).where(_usable(utcnow())))
    return KeyState(int(generation), bool(active))


def required_scope(method: str) -> str:
    if method in ("GET", "HEAD", "OPTIONS"):
        return "read"
    if method == "DELETE":
        return "admin"
    return "write"


@dataclass(frozen=True)
class KnownKey:
    id: str
    scope: str
    expires_at: datetime | None


class KeyChecker:
    """Checks a bearer key against the table.

    Every request reads the key generation (one primary-key lookup); answers cached for
    an older generation are dropped, so a key created or revoked in any process counts
    from the next request on. Expiry is checked on every request from the cached row.
    Without an active key, requests are let through only on a server that has never had
    a key and listens on loopback (``open_without_keys``); otherwise they are refused, so
    revoking every key closes the server instead of opening it.
    """

    def __init__(self, url: str, *, open_without_keys: bool = True) -> None:
        self.url = url
        self.open_without_keys = open_without_keys
        self._state: KeyState | None = None
        self._known: dict[str, KnownKey | None] = {}
        self._used: dict[str, float] = {}  # key id -> monotonic time of the last write
        self._used_lock = threading.Lock()

    def state(self) -> KeyState:
        with session_scope(self.url) as session:
            generation = session.scalar(
                sa.select(KeyGeneration.generation).where(KeyGeneration.id == 1)) or 0
        cached = self._state
        if cached is None or cached.generation != generation:
            self._known = {}
            cached = self._state = read_key_state(self.url)
        return cached

    def lookup(self, secret: str) -> KnownKey | None:
        digest = hash_key(secret)
        if digest in self._known:
            return self._known[digest]
        with session_scope(self.url) as session:
            row = session.scalar(sa.select(ApiKey).where(ApiKey.key_hash == digest,
                                                         ApiKey.revoked_at.is_(None)))
            # compare_digest keeps the final check constant-time even after the lookup.
            known = (KnownKey(row.id, row.scope, _aware(row.expires_at))
                     if row and hmac.compare_digest(row.key_hash, digest) else None)
        if len(self._known) > 1024:
            self._known = {}
        self._known[digest] = known
        return known

    def open_mode(self) -> bool:
        """Requests need no key: a loopback server that has never had one."""
        state = self.state()
        return self.open_without_keys and not state.active_keys and not state.keys_have_existed

    def scope_of(self, secret: str) -> str | None:
        known = self.lookup(secret)
        return None if known is None else known.scope

    def _touch(self, key_id: str) -> None:
        """Stamp ``last_used_at``, at most once a minute per key in this process; the
        WHERE clause keeps several processes from stamping it more often than that."""
        now = time.monotonic()
        with self._used_lock:
            if now - self._used.get(key_id, -LAST_USED_EVERY_S) < LAST_USED_EVERY_S:
                return
            self._used[key_id] = now
        stamp = utcnow()
        with session_scope(self.url) as session:
            session.info[audit.EXEMPT] = True  # bookkeeping, not the request's change
            session.execute(sa.update(ApiKey).where(
                ApiKey.id == key_id,
                sa.or_(ApiKey.last_used_at.is_(None),
                       ApiKey.last_used_at < stamp - timedelta(seconds=LAST_USED_EVERY_S)))
                .values(last_used_at=stamp).execution_options(synchronize_session=False))

    def check(self, method: str, authorization: str | None,
              needed: str | None = None) -> str | None:
        """Allow the request or raise 401/403; answers the key's id (None without keys).
        ``needed`` asks for a scope above the one the method needs (e.g. admin reads)."""
        state = self.state()
        if not state.active_keys:
            if self.open_without_keys and not state.keys_have_existed:
                return None  # a loopback server that never had a key: local, single-user use
            raise Unauthorized("no active API key exists on this server; an operator must "
                               "create one with 'grovekeeper keys create --scope admin'")
        if not authorization or not authorization.lower().startswith("bearer "):
            raise Unauthorized("send 'Authorization: Bearer <key>'")
        secret = authorization[7:].strip()
        # Only the shape of the key decides this shortcut, never its value, so it reveals
        # nothing about stored keys; the lookup itself is by hash with compare_digest.
        if not secret.startswith(KEY_PREFIX) or len(secret) > _MAX_KEY_LENGTH:
            raise Unauthorized("unknown or revoked API key")
        known = self.lookup(secret)
        if known is None:
            raise Unauthorized("unknown or revoked API key")
        if known.expires_at is not None and known.expires_at <= utcnow():
            raise Unauthorized("this API key has expired")
        needed = needed or required_scope(method)
        if SCOPES.index(known.scope) < SCOPES.index(needed):
            raise Forbidden(f"this {known.scope} key may not {method}; it needs the {needed} "
                            "scope")
        self._touch(known.id)
        return known.id


def _aware(stamp: datetime | None) -> datetime | None:
    # SQLite hands back naive datetimes; they were written in UTC.
    if stamp is not None and stamp.tzinfo is None:
        from datetime import UTC

        return stamp.replace(tzinfo=UTC)
    return stamp

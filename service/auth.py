"""API keys: created once, stored as hashes, checked on every request.

Keys are 32 random bytes, so a plain SHA-256 is enough to store them: there is
no dictionary to attack, unlike passwords, and a lookup by hash stays one query.
"""

from __future__ import annotations

import hashlib
import hmac
import secrets
import time

import sqlalchemy as sa

from service.db import session_scope
from service.errors import Forbidden, Unauthorized
from service.repository import new_id
from service.tables import ApiKey

SCOPES = ("read", "write", "admin")
KEY_PREFIX = "gk_"
_CACHE_SECONDS = 5.0
# Longer than any key we issue; longer headers are refused before hashing or a lookup.
_MAX_KEY_LENGTH = 128


def hash_key(secret: str) -> str:
    return hashlib.sha256(secret.encode()).hexdigest()


def create_key(url: str, *, scope: str) -> tuple[str, str]:
    if scope not in SCOPES:
        raise ValueError(f"scope must be one of {', '.join(SCOPES)}")
    secret = KEY_PREFIX + secrets.token_urlsafe(32)
    key_id = new_id("key")
    with session_scope(url) as session:
        session.add(ApiKey(id=key_id, scope=scope, key_hash=hash_key(secret)))
    return key_id, secret


def any_key_exists(url: str) -> bool:
    with session_scope(url) as session:
        return session.scalar(
            sa.select(sa.func.count()).select_from(ApiKey).where(ApiKey.revoked_at.is_(None))
        ) > 0


def required_scope(method: str) -> str:
    if method in ("GET", "HEAD", "OPTIONS"):
        return "read"
    if method == "DELETE":
        return "admin"
    return "write"


class KeyChecker:
    """Checks a bearer key against the table, remembering answers for a few seconds."""

    def __init__(self, url: str) -> None:
        self.url = url
        self._keys_exist: tuple[float, bool] = (0.0, False)
        self._known: dict[str, tuple[float, str | None]] = {}

    def keys_exist(self) -> bool:
        stamp, value = self._keys_exist
        if time.monotonic() - stamp > _CACHE_SECONDS:
            value = any_key_exists(self.url)
            self._keys_exist = (time.monotonic(), value)
        return value

    def scope_of(self, secret: str) -> str | None:
        digest = hash_key(secret)
        hit = self._known.get(digest)
        if hit and time.monotonic() - hit[0] < _CACHE_SECONDS:
            return hit[1]
        with session_scope(self.url) as session:
            row = session.scalar(sa.select(ApiKey).where(ApiKey.key_hash == digest,
                                                         ApiKey.revoked_at.is_(None)))
            # compare_digest keeps the final check constant-time even after the lookup.
            scope = row.scope if row and hmac.compare_digest(row.key_hash, digest) else None
        if len(self._known) > 1024:
            self._known.clear()
        self._known[digest] = (time.monotonic(), scope)
        return scope

    def check(self, method: str, authorization: str | None) -> None:
        if not self.keys_exist():
            return  # no key yet: serve refuses non-loopback binds in that state
        if not authorization or not authorization.lower().startswith("bearer "):
            raise Unauthorized("send 'Authorization: Bearer <key>'")
        secret = authorization[7:].strip()
        # Only the shape of the key decides this shortcut, never its value, so it reveals
        # nothing about stored keys; the lookup itself is by hash with compare_digest.
        if not secret.startswith(KEY_PREFIX) or len(secret) > _MAX_KEY_LENGTH:
            raise Unauthorized("unknown or revoked API key")
        scope = self.scope_of(secret)
        if scope is None:
            raise Unauthorized("unknown or revoked API key")
        needed = required_scope(method)
        if SCOPES.index(scope) < SCOPES.index(needed):
            raise Forbidden(f"this {scope} key may not {method}; it needs the {needed} scope")

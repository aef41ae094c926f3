"""Signed report links: a job's report pages opened without a key, for a while.

A link is ``/v1/links/{job_id}.{expires}.{signature}/jobs/{job_id}/report``. The signature
is HMAC-SHA256 over the job id and the expiry (Unix seconds) with a secret the server
makes on first use and keeps in ``gk_server_secrets``, so every API process signs and
checks with the same one and a restart keeps old links valid until they expire.

What a link opens (GET and HEAD only) is that job's report page, its plots, its JSON and
leaderboard, and the JSON, file and bundle of the job's model: the paths the page links
to, which are relative, so under the ``/v1/links/{token}`` prefix they stay inside it.
Nothing else: another job, another model, any change.
"""

from __future__ import annotations

import base64
import hashlib
import hmac
import re
import secrets
import threading
from dataclasses import dataclass
from datetime import UTC, datetime

import sqlalchemy as sa

from service.db import session_scope
from service.errors import Forbidden, Unauthorized
from service.tables import Job, ServerSecret

PREFIX = "/v1/links/"
SECRET_NAME = "report_links"
DEFAULT_SECONDS = 15 * 60
MAX_SECONDS = 24 * 3600
READ_METHODS = frozenset({"GET", "HEAD"})

_TOKEN = re.compile(r"^(?P<job>[A-Za-z0-9_-]{1,40})\.(?P<expires>[0-9]{1,12})\."
                    r"(?P<sig>[A-Za-z0-9_-]{43})$")
_JOB_PATHS = re.compile(r"^/v1/jobs/(?P<id>[^/]+)(/report|/leaderboard|/plots/[a-z_]+\.svg)?$")
_MODEL_PATHS = re.compile(r"^/v1/models/(?P<id>[^/]+)(/file|/bundle)?$")


class LinkInvalid(Unauthorized):
    code = "link_invalid"
    title = "Invalid link"


class LinkExpired(Unauthorized):
    code = "link_expired"
    title = "Link expired"


class LinkOutOfScope(Forbidden):
    code = "link_out_of_scope"
    title = "Not allowed for this link"


def signature(secret: bytes, job_id: str, expires: int) -> str:
    mac = hmac.new(secret, f"report-link\n{job_id}\n{expires}".encode(), hashlib.sha256)
    return base64.urlsafe_b64encode(mac.digest()).rstrip(b"=").decode()


def token(secret: bytes, job_id: str, expires: int) -> str:
    return f"{job_id}.{expires}.{signature(secret, job_id, expires)}"


def report_path(token_: str, job_id: str) -> str:
    return f"{PREFIX}{token_}/jobs/{job_id}/report"


@dataclass(frozen=True)
class Opened:
    """A checked link: its job and the path it asks for, without the link prefix."""

    job_id: str
    expires: int
    path: str


def split(path: str) -> tuple[str, str]:
    """``/v1/links/{token}/rest`` → (token, ``/v1/rest``)."""
    token_, _, rest = path[len(PREFIX):].partition("/")
    return token_, "/v1/" + rest


class LinkSigner:
    """Signs and checks report links with the database's secret (read once per process)."""

    def __init__(self, url: str) -> None:
        self.url = url
        self._secret: bytes | None = None
        self._lock = threading.Lock()

    def secret(self) -> bytes:
        with self._lock:
            if self._secret is None:
                self._secret = _load_or_make(self.url)
            return self._secret

    def mint(self, job_id: str, seconds: int, *, now: float | None = None) -> tuple[str, int]:
        """(the report page's path under the link, its expiry in Unix seconds)."""
        expires = int(now if now is not None else datetime.now(UTC).timestamp()) + seconds
        return report_path(token(self.secret(), job_id, expires), job_id), expires

    def open(self, method: str, path: str, *, now: float | None = None) -> Opened:
        """Check the link in ``path`` and what it asks for; raises 401 or 403 problems."""
        token_, rest = split(path)
        match = _TOKEN.match(token_)
        if match is None:
            raise LinkInvalid("this report link is malformed; ask for a new one with "
                              "POST /v1/jobs/{job_id}/report-links")
        job_id, expires = match["job"], int(match["expires"])
        expected = signature(self.secret(), job_id, expires)
        # Signature first, in constant time: an altered expiry or job id is a bad link.
        if not hmac.compare_digest(expected, match["sig"]):
            raise LinkInvalid("this report link's signature does not match; it was altered "
                              "or signed by another server")
        if expires <= (now if now is not None else datetime.now(UTC).timestamp()):
            stamp = datetime.fromtimestamp(expires, UTC).isoformat()
            raise LinkExpired(f"this report link expired at {stamp}; ask for a new one")
        if method not in READ_METHODS:
            raise LinkOutOfScope(f"a report link only reads; {method} needs an API key")
        on_job = _JOB_PATHS.match(rest)
        if on_job is not None and on_job["id"] == job_id:
            return Opened(job_id, expires, rest)
        on_model = _MODEL_PATHS.match(rest)
        if on_model is not None and on_model["id"] == self._model_of(job_id):
            return Opened(job_id, expires, rest)
        raise LinkOutOfScope(f"this link opens the report of job {job_id} and its model only")

    def _model_of(self, job_id: str) -> str | None:
        with session_scope(self.url) as session:
            return session.scalar(sa.select(Job.model_id).where(Job.id == job_id))


def _load_or_make(url: str) -> bytes:
    """The shared secret; the first process to need it makes it. Two processes racing on
    the first insert both end with the row that won (primary key on the name)."""
    for _ in range(3):
        with session_scope(url) as session:
            value = session.scalar(sa.select(ServerSecret.value)
                                   .where(ServerSecret.name == SECRET_NAME))
        if value is not None:
            return bytes.fromhex(value)
        try:
            with session_scope(url) as session:
                session.add(ServerSecret(name=SECRET_NAME, value=secrets.token_hex(32)))
        except sa.exc.IntegrityError:
            continue  # another process made it first: read theirs
    raise RuntimeError("could not read or make the report link secret")

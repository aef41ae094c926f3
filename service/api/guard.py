"""The request guard: checks that run before routing, before any body is read.

FastAPI parses a route's JSON body before its dependencies run, so a check in a
dependency comes too late to stop a huge body. This ASGI middleware runs first, for
every route:

- **Size.** A declared ``Content-Length`` over the route's limit is a 413 at once; a
  chunked body is counted while it streams and refused (413) the moment it passes the
  limit. Uploads and prediction batches may be ``GROVEKEEPER_MAX_UPLOAD_MB``; every other
  body ``GROVEKEEPER_MAX_REQUEST_KB``.
- **Key.** A request that may carry a body (any method but GET, HEAD and OPTIONS) must
  present a valid key before the first byte of its body is read. The route's own
  dependency still decides the scope.
- **Signed report links** (``/v1/links/{token}/...``, service/links.py): the link is
  the credential. It is checked here (signature, expiry, GET or HEAD, a path of its job),
  then the request goes on with the prefix taken off, marked so that the route's key
  dependency lets it through.
- **No-key mode** (a loopback server that has never had a key): only loopback ``Host``
  names are served (a page on another site cannot reach the API by pointing its own
  name at 127.0.0.1), and a state-changing request that a browser marks as coming
  from another site (``Origin``, ``Sec-Fetch-Site``) is refused.
"""

from __future__ import annotations

import ipaddress
import re
from typing import Any
from urllib.parse import urlsplit

import anyio
from starlette.exceptions import HTTPException
from starlette.requests import Request
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service import links
from service.api import problems
from service.errors import ServiceError
from service.settings import Settings

#: Paths that need no key at all (health, metrics, the API description and its page).
PUBLIC_PREFIXES = ("/healthz", "/readyz", "/metrics", "/docs", "/openapi.json")
SAFE_METHODS = frozenset({"GET", "HEAD", "OPTIONS"})
#: Where the guard leaves the job id of a checked signed link (``request.state``).
LINK_STATE = "signed_link_job"

#: Routes whose bodies are tables (uploads) or prediction batches.
_LARGE_BODY = re.compile(r"^/v1/(datasets|models/[^/]+/predictions|channels/[^/]+/predictions)$")
#: Multipart framing around an upload's file part (boundaries, part headers, the name).
_FRAMING = 64 << 10
_LOOPBACK_NAMES = frozenset({"localhost", "localhost.", "ip6-localhost"})


class BodyTooLarge(HTTPException):
    """Raised from ``receive`` so that whatever reads the body stops; answered as 413."""

    def __init__(self, limit: int) -> None:
        super().__init__(413, f"the request body exceeds the limit of {_size(limit)}")
        self.limit = limit


def _size(limit: int) -> str:
    return f"{limit >> 20} MB" if limit >= 1 << 20 else f"{limit >> 10} KB"


def is_loopback_host(host: str) -> bool:
    """``host`` (a Host header or URL host, port allowed) names this machine's loopback."""
    host = host.strip().lower()
    if host.startswith("["):  # [::1]:8000
        host = host[1:].split("]", 1)[0]
    elif host.count(":") == 1:
        host = host.split(":", 1)[0]
    if host in _LOOPBACK_NAMES or host.endswith(".localhost"):
        return True
    try:
        return ipaddress.ip_address(host).is_loopback
    except ValueError:
        return False


def body_limit(path: str, settings: Settings) -> int:
    if _LARGE_BODY.match(path):
        return settings.max_upload_mb * (1 << 20) + _FRAMING
    return settings.max_request_kb * (1 << 10)


def _foreign_origin(headers: dict[str, str], allowed: set[str]) -> str | None:
    """Why the request comes from another site, or None."""
    site = headers.get("sec-fetch-site", "").lower()
    if site in ("cross-site", "same-site"):
        return f"Sec-Fetch-Site: {site}"
    origin = headers.get("origin")
    if origin is None or origin in allowed:
        return None
    if origin == "null":
        return "Origin: null"
    if not is_loopback_host(urlsplit(origin).netloc or origin):
        return f"Origin: {origin[:100]}"
    return None


class RequestGuard:
    """ASGI middleware: size, key and (in no-key mode) host and origin checks."""

    def __init__(self, app: ASGIApp) -> None:
        self.app = app

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http":
            await self.app(scope, receive, send)
            return
        state = scope["app"].state
        path: str = scope["path"]
        method: str = scope["method"]
        headers = {k.decode("latin-1"): v.decode("latin-1") for k, v in scope["headers"]}
        limit = body_limit(path, state.settings)
        try:
            declared = headers.get("content-length")
            if declared is not None and declared.isdigit() and int(declared) > limit:
                raise BodyTooLarge(limit)
            if path.startswith(links.PREFIX):
                opened = await anyio.to_thread.run_sync(state.links.open, method, path)
                scope = {**scope, "path": opened.path, "raw_path": opened.path.encode()}
                scope.setdefault("state", {})[LINK_STATE] = opened.job_id
            elif not path.startswith(PUBLIC_PREFIXES):
                self._check_access(state, method, headers)
        except Exception as exc:  # noqa: BLE001 - answered through the app's own handlers
            await self._answer(scope, receive, send, exc)
            return

        seen = 0

        async def counted() -> Message:
            nonlocal seen
            message = await receive()
            if message["type"] == "http.request":
                seen += len(message.get("body", b""))
                if seen > limit:
                    raise BodyTooLarge(limit)
            return message

        started = False

        async def watch(message: Message) -> None:
            nonlocal started
            started = started or message["type"] == "http.response.start"
            await send(message)

        try:
            await self.app(scope, counted, watch)
        except BodyTooLarge as exc:
            if started:
                raise
            await self._answer(scope, receive, send, exc)

    @staticmethod
    def _check_access(state: Any, method: str, headers: dict[str, str]) -> None:
        keys = state.keys
        if keys.open_mode():
            host = headers.get("host", "")
            if not is_loopback_host(host):
                raise MisdirectedHost(host)
            if method not in SAFE_METHODS:
                why = _foreign_origin(headers, state.cors_origins)
                if why:
                    raise CrossSite(why)
        if method not in SAFE_METHODS:
            # Authentication only (any active key); the route's dependency checks scope.
            keys.check("GET", headers.get("authorization"))

    @staticmethod
    async def _answer(scope: Scope, receive: Receive, send: Send, exc: Exception) -> None:
        if isinstance(exc, ServiceError):
            response = problems.problem(exc.status, exc.title, exc.detail, code=exc.code,
                                        errors=exc.errors)
            await response(scope, receive, send)
            return
        handler = _handler_for(scope["app"], exc)
        if handler is None:
            raise exc
        response = await handler(Request(scope, receive), exc)
        await response(scope, receive, send)


def _handler_for(app: Any, exc: Exception) -> Any:
    handlers = getattr(app, "exception_handlers", {})
    for cls in type(exc).__mro__:
        if cls in handlers and cls is not Exception:
            return handlers[cls]
    return None


class MisdirectedHost(ServiceError):
    status = 421
    title = "Misdirected request"
    code = "misdirected_host"

    def __init__(self, host: str) -> None:
        super().__init__(
            f"this server answers requests without a key, so it serves only loopback host "
            f"names (localhost, 127.0.0.1, [::1]); got Host: {host[:100]!r}. Create a key "
            "to serve other names")


class CrossSite(ServiceError):
    status = 403
    title = "Forbidden"
    code = "cross_site_request"

    def __init__(self, why: str) -> None:
        super().__init__(
            f"refused a state-changing request from another site ({why}); this server "
            "answers without a key, so only pages on this machine's loopback may change it")

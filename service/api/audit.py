"""Records every successful change made through the API in the audit trail.

An ASGI wrapper rather than a call in each route: every route that changes something
(POST, PUT, PATCH, DELETE under /v1, except predictions and signed report links, which
change nothing) is covered, including routes added later. The action is named from the
path (``dataset.upload``, ``job.create``, ``job.cancel``, ``dataset.delete``,
``channel.set``, ``channel.rollback``, ...); the target is the id in the path, or the id
of what was created.

The change is named before the route runs (``service.audit.Pending``), and its row goes
into the transaction that commits the change (the session events in ``service/audit.py``),
so a change never lands without its row. After the answer, the row gets the answer's
status. A successful change whose transaction the events did not see (nothing went
through a session) is recorded after the answer instead, as a fallback; a failure to
write that is logged, never turned into an error for a change that already happened.
"""

from __future__ import annotations

import json
import logging

import anyio
from starlette.types import ASGIApp, Message, Receive, Scope, Send

from service import audit
from service.db import session_scope

log = logging.getLogger("grovekeeper.audit")
_CHANGES = ("POST", "PUT", "PATCH", "DELETE")
_NOT_CHANGES = ("predictions", "report-links")
_BODY_LIMIT = 1 << 16


def action_for(method: str, path: str) -> tuple[str, str | None] | None:
    """(action, id in the path) for a change, or None when the request changes nothing."""
    parts = [p for p in path.split("/") if p]
    if len(parts) < 2 or parts[0] != "v1" or parts[-1] in _NOT_CHANGES or parts[1] == "audit":
        return None
    resource = parts[1].rstrip("s") if parts[1] != "keys" else "key"
    if len(parts) == 2:
        return ("dataset.upload" if resource == "dataset" else f"{resource}.create"), None
    if len(parts) == 3:
        verb = {"DELETE": "delete", "PUT": "set", "PATCH": "update"}.get(method, "create")
        return f"{resource}.{verb}", parts[2]
    if len(parts) == 4 and method == "POST":
        # POST /v1/jobs/{id}/cancel, /v1/channels/{name}/rollback, /v1/models/{id}/scorings
        sub = parts[3]
        if sub.endswith("s"):
            return f"{sub.rstrip('s')}.create", parts[2]
        return f"{resource}.{sub}", parts[2]
    return f"{resource}.{method.lower()}", parts[2]


class AuditTrail:
    def __init__(self, app: ASGIApp, url: str) -> None:
        self.app = app
        self.url = url

    async def __call__(self, scope: Scope, receive: Receive, send: Send) -> None:
        if scope["type"] != "http" or scope["method"] not in _CHANGES:
            await self.app(scope, receive, send)
            return
        named = action_for(scope["method"], scope["path"])
        if named is None:
            await self.app(scope, receive, send)
            return
        state = scope.setdefault("state", {})  # shared with request.state downstream
        action, target = named
        pending = audit.Pending(action=action, target=target, method=scope["method"],
                                path=scope["path"], state=state)
        status = 0
        body = bytearray()

        async def watch(message: Message) -> None:
            nonlocal status
            if message["type"] == "http.response.start":
                status = message["status"]
            elif message["type"] == "http.response.body" and status in (200, 201, 202):
                if len(body) < _BODY_LIMIT:
                    body.extend(message.get("body", b"")[:_BODY_LIMIT])
            await send(message)

        token = audit.begin(pending)
        try:
            await self.app(scope, receive, watch)
        finally:
            audit.end(token)
        created = _created_id(bytes(body)) if 200 <= status < 300 else None
        if pending.entry_id is not None:
            await anyio.to_thread.run_sync(self._finish, pending, status, created)
        elif 200 <= status < 300:
            if target is None or action.endswith(".create") and target is not None:
                if created and target is None:
                    target = created
                elif created:
                    target = f"{target}:{created}"
            await anyio.to_thread.run_sync(self._write, action, target, pending.key_id,
                                           scope["method"], scope["path"], status)

    def _finish(self, pending: audit.Pending, status: int, created: str | None) -> None:
        try:
            with session_scope(self.url) as session:
                audit.finish(session, pending, status=status, created=created)
        except Exception:  # noqa: BLE001 - the row is there; only its status is missing
            log.exception("could not record the status of %s %s in the audit trail",
                          pending.method, pending.path)

    def _write(self, action: str, target: str | None, key_id: str | None, method: str,
               path: str, status: int) -> None:
        try:
            with session_scope(self.url) as session:
                audit.record(session, action=action, target=target, key_id=key_id,
                             method=method, path=path[:300], status=status)
        except Exception:  # noqa: BLE001 - the change itself has happened; see the docstring
            log.exception("could not record %s %s in the audit trail", method, path)


def _created_id(body: bytes) -> str | None:
    try:
        value = json.loads(body)
    except ValueError:
        return None
    found = value.get("id") if isinstance(value, dict) else None
    return str(found) if found is not None else None

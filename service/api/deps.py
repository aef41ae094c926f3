"""Request dependencies: settings, a database session, the artifact store."""

from __future__ import annotations

from collections.abc import Iterator
from typing import Annotated, cast

from fastapi import Depends, Request
from sqlalchemy.orm import Session

from service.api.guard import LINK_STATE
from service.db import session_scope
from service.settings import Settings
from service.storage import LocalStore


def get_settings_dep(request: Request) -> Settings:
    # app.state is untyped; service/api/app.py puts the Settings there.
    return cast(Settings, request.app.state.settings)


def get_store(request: Request) -> LocalStore:
    return cast(LocalStore, request.app.state.store)


def get_session(settings: Annotated[Settings, Depends(get_settings_dep)]) -> Iterator[Session]:
    with session_scope(settings.db_url) as session:
        yield session


SettingsDep = Annotated[Settings, Depends(get_settings_dep)]
StoreDep = Annotated[LocalStore, Depends(get_store)]
# scope="function": commit before the response is sent. With the default ("request")
# the commit ran after the client had its answer, so a quick next request (cancel, then
# cancel again) could still read the old row.
SessionDep = Annotated[Session, Depends(get_session, scope="function")]


def require_key(request: Request) -> None:
    """Router-level dependency: the key's scope must allow the request's method. The key's
    id stays on the request for the audit trail (service/api/audit.py). A request that came
    through a signed report link was checked by the guard (service/api/guard.py), which
    lets only reads of that job's pages through; it has no key."""
    if (getattr(request.state, LINK_STATE, None) is not None
            and request.method in ("GET", "HEAD")):
        request.state.key_id = None
        return
    request.state.key_id = request.app.state.keys.check(
        request.method, request.headers.get("authorization"))


def require_read(request: Request) -> None:
    """Any active key, whatever the method: for POSTs that change nothing stored (minting
    a signed report link)."""
    request.state.key_id = request.app.state.keys.check(
        request.method, request.headers.get("authorization"), needed="read")


def require_admin(request: Request) -> None:
    """Admin keys only, whatever the method (e.g. reading the audit trail)."""
    request.state.key_id = request.app.state.keys.check(
        request.method, request.headers.get("authorization"), needed="admin")


AuthDep = Depends(require_key)
ReadDep = Depends(require_read)
AdminDep = Depends(require_admin)

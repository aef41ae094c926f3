"""The audit trail, for admin keys: who changed what, newest first, paged."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query

from service import audit
from service.api import paging
from service.api.deps import SessionDep
from service.api.schemas import AuditOut, AuditPage, as_utc

router = APIRouter(prefix="/v1/audit", tags=["operations"])


@router.get("", response_model=AuditPage, summary="The audit trail (admin keys only)")
def list_audit(
    session: SessionDep,
    limit: Annotated[int, Query(ge=1, le=500)] = 100,
    cursor: paging.CursorQuery = None,
    action: str | None = None,
    key_id: str | None = None,
) -> AuditPage:
    """`?cursor=` continues from a page's `next`."""
    after = paging.decode("audit", cursor, (int,))[0] if cursor else None
    rows, total, nxt = audit.page(session, limit=limit, cursor=after, action=action,
                                  key_id=key_id)
    items = [AuditOut(id=r.id, at=as_utc(r.at), key_id=r.key_id, action=r.action,
                      target=r.target, method=r.method, path=r.path, status=r.status,
                      detail=r.detail)
             for r in rows]
    return AuditPage(items=items, total=total,
                     next=None if nxt is None else paging.encode("audit", (nxt,)))

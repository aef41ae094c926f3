"""The audit trail: one row per change (uploads, jobs, cancels, deletes, channel moves, key
changes) saying which key made it, when, and to what. API changes are recorded by
``service/api/audit.py``; key changes by ``service/auth.py`` in their own transaction."""

from __future__ import annotations

from typing import Any

import sqlalchemy as sa
from sqlalchemy.orm import Session

from service.tables import AuditEntry


def record(session: Session, *, action: str, target: str | None, key_id: str | None,
           method: str | None = None, path: str | None = None,
           status: int | None = None) -> None:
    session.add(AuditEntry(action=action, target=target, key_id=key_id, method=method,
                           path=path, status=status))


def page(session: Session, *, limit: int, cursor: int | None = None,
         action: str | None = None, key_id: str | None = None
         ) -> tuple[list[AuditEntry], int, int | None]:
    """Newest first: (entries, total matching, cursor of the next page or None)."""
    where: list[Any] = []
    if action:
        where.append(AuditEntry.action == action)
    if key_id:
        where.append(AuditEntry.key_id == key_id)
    total = session.scalar(sa.select(sa.func.count()).select_from(AuditEntry).where(*where))
    query = sa.select(AuditEntry).where(*where)
    if cursor is not None:
        query = query.where(AuditEntry.id < cursor)
    rows = list(session.scalars(query.order_by(AuditEntry.id.desc()).limit(limit + 1)))
    more = len(rows) > limit
    rows = rows[:limit]
    return rows, int(total or 0), (rows[-1].id if more and rows else None)

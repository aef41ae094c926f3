"""The audit trail: one row per change (uploads, jobs, cancels, deletes, channel moves, key
changes) saying which key made it, when, and to what.

The row is written in the transaction that makes the change, so neither can land without
the other:

- Key changes (``service/auth.py``) and channel moves (``service/channels.py``, from the
  API or a job's promotion) call :func:`record` in their own transaction.
- Every other change through the API is named by ``service/api/audit.py`` before the
  route runs (a :class:`Pending` in a context variable that the route's threads inherit);
  the session events below add its row to the first transaction of that request that
  writes anything, just before it commits. A transaction that rolls back takes the row
  with it. The answer's status is filled in after the answer (``finish``): it is not known
  while the change commits, and losing it loses no change.
"""

from __future__ import annotations

from contextvars import ContextVar
from dataclasses import dataclass, field
from typing import Any

import sqlalchemy as sa
from sqlalchemy import event
from sqlalchemy.orm import ORMExecuteState, Session

from service.tables import AuditEntry


@dataclass
class Pending:
    """The change an API request is making, until its row is written."""

    action: str
    target: str | None
    method: str
    path: str
    #: The request's state; the key check puts ``key_id`` there once routing starts.
    state: dict[str, Any] = field(default_factory=dict)
    #: The row's id, once the transaction carrying it committed.
    entry_id: int | None = None

    @property
    def key_id(self) -> str | None:
        found = self.state.get("key_id")
        return found if isinstance(found, str) else None


_CURRENT: ContextVar[Pending | None] = ContextVar("grovekeeper_audit_pending", default=None)
# session.info keys: this transaction wrote something / the audit row it carries.
_CHANGED, _ENTRY, _CREATED = "audit_changed", "audit_entry", "audit_created"
#: ``session.info[EXEMPT] = True``: this session's writes are bookkeeping, not a change
#: (a key's last_used_at stamp).
EXEMPT = "audit_exempt"


def begin(pending: Pending) -> Any:
    """Make ``pending`` the current request's change; returns the token for ``end``."""
    return _CURRENT.set(pending)


def end(token: Any) -> None:
    _CURRENT.reset(token)


def record(session: Session, *, action: str, target: str | None, key_id: str | None,
           method: str | None = None, path: str | None = None, status: int | None = None,
           detail: dict[str, Any] | None = None) -> AuditEntry:
    """Add the audit row of a change to ``session``'s transaction. Inside an API request
    it is that request's row (its method, path and key unless given): the request gets
    no second row."""
    pending = _CURRENT.get()
    fresh = pending is not None and pending.entry_id is None and _ENTRY not in session.info
    ours = pending if fresh else None
    if ours is not None:
        method = method or ours.method
        path = path or ours.path[:300]
        key_id = key_id or ours.key_id
    entry = AuditEntry(action=action, target=target, key_id=key_id, method=method,
                       path=path, status=status, detail=detail)
    session.add(entry)
    if ours is not None:
        session.info[_ENTRY] = entry
    return entry


def finish(session: Session, pending: Pending, *, status: int, created: str | None) -> None:
    """After the answer: its status on the request's row, and the created id from the
    answer when the transaction could not tell it."""
    entry = session.get(AuditEntry, pending.entry_id)
    if entry is None:
        return
    entry.status = status
    if entry.target is None and created is not None:
        entry.target = created


def _with_created(target: str | None, action: str, created: str) -> str:
    if target is None:
        return created
    return f"{target}:{created}" if action.endswith(".create") else target


def key_of_job(session: Session, job_id: str) -> str | None:
    """The key that queued ``job_id`` (from its ``job.create`` row), if any."""
    return session.scalar(sa.select(AuditEntry.key_id).where(
        AuditEntry.action == "job.create", AuditEntry.target == job_id).limit(1))


# -- the session events that carry a request's row in its change's transaction --------


@event.listens_for(Session, "do_orm_execute")
def _on_execute(state: ORMExecuteState) -> None:
    if _CURRENT.get() is not None and (state.is_insert or state.is_update or state.is_delete):
        state.session.info[_CHANGED] = True


def _note_unflushed(session: Session) -> None:
    """Mark the session changed if it holds changes not flushed yet, and note the ids of
    rows it is about to insert."""
    if any(not isinstance(o, AuditEntry) for o in (*session.new, *session.deleted)) or any(
            session.is_modified(o) for o in session.dirty if not isinstance(o, AuditEntry)):
        session.info[_CHANGED] = True
    created = session.info.setdefault(_CREATED, [])
    for obj in session.new:
        ident = getattr(obj, "id", None)
        if isinstance(ident, str) and not isinstance(obj, AuditEntry):
            created.append((obj.__tablename__, ident))


@event.listens_for(Session, "before_flush")
def _on_flush(session: Session, _context: Any, _instances: Any) -> None:
    if _CURRENT.get() is not None:
        _note_unflushed(session)


@event.listens_for(Session, "before_commit")
def _on_commit(session: Session) -> None:
    pending = _CURRENT.get()
    if pending is None or pending.entry_id is not None or _ENTRY in session.info:
        return
    _note_unflushed(session)  # the commit's own flush comes after this event
    if not session.info.get(_CHANGED) or session.info.get(EXEMPT):
        return
    target = pending.target
    if target is None or pending.action.endswith(".create"):
        made = _created_id(pending.action, session.info.get(_CREATED, []))
        if made is not None:
            target = _with_created(target, pending.action, made)
    entry = AuditEntry(action=pending.action, target=target, key_id=pending.key_id,
                       method=pending.method, path=pending.path[:300])
    session.add(entry)  # flushed by the commit that follows
    session.info[_ENTRY] = entry


@event.listens_for(Session, "after_commit")
def _on_committed(session: Session) -> None:
    entry = session.info.get(_ENTRY)
    pending = _CURRENT.get()
    if pending is not None and isinstance(entry, AuditEntry) and pending.entry_id is None:
        pending.entry_id = entry.id
    _forget(session)


@event.listens_for(Session, "after_rollback")
def _on_rolled_back(session: Session) -> None:
    _forget(session)


def _forget(session: Session) -> None:
    for key in (_CHANGED, _ENTRY, _CREATED):
        session.info.pop(key, None)


def _created_id(action: str, created: list[tuple[str, str]]) -> str | None:
    """The id of the row the change created: one of the action's resource if any
    (``dataset.upload`` → a ``gk_datasets`` row), else the first one inserted."""
    resource = action.split(".", 1)[0]
    for table, ident in created:
        if resource in table:
            return ident
    return created[0][1] if created else None


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

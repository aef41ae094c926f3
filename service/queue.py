"""The job queue: enqueue, claim, heartbeat, finish, and a sweep for dead workers.

Claiming is one guarded ``UPDATE … WHERE id = (SELECT … LIMIT 1) AND status =
'queued' RETURNING id``. On SQLite the statement is a single write transaction;
on PostgreSQL the subquery takes its row with ``FOR UPDATE SKIP LOCKED``. Both
measured with zero double claims (LIBRARIES.md §6); the outer status check is
what keeps PostgreSQL from double-claiming under READ COMMITTED.
"""

from __future__ import annotations

from datetime import timedelta

import sqlalchemy as sa
from sqlalchemy.orm import Session

from service.tables import Job, JobStatus, utcnow

QUEUED = JobStatus.QUEUED.value
RUNNING = JobStatus.RUNNING.value


def claim_next(session: Session, *, worker_id: str) -> str | None:
    """Take the highest-priority, oldest queued job for ``worker_id``; None when idle."""
    now = utcnow()
    candidate = (
        sa.select(Job.id)
        .where(Job.status == QUEUED, Job.cancel_requested.is_(False))
        .order_by(Job.priority.desc(), Job.created_at, Job.id)
        .limit(1)
        .with_for_update(skip_locked=True)
        .scalar_subquery()
    )
    stmt = (
        sa.update(Job)
        .where(Job.id == candidate, Job.status == QUEUED)
        .values(
            status=RUNNING,
            worker_id=worker_id,
            started_at=sa.func.coalesce(Job.started_at, now),
            heartbeat_at=now,
            attempts=Job.attempts + 1,
        )
        .returning(Job.id)
        .execution_options(synchronize_session=False)
    )
    return session.execute(stmt).scalar_one_or_none()


def heartbeat(session: Session, *, job_id: str, worker_id: str) -> tuple[bool, bool]:
    """Refresh the claim. Returns (still ours, cancel requested)."""
    result = session.execute(
        sa.update(Job)
        .where(Job.id == job_id, Job.worker_id == worker_id, Job.status == RUNNING)
        .values(heartbeat_at=utcnow())
        .returning(Job.cancel_requested)
        .execution_options(synchronize_session=False)
    ).all()
    if not result:
        return False, False
    return True, bool(result[0][0])


def release(session: Session, *, job_id: str, worker_id: str) -> bool:
    """Hand a running job back to the queue (graceful shutdown)."""
    result = session.execute(
        sa.update(Job)
        .where(Job.id == job_id, Job.worker_id == worker_id, Job.status == RUNNING)
        .values(status=QUEUED, worker_id=None, heartbeat_at=None)
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1  # type: ignore[attr-defined]


def finish(
    session: Session,
    *,
    job_id: str,
    worker_id: str,
    status: JobStatus,
    error: str | None = None,
    model_id: str | None = None,
) -> bool:
    """Mark the job finished if this worker still holds it."""
    result = session.execute(
        sa.update(Job)
        .where(Job.id == job_id, Job.worker_id == worker_id, Job.status == RUNNING)
        .values(status=status.value, error=error, model_id=model_id, finished_at=utcnow())
        .execution_options(synchronize_session=False)
    )
    return result.rowcount == 1  # type: ignore[attr-defined]


def requeue_stale(session: Session, *, stale_after_seconds: float) -> list[str]:
    """Return jobs whose worker stopped heart-beating to the queue; they resume there."""
    cutoff = utcnow() - timedelta(seconds=stale_after_seconds)
    rows = session.execute(
        sa.update(Job)
        .where(Job.status == RUNNING, Job.heartbeat_at < cutoff)
        .values(status=QUEUED, worker_id=None, heartbeat_at=None)
        .returning(Job.id)
        .execution_options(synchronize_session=False)
    ).all()
    return [row[0] for row in rows]

"""The job queue: enqueue, claim, heartbeat, finish, and a sweep for dead workers.

Claiming is one guarded ``UPDATE … WHERE id = (SELECT … LIMIT 1) AND status =
'queued' RETURNING id``. On SQLite the statement is a single write transaction;
on PostgreSQL the subquery takes its row with ``FOR UPDATE SKIP LOCKED``. Both
measured with zero double claims (docs/measured-facts.md §6); the outer status check is
what keeps PostgreSQL from double-claiming under READ COMMITTED.

Several workers on one job: the worker that claims a queued job is its *lead* (it opens
the study, refits the winner and finishes the job). While the job runs, other workers may
*join* it (``join_next``) up to its ``max_workers``; every participant, lead included, has
a row in ``gk_job_workers`` with its own heartbeat. A stale lead sends the job back to the
queue (the next claimer becomes lead; live joiners carry on); a stale joiner only loses
its row. Optuna's own trial heartbeat fails the dead worker's trials in flight.

Fencing (after Kleppmann, *Designing Data-Intensive Applications*, ch. 8): every claim
raises the job's ``epoch`` and hands it to the claimer. A lead's heartbeat, status writes,
trial copies and model go through only while the job still carries its epoch, so a lead
cut off long enough to be replaced cannot write over its successor when it comes back; it
learns that it lost the job and abandons it. A joiner's token is its participant row:
once swept as stale, its writes are refused too. The same checks guard the trials' own
record, the Optuna journal (``journal_fence``): a stale worker can neither start a trial
nor report one there.
"""

from __future__ import annotations

from collections.abc import Callable, Collection
from datetime import datetime, timedelta

import sqlalchemy as sa
from sqlalchemy.orm import Session

from service.db import rows_changed
from service.tables import Job, JobStatus, JobWorker, utcnow

QUEUED = JobStatus.QUEUED.value
RUNNING = JobStatus.RUNNING.value


def claim_next(session: Session, *, worker_id: str) -> str | None:
    """Take the highest-priority, oldest queued job for ``worker_id``; None when idle."""
    claimed = claim(session, worker_id=worker_id)
    return None if claimed is None else claimed[0]


def claim(session: Session, *, worker_id: str) -> tuple[str, int] | None:
    """``claim_next`` that also answers the claim's epoch (the fencing token)."""
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
            epoch=Job.epoch + 1,
        )
        .returning(Job.id, Job.epoch)
        .execution_options(synchronize_session=False)
    )
    row = session.execute(stmt).first()
    if row is None:
        return None
    _add_participant(session, job_id=row[0], worker_id=worker_id, now=now)
    return row[0], int(row[1])


def _held(job_id: str, worker_id: str, epoch: int | None) -> sa.ColumnElement[bool]:
    """The job is running under this worker's claim (and epoch, when one is given)."""
    held = sa.and_(Job.id == job_id, Job.worker_id == worker_id, Job.status == RUNNING)
    return held if epoch is None else sa.and_(held, Job.epoch == epoch)


def holds(session: Session | sa.Connection, *, job_id: str, worker_id: str,
          epoch: int | None) -> bool:
    """Whether the claim still stands; locks the job row (PostgreSQL) until commit, so
    the write that follows in the same transaction cannot race a new claim."""
    row = session.execute(sa.select(Job.id).where(_held(job_id, worker_id, epoch))
                          .with_for_update()).first()
    return row is not None


def is_participant(session: Session | sa.Connection, *, job_id: str, worker_id: str) -> bool:
    """A joiner's claim: its row in ``gk_job_workers`` (swept when its heartbeat is stale)."""
    session.execute(sa.select(Job.id).where(Job.id == job_id)
                    .with_for_update(key_share=True))
    return session.execute(sa.select(JobWorker.worker_id).where(
        JobWorker.job_id == job_id, JobWorker.worker_id == worker_id)).first() is not None


def journal_fence(*, job_id: str, worker_id: str, epoch: int | None = None,
                  lead: bool = True) -> Callable[[sa.Connection], bool]:
    """The check every write of this worker to the job's trial journal runs in its own
    transaction (``tuner.journal.Fence``): the lead's claim under ``epoch``, or the
    joiner's participant row."""
    def still_holds(conn: sa.Connection) -> bool:
        if lead:
            return holds(conn, job_id=job_id, worker_id=worker_id, epoch=epoch)
        return is_participant(conn, job_id=job_id, worker_id=worker_id)

    return still_holds


def _add_participant(session: Session, *, job_id: str, worker_id: str, now: datetime) -> None:
    # A live joiner row of the same worker cannot exist (one job per worker at a time),
    # but a row left by an earlier life of this worker id may.
    session.execute(sa.delete(JobWorker).where(JobWorker.job_id == job_id,
                                               JobWorker.worker_id == worker_id))
    session.add(JobWorker(job_id=job_id, worker_id=worker_id, joined_at=now, heartbeat_at=now))
    session.flush()


def _participants(job_id: object) -> sa.ScalarSelect[int]:
    return (sa.select(sa.func.count()).select_from(JobWorker)
            .where(JobWorker.job_id == job_id).scalar_subquery())


def join_next(session: Session, *, worker_id: str, skip: Collection[str] = ()) -> str | None:
    """Join a running job that has room for another worker; None when there is none.

    Queued jobs go first (``claim_next``): a waiting job gets a worker before a running
    one gets an extra. The job row is locked (PostgreSQL, SKIP LOCKED) while the
    participants are counted, and the insert itself re-checks the count in the same
    statement (one write transaction on SQLite), so ``max_workers`` is never exceeded.
    ``skip``: jobs this worker joined lately and found nothing to run in.
    """
    now = utcnow()
    where = [Job.status == RUNNING, Job.joinable.is_(True), Job.max_workers > 1,
             Job.cancel_requested.is_(False), Job.max_workers > _participants(Job.id),
             ~sa.exists().where(JobWorker.job_id == Job.id, JobWorker.worker_id == worker_id)]
    if skip:
        where.append(Job.id.not_in(list(skip)))
    candidate = session.execute(
        sa.select(Job.id, Job.max_workers)
        .where(*where)
        .order_by(Job.priority.desc(), Job.created_at, Job.id)
        .limit(1)
        .with_for_update(skip_locked=True)
    ).first()
    if candidate is None:
        return None
    job_id, limit = candidate
    stamp = sa.DateTime(timezone=True)
    inserted = session.execute(
        sa.insert(JobWorker).from_select(
            ["job_id", "worker_id", "joined_at", "heartbeat_at"],
            sa.select(sa.literal(job_id), sa.literal(worker_id), sa.literal(now, stamp),
                      sa.literal(now, stamp))
            .where(_participants(job_id) < limit),
        ).returning(JobWorker.worker_id)
    ).first()
    return job_id if inserted is not None else None


def leave(session: Session, *, job_id: str, worker_id: str) -> None:
    """A joiner is done with a job (budget reached, cancel, shutdown or error)."""
    session.execute(sa.delete(JobWorker).where(JobWorker.job_id == job_id,
                                               JobWorker.worker_id == worker_id))


def participants(session: Session, *, job_id: str) -> list[str]:
    return list(session.scalars(sa.select(JobWorker.worker_id).where(JobWorker.job_id == job_id)
                                .order_by(JobWorker.joined_at)))


def close_joining(session: Session, *, job_id: str) -> None:
    """Close a running job to further joiners (any participant may: its budget is all
    handed out). Its lead opens it again if a new lead takes over with work left."""
    session.execute(sa.update(Job).where(Job.id == job_id, Job.status == RUNNING)
                    .values(joinable=False).execution_options(synchronize_session=False))


def set_joinable(session: Session, *, job_id: str, worker_id: str,
                 joinable: bool = True, epoch: int | None = None) -> None:
    """Open the lead's job to joiners, or close it (its budget is spent: a joiner would
    only load the study to find nothing left to run, again and again)."""
    session.execute(sa.update(Job).where(_held(job_id, worker_id, epoch))
                    .values(joinable=joinable).execution_options(synchronize_session=False))


def heartbeat(session: Session, *, job_id: str, worker_id: str,
              epoch: int | None = None) -> tuple[bool, bool]:
    """Refresh the lead's claim. Returns (still ours, cancel requested)."""
    now = utcnow()
    result = session.execute(
        sa.update(Job)
        .where(_held(job_id, worker_id, epoch))
        .values(heartbeat_at=now)
        .returning(Job.cancel_requested)
        .execution_options(synchronize_session=False)
    ).all()
    if not result:
        return False, False
    _beat_participant(session, job_id=job_id, worker_id=worker_id, now=now)
    return True, bool(result[0][0])


def _beat_participant(session: Session, *, job_id: str, worker_id: str, now: datetime) -> bool:
    result = session.execute(
        sa.update(JobWorker)
        .where(JobWorker.job_id == job_id, JobWorker.worker_id == worker_id)
        .values(heartbeat_at=now)
        .execution_options(synchronize_session=False)
    )
    return rows_changed(result) == 1


def heartbeat_joiner(session: Session, *, job_id: str, worker_id: str) -> tuple[bool, bool]:
    """Refresh a joiner's row. Returns (still taking part, cancel requested).

    A joiner carries on while its lead is replaced (the job is briefly queued), and stops
    once the job is finished or its own row was swept as stale.
    """
    if not _beat_participant(session, job_id=job_id, worker_id=worker_id, now=utcnow()):
        return False, False
    row = session.execute(sa.select(Job.status, Job.cancel_requested)
                          .where(Job.id == job_id)).first()
    if row is None or row[0] not in (QUEUED, RUNNING):
        return False, bool(row and row[1])
    return True, bool(row[1])


def release(session: Session, *, job_id: str, worker_id: str,
            epoch: int | None = None) -> bool:
    """Hand a running job back to the queue (graceful shutdown)."""
    result = session.execute(
        sa.update(Job)
        .where(_held(job_id, worker_id, epoch))
        .values(status=QUEUED, worker_id=None, heartbeat_at=None)
        .execution_options(synchronize_session=False)
    )
    leave(session, job_id=job_id, worker_id=worker_id)
    return rows_changed(result) == 1


def finish(
    session: Session,
    *,
    job_id: str,
    worker_id: str,
    status: JobStatus,
    error: str | None = None,
    model_id: str | None = None,
    epoch: int | None = None,
) -> bool:
    """Mark the job finished if this worker still holds it (under ``epoch``, if given)."""
    result = session.execute(
        sa.update(Job)
        .where(_held(job_id, worker_id, epoch))
        .values(status=status.value, error=error, model_id=model_id, finished_at=utcnow())
        .execution_options(synchronize_session=False)
    )
    if rows_changed(result) == 1:
        # Joiners still beating see the job finished and stop; their rows go now.
        session.execute(sa.delete(JobWorker).where(JobWorker.job_id == job_id))
    return rows_changed(result) == 1


def requeue_stale(session: Session, *, stale_after_seconds: float) -> list[str]:
    """Return jobs whose lead stopped heart-beating to the queue; they resume there.

    Participants (leads and joiners) whose own heartbeat is stale lose their rows, so
    they no longer count against ``max_workers``.
    """
    cutoff = utcnow() - timedelta(seconds=stale_after_seconds)
    session.execute(sa.delete(JobWorker).where(JobWorker.heartbeat_at < cutoff)
                    .execution_options(synchronize_session=False))
    rows = session.execute(
        sa.update(Job)
        .where(Job.status == RUNNING, Job.heartbeat_at < cutoff)
        .values(status=QUEUED, worker_id=None, heartbeat_at=None)
        .returning(Job.id)
        .execution_options(synchronize_session=False)
    ).all()
    return [row[0] for row in rows]

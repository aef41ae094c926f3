"""Every query the API and the worker make, as keyword-only functions over a session."""

from __future__ import annotations

import secrets
from collections.abc import Sequence
from datetime import datetime, timedelta
from typing import Any

import sqlalchemy as sa
from sqlalchemy.orm import Session

from service.errors import Conflict, NotFound
from service.tables import (
    ApiKey,
    Channel,
    ChannelEvent,
    Comparison,
    Dataset,
    DriftCounts,
    Job,
    JobStatus,
    Model,
    Scoring,
    Trial,
    utcnow,
)
from tuner.fidelity import rung_key

ACTIVE = (JobStatus.QUEUED.value, JobStatus.RUNNING.value)


def new_id(prefix: str) -> str:
    return f"{prefix}_{secrets.token_hex(8)}"


# -- datasets ---------------------------------------------------------------


def add_dataset(session: Session, **fields: Any) -> Dataset:
    dataset = Dataset(**fields)
    session.add(dataset)
    session.flush()
    return dataset


def get_dataset(session: Session, dataset_id: str) -> Dataset:
    dataset = session.get(Dataset, dataset_id)
    if dataset is None:
        raise NotFound(f"no dataset with id {dataset_id!r}")
    return dataset


def _newest_first(query: Any, column: Any, id_column: Any,
                  after: tuple[datetime, str] | None) -> Any:
    """Newest first with the id as tie-break; ``after`` is the (created_at, id) of the
    last row of the previous page (keyset paging)."""
    if after is not None:
        stamp, last_id = after
        query = query.where(sa.or_(column < stamp, sa.and_(column == stamp, id_column < last_id)))
    return query.order_by(column.desc(), id_column.desc())


def list_datasets(session: Session, *, limit: int,
                  after: tuple[datetime, str] | None = None) -> tuple[Sequence[Dataset], int]:
    """Datasets newest first (ties by id), and how many there are in all."""
    query = _newest_first(sa.select(Dataset), Dataset.created_at, Dataset.id, after)
    rows = session.scalars(query.limit(limit)).all()
    count = session.scalar(sa.select(sa.func.count()).select_from(Dataset)) or 0
    return rows, count


def delete_dataset(session: Session, dataset_id: str) -> Dataset:
    dataset = get_dataset(session, dataset_id)
    busy = session.scalars(
        sa.select(Job.id).where(Job.dataset_id == dataset_id, Job.status.in_(ACTIVE))
    ).all()
    if busy:
        raise Conflict(f"dataset {dataset_id!r} is used by active jobs: {', '.join(busy)}")
    session.delete(dataset)
    return dataset


# -- jobs -------------------------------------------------------------------


def add_job(session: Session, **fields: Any) -> Job:
    job = Job(**fields)
    session.add(job)
    session.flush()
    return job


def get_job(session: Session, job_id: str) -> Job:
    job = session.get(Job, job_id)
    if job is None:
        raise NotFound(f"no job with id {job_id!r}")
    return job


# What a row of the jobs list shows: the job's own columns, the summary fields copied
# from its request included (tables.Job._summary). Decoding each job's whole request (a
# few KB of JSON) made a page's cost grow with the requests' size. A row written by an
# older process, without the copies, brings its request along instead.
JOB_SUMMARY_COLUMNS = (
    Job.id, Job.dataset_id, Job.status, Job.priority, Job.target, Job.task, Job.metric,
    Job.direction, Job.trials_budget, Job.seconds_budget,
    Job.trials_completed, Job.trials_pruned, Job.trials_failed, Job.trials_by_fidelity,
    Job.best_score, Job.best_trial_number, Job.model_id, Job.error, Job.cancel_requested,
    Job.attempts, Job.max_workers, Job.created_at, Job.started_at, Job.finished_at,
    sa.case((Job.target.is_(None), Job.spec)).label("unsummarised_spec"),
)


def list_job_summaries(
    session: Session, *, status: str | None, limit: int,
    after: tuple[datetime, str] | None = None,
) -> tuple[Sequence[sa.RowMapping], int]:
    """Summaries of jobs newest first (ties by id), and how many match ``status`` in all."""
    query = sa.select(*JOB_SUMMARY_COLUMNS)
    counter = sa.select(sa.func.count()).select_from(Job)
    if status is not None:
        query = query.where(Job.status == status)
        counter = counter.where(Job.status == status)
    query = _newest_first(query, Job.created_at, Job.id, after)
    rows = session.execute(query.limit(limit)).mappings().all()
    return rows, session.scalar(counter) or 0


def request_cancel(session: Session, job_id: str) -> Job:
    """Cancel a queued job at once; ask the worker of a running job to stop."""
    job = get_job(session, job_id)
    if job.status == JobStatus.QUEUED:
        job.status = JobStatus.CANCELLED.value
        job.finished_at = utcnow()
        job.cancel_requested = True
    elif job.status == JobStatus.RUNNING:
        job.cancel_requested = True
    else:
        raise Conflict(f"job {job_id!r} is already {job.status}")
    session.flush()
    return job


def is_cancel_requested(session: Session, job_id: str) -> bool:
    return bool(session.scalar(sa.select(Job.cancel_requested).where(Job.id == job_id)))


# -- trials -----------------------------------------------------------------


def upsert_trial(session: Session, *, job_id: str, record: dict[str, Any]) -> None:
    """Insert or replace our copy of one finished trial (idempotent for re-syncs)."""
    existing = session.get(Trial, (job_id, record["number"]))
    values = {
        "state": record["state"],
        "params": record["params"],
        "score": record["score"],
        "score_std": record["score_std"],
        "fold_scores": record["fold_scores"],
        "best_iterations": record["best_iterations"],
        "boosting_rounds": record["boosting_rounds"],
        "duration_seconds": record["duration_seconds"],
        "train_seconds": record.get("train_seconds"),
        "score_se": record.get("score_se"),
        "fidelity": record.get("fidelity"),
    }
    if record.get("worker_id") is not None:
        values["worker_id"] = record["worker_id"]
    if existing is None:
        session.add(Trial(job_id=job_id, number=record["number"], **values))
    else:
        for key, value in values.items():
            setattr(existing, key, value)
    session.flush()


def list_trials(session: Session, *, job_id: str, after: int | None = None,
                limit: int | None = None) -> Sequence[Trial]:
    """A job's trials by number; ``after`` is the last number of the previous page."""
    query = sa.select(Trial).where(Trial.job_id == job_id)
    if after is not None:
        query = query.where(Trial.number > after)
    query = query.order_by(Trial.number)
    if limit is not None:
        query = query.limit(limit)
    return session.scalars(query).all()


def count_trials(session: Session, *, job_id: str) -> int:
    return session.scalar(sa.select(sa.func.count()).select_from(Trial)
                          .where(Trial.job_id == job_id)) or 0


def leaderboard(
    session: Session, *, job_id: str, direction: str, limit: int | None,
    after: tuple[float, int] | None = None,
) -> tuple[Sequence[Trial], int]:
    """Ranked trials, best first (ties by number), and how many are ranked in all.

    ``after`` is the (score, number) of the last row of the previous page."""
    maximize = direction == "maximize"
    order = Trial.score.desc() if maximize else Trial.score.asc()
    # Only trials scored on all the search rows compete (a lower fidelity is no rival).
    where = (Trial.job_id == job_id, Trial.state == "complete", Trial.score.is_not(None),
             sa.or_(Trial.fidelity.is_(None), Trial.fidelity >= 1.0))
    query = sa.select(Trial).where(*where)
    if after is not None:
        score, number = after
        worse = Trial.score < score if maximize else Trial.score > score
        query = query.where(sa.or_(worse, sa.and_(Trial.score == score, Trial.number > number)))
    query = query.order_by(order, Trial.number)
    if limit is not None:
        query = query.limit(limit)
    count = session.scalar(sa.select(sa.func.count()).select_from(Trial).where(*where)) or 0
    return session.scalars(query).all(), count


def trials_by_fidelity(session: Session, *, job_id: str) -> dict[str, int]:
    """Finished (complete or pruned) trials per fidelity reached, keyed by share."""
    rows = session.execute(
        sa.select(Trial.fidelity, sa.func.count())
        .where(Trial.job_id == job_id, Trial.state.in_(("complete", "pruned")))
        .group_by(Trial.fidelity)
    ).all()
    out: dict[str, int] = {}
    for fidelity, n in sorted(rows, key=lambda r: (r[0] is None, r[0] or 0.0)):
        key = rung_key(1.0 if fidelity is None else fidelity)
        out[key] = out.get(key, 0) + int(n)
    return out


def trial_counts(session: Session, *, job_id: str) -> dict[str, int]:
    rows = session.execute(
        sa.select(Trial.state, sa.func.count()).where(Trial.job_id == job_id).group_by(Trial.state)
    ).all()
    return {state: int(n) for state, n in rows}


# -- models -----------------------------------------------------------------


def model_exists(session: Session, model_id: str) -> bool:
    return session.get(Model, model_id) is not None


def add_model(session: Session, **fields: Any) -> Model:
    model = Model(**fields)
    session.add(model)
    session.flush()
    return model


def get_model(session: Session, model_id: str) -> Model:
    model = session.get(Model, model_id)
    if model is None:
        raise NotFound(f"no model with id {model_id!r}")
    return model


def delete_model(session: Session, model_id: str) -> Model:
    """Delete a model's row; refused while a channel points at it or a scoring run of it
    is queued or running (callers would lose their answers)."""
    model = get_model(session, model_id)
    behind = channels_for_model(session, model_id)
    if behind:
        raise Conflict(f"model {model_id!r} is behind channel(s) {', '.join(behind)}; move "
                       "them first", errors=[{"field": "model_id", "channel": c,
                                              "message": f"channel '{c}' serves it"}
                                             for c in behind])
    busy = session.scalars(sa.select(Scoring.id).where(Scoring.model_id == model_id,
                                                       Scoring.status.in_(ACTIVE))).all()
    if busy:
        raise Conflict(f"model {model_id!r} is used by scoring runs: {', '.join(busy)}")
    session.delete(model)
    session.flush()
    return model


def list_models(
    session: Session, *, dataset_id: str | None, job_id: str | None, target: str | None,
    limit: int, after: tuple[datetime, str] | None,
) -> tuple[Sequence[tuple[Model, str]], int]:
    """Models newest first (ties by id), each with its job's dataset id; and the total.

    ``after`` is the (created_at, id) of the last model of the previous page: keyset
    paging, so models stored while a caller pages never shift or repeat a page.
    """
    where: list[Any] = []
    if dataset_id is not None:
        where.append(Job.dataset_id == dataset_id)
    if job_id is not None:
        where.append(Model.job_id == job_id)
    if target is not None:
        where.append(Model.target == target)
    base = sa.select(Model, Job.dataset_id).join(Job, Job.id == Model.job_id).where(*where)
    total = session.scalar(
        sa.select(sa.func.count()).select_from(Model).join(Job, Job.id == Model.job_id)
        .where(*where)) or 0
    base = _newest_first(base, Model.created_at, Model.id, after)
    rows = session.execute(base.limit(limit)).all()
    return [(m, d) for m, d in rows], total


# -- channels ---------------------------------------------------------------


def get_channel(session: Session, name: str, *, lock: bool = False) -> Channel:
    query = sa.select(Channel).where(Channel.name == name)
    if lock:  # PostgreSQL: one mover at a time; SQLite serialises writers anyway
        query = query.with_for_update()
    channel = session.scalar(query)
    if channel is None:
        raise NotFound(f"no channel named {name!r}")
    return channel


def channel_model_id(session: Session, name: str) -> str:
    """The model a channel points at now: one primary-key read per prediction."""
    model_id = session.scalar(sa.select(Channel.model_id).where(Channel.name == name))
    if model_id is None:
        raise NotFound(f"no channel named {name!r}")
    return model_id


def list_channels(session: Session, *, limit: int,
                  after: str | None) -> tuple[Sequence[Channel], int]:
    query = sa.select(Channel)
    if after is not None:
        query = query.where(Channel.name > after)
    rows = session.scalars(query.order_by(Channel.name).limit(limit)).all()
    return rows, session.scalar(sa.select(sa.func.count()).select_from(Channel)) or 0


def channel_history(session: Session, *, name: str, limit: int = 100) -> Sequence[ChannelEvent]:
    """A channel's moves, newest first."""
    return session.scalars(
        sa.select(ChannelEvent).where(ChannelEvent.channel == name)
        .order_by(ChannelEvent.id.desc()).limit(limit)).all()


def last_channel_event(session: Session, *, name: str) -> ChannelEvent | None:
    return session.scalar(sa.select(ChannelEvent).where(ChannelEvent.channel == name)
                          .order_by(ChannelEvent.id.desc()).limit(1))


def move_channel(session: Session, *, channel: Channel | None, name: str, model_id: str,
                 action: str, forced: bool = False, key_id: str | None = None,
                 job_id: str | None = None) -> Channel:
    """Point ``name`` at ``model_id`` (creating it when ``channel`` is None) and record
    the move, in the caller's transaction."""
    now = utcnow()
    previous = channel.model_id if channel is not None else None
    if channel is None:
        channel = Channel(name=name, model_id=model_id, created_at=now, updated_at=now)
        session.add(channel)
    else:
        channel.model_id = model_id
        channel.updated_at = now
    session.add(ChannelEvent(channel=name, model_id=model_id, previous_model_id=previous,
                             action=action, forced=forced, key_id=key_id, job_id=job_id,
                             at=now))
    session.flush()
    return channel


def channels_for_model(session: Session, model_id: str) -> list[str]:
    return list(session.scalars(sa.select(Channel.name).where(Channel.model_id == model_id)
                                .order_by(Channel.name)))


def key_id_for_hash(session: Session, key_hash: str) -> str | None:
    return session.scalar(sa.select(ApiKey.id).where(ApiKey.key_hash == key_hash))


# -- scorings ---------------------------------------------------------------


def add_scoring(session: Session, **fields: Any) -> Scoring:
    scoring = Scoring(**fields)
    session.add(scoring)
    session.flush()
    return scoring


def get_scoring(session: Session, scoring_id: str) -> Scoring:
    scoring = session.get(Scoring, scoring_id)
    if scoring is None:
        raise NotFound(f"no scoring run with id {scoring_id!r}")
    return scoring


def cancel_scoring(session: Session, scoring_id: str) -> Scoring:
    """Cancel a queued run at once; ask the worker of a running one to stop."""
    scoring = get_scoring(session, scoring_id)
    if scoring.status == JobStatus.QUEUED:
        scoring.status = JobStatus.CANCELLED.value
        scoring.finished_at = utcnow()
        scoring.cancel_requested = True
    elif scoring.status == JobStatus.RUNNING:
        scoring.cancel_requested = True
    else:
        raise Conflict(f"scoring run {scoring_id!r} is already {scoring.status}")
    session.flush()
    return scoring


def claim_scoring(session: Session, *, worker_id: str, stale_after_seconds: float) -> str | None:
    """Take the oldest queued scoring run, or one whose worker stopped heart-beating."""
    now = utcnow()
    stale = now - timedelta(seconds=stale_after_seconds)
    claimable = sa.or_(
        sa.and_(Scoring.status == JobStatus.QUEUED.value, Scoring.cancel_requested.is_(False)),
        sa.and_(Scoring.status == JobStatus.RUNNING.value, Scoring.heartbeat_at < stale))
    # A plain read first: an idle poll must not take SQLite's write lock from the trials.
    if session.scalar(sa.select(Scoring.id).where(claimable).limit(1)) is None:
        return None
    candidate = (sa.select(Scoring.id).where(claimable)
                 .order_by(Scoring.created_at, Scoring.id).limit(1)
                 .with_for_update(skip_locked=True).scalar_subquery())
    stmt = (sa.update(Scoring).where(Scoring.id == candidate, claimable)
            .values(status=JobStatus.RUNNING.value, worker_id=worker_id, heartbeat_at=now,
                    started_at=sa.func.coalesce(Scoring.started_at, now), rows_done=0,
                    attempts=Scoring.attempts + 1)
            .returning(Scoring.id).execution_options(synchronize_session=False))
    return session.execute(stmt).scalar_one_or_none()


def scoring_progress(session: Session, *, scoring_id: str, worker_id: str,
                     rows_done: int) -> bool:
    """Record progress and beat; True when the run should stop (cancelled, or taken over
    by another worker)."""
    session.execute(sa.update(Scoring).where(Scoring.id == scoring_id,
                                             Scoring.worker_id == worker_id)
                    .values(rows_done=rows_done, heartbeat_at=utcnow()))
    row = session.execute(sa.select(Scoring.cancel_requested, Scoring.worker_id)
                          .where(Scoring.id == scoring_id)).one()
    return bool(row.cancel_requested) or row.worker_id != worker_id


def finish_scoring(session: Session, *, scoring_id: str, worker_id: str, status: str,
                   **fields: Any) -> None:
    session.execute(sa.update(Scoring).where(Scoring.id == scoring_id,
                                             Scoring.worker_id == worker_id)
                    .values(status=status, finished_at=utcnow(), **fields))


# -- comparisons ------------------------------------------------------------


def add_comparison(session: Session, **fields: Any) -> Comparison:
    comparison = Comparison(**fields)
    session.add(comparison)
    session.flush()
    return comparison


def get_comparison(session: Session, comparison_id: str) -> Comparison:
    comparison = session.get(Comparison, comparison_id)
    if comparison is None:
        raise NotFound(f"no comparison with id {comparison_id!r}")
    return comparison


def claim_comparison(session: Session, *, worker_id: str,
                     stale_after_seconds: float) -> str | None:
    """Take the oldest queued comparison, or one whose worker went quiet."""
    now = utcnow()
    stale = now - timedelta(seconds=stale_after_seconds)
    claimable = sa.or_(
        Comparison.status == JobStatus.QUEUED.value,
        sa.and_(Comparison.status == JobStatus.RUNNING.value, Comparison.heartbeat_at < stale))
    if session.scalar(sa.select(Comparison.id).where(claimable).limit(1)) is None:
        return None
    candidate = (sa.select(Comparison.id).where(claimable)
                 .order_by(Comparison.created_at, Comparison.id).limit(1)
                 .with_for_update(skip_locked=True).scalar_subquery())
    stmt = (sa.update(Comparison).where(Comparison.id == candidate, claimable)
            .values(status=JobStatus.RUNNING.value, worker_id=worker_id, heartbeat_at=now,
                    started_at=sa.func.coalesce(Comparison.started_at, now),
                    attempts=Comparison.attempts + 1)
            .returning(Comparison.id).execution_options(synchronize_session=False))
    return session.execute(stmt).scalar_one_or_none()


def finish_comparison(session: Session, *, comparison_id: str, worker_id: str, status: str,
                      **fields: Any) -> None:
    session.execute(sa.update(Comparison).where(Comparison.id == comparison_id,
                                                Comparison.worker_id == worker_id)
                    .values(status=status, finished_at=utcnow(), **fields))


# -- drift ------------------------------------------------------------------


def add_drift_counts(session: Session, *, model_id: str, day: str, rows: int,
                     counts: list[list[int]]) -> None:
    """Add one flush's counts to the (model, day) row, creating it on first use."""
    row = session.scalar(sa.select(DriftCounts).where(DriftCounts.model_id == model_id,
                                                      DriftCounts.day == day)
                         .with_for_update())
    if row is None:
        session.add(DriftCounts(model_id=model_id, day=day, rows=rows, counts=counts))
    else:
        row.counts = [[a + b for a, b in zip(old, new, strict=True)]
                      for old, new in zip(row.counts, counts, strict=True)]
        row.rows = row.rows + rows
        row.updated_at = utcnow()
    session.flush()


def drift_counts(session: Session, *, model_id: str,
                 since: str | None = None) -> Sequence[DriftCounts]:
    query = sa.select(DriftCounts).where(DriftCounts.model_id == model_id)
    if since is not None:
        query = query.where(DriftCounts.day >= since)
    return session.scalars(query.order_by(DriftCounts.day)).all()

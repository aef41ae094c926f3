"""The service's own tables. Optuna keeps its trials in its own tables beside these;
``gk_trials`` is our ranked copy so the leaderboard never loads Optuna trial objects."""

from __future__ import annotations

import enum
from datetime import UTC, datetime
from typing import Any

import sqlalchemy as sa
from sqlalchemy.orm import DeclarativeBase, Mapped, mapped_column, validates


def utcnow() -> datetime:
    return datetime.now(UTC)


class Base(DeclarativeBase):
    type_annotation_map = {dict[str, Any]: sa.JSON, list[Any]: sa.JSON}


class JobStatus(enum.StrEnum):
    QUEUED = "queued"
    RUNNING = "running"
    SUCCEEDED = "succeeded"
    FAILED = "failed"
    CANCELLED = "cancelled"

    def is_finished(self) -> bool:
        return self in (JobStatus.SUCCEEDED, JobStatus.FAILED, JobStatus.CANCELLED)


class Dataset(Base):
    __tablename__ = "gk_datasets"
    __table_args__ = (sa.Index("ix_gk_datasets_listed", "created_at", "id"),)

    id: Mapped[str] = mapped_column(sa.String(40), primary_key=True)
    name: Mapped[str] = mapped_column(sa.String(200))
    rows: Mapped[int]
    n_columns: Mapped[int]
    size_bytes: Mapped[int] = mapped_column(sa.BigInteger)
    sha256: Mapped[str] = mapped_column(sa.String(64))
    source_format: Mapped[str] = mapped_column(sa.String(16))
    columns: Mapped[list[Any]]
    warnings: Mapped[list[Any]]
    file_key: Mapped[str] = mapped_column(sa.String(200))
    # sha256 of the stored Parquet file (``sha256`` is of the bytes as uploaded).
    file_sha256: Mapped[str] = mapped_column(sa.String(64))
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)


class Job(Base):
    __tablename__ = "gk_jobs"
    __table_args__ = (
        sa.Index("ix_gk_jobs_claim", "status", "priority", "created_at"),
        # The jobs list, newest first, whole or by status: a page reads its rows off these
        # in order instead of sorting every job ever queued.
        sa.Index("ix_gk_jobs_listed", "created_at", "id"),
        sa.Index("ix_gk_jobs_status_listed", "status", "created_at", "id"),
    )

    id: Mapped[str] = mapped_column(sa.String(40), primary_key=True)
    # No foreign key: a job keeps the id of its dataset after the dataset is deleted.
    dataset_id: Mapped[str] = mapped_column(sa.String(40), index=True)
    status: Mapped[str] = mapped_column(sa.String(16), default=JobStatus.QUEUED.value)
    priority: Mapped[int] = mapped_column(default=0)
    spec: Mapped[dict[str, Any]]
    # Copies of the effective request's fields that the jobs list shows, kept by
    # ``_summary`` whenever ``spec`` is set: a list page then reads no request JSON.
    target: Mapped[str | None] = mapped_column(sa.Text)
    task: Mapped[str | None] = mapped_column(sa.String(16))
    metric: Mapped[str | None] = mapped_column(sa.String(40))
    direction: Mapped[str | None] = mapped_column(sa.String(8))
    trials_budget: Mapped[int | None]
    seconds_budget: Mapped[float | None]
    study_name: Mapped[str] = mapped_column(sa.String(80))
    trials_completed: Mapped[int] = mapped_column(default=0)
    trials_pruned: Mapped[int] = mapped_column(default=0)
    trials_failed: Mapped[int] = mapped_column(default=0)
    # Finished (complete or pruned) trials by the share of the search rows they reached,
    # keyed like tuner.fidelity.rung_key ("0.1111", "0.3333", "1").
    trials_by_fidelity: Mapped[dict[str, Any] | None] = mapped_column(sa.JSON)
    best_score: Mapped[float | None]
    best_trial_number: Mapped[int | None]
    cancel_requested: Mapped[bool] = mapped_column(default=False)
    error: Mapped[str | None] = mapped_column(sa.Text)
    model_id: Mapped[str | None] = mapped_column(sa.String(40))
    # What the job's ``promote`` request did (service/comparing.py); None without one.
    promotion: Mapped[dict[str, Any] | None] = mapped_column(sa.JSON)
    # The lead worker: it created or resumed the study and finishes the job (refit, status).
    worker_id: Mapped[str | None] = mapped_column(sa.String(120))
    # Worker processes allowed on this job at once (lead included); see queue.join_next.
    max_workers: Mapped[int] = mapped_column(default=1, server_default="1")
    # Set by the lead once the study is open and its enqueued trial 0 has been taken, so
    # that joiners never race for a WAITING trial (unsafe on SQLite, docs/measured-facts.md §2).
    joinable: Mapped[bool] = mapped_column(default=False, server_default=sa.false())
    attempts: Mapped[int] = mapped_column(default=0)
    # The fencing token: raised by every claim. A lead's writes (status, trial copy, model)
    # carry the epoch of its claim and are refused once another claim has raised it.
    epoch: Mapped[int] = mapped_column(default=0, server_default="0")
    warnings: Mapped[list[Any]] = mapped_column(default=list)
    # A job the worker found bad input in: the RFC 9457 problem document the API would
    # have answered at submission (service/admission.py judges the profile only).
    problem: Mapped[dict[str, Any] | None] = mapped_column(sa.JSON)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))
    heartbeat_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))
    finished_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))

    @validates("spec")
    def _summary(self, _key: str, spec: dict[str, Any]) -> dict[str, Any]:
        for name, value in job_summary_fields(spec).items():
            setattr(self, name, value)
        return spec


def job_summary_fields(spec: dict[str, Any]) -> dict[str, Any]:
    """The jobs list's columns (``Job.target`` ... ``Job.seconds_budget``) from a spec."""
    effective = spec.get("effective") or {}
    budget = effective.get("budget") or {}
    return {"target": effective.get("target"), "task": effective.get("task"),
            "metric": effective.get("metric"), "direction": effective.get("direction"),
            "trials_budget": budget.get("trials"), "seconds_budget": budget.get("seconds")}


class JobWorker(Base):
    """One worker process taking part in a running job: the lead and any joiners."""

    __tablename__ = "gk_job_workers"

    job_id: Mapped[str] = mapped_column(sa.ForeignKey("gk_jobs.id"), primary_key=True)
    worker_id: Mapped[str] = mapped_column(sa.String(120), primary_key=True)
    joined_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)
    heartbeat_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)


class SchemaVersion(Base):
    """One row: the schema revision this database was last migrated to (service/db.py)."""

    __tablename__ = "gk_schema"

    id: Mapped[int] = mapped_column(primary_key=True)
    version: Mapped[int]
    migrated_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)


class Trial(Base):
    __tablename__ = "gk_trials"
    __table_args__ = (sa.Index("ix_gk_trials_rank", "job_id", "state", "score"),)

    job_id: Mapped[str] = mapped_column(sa.ForeignKey("gk_jobs.id"), primary_key=True)
    number: Mapped[int] = mapped_column(primary_key=True)
    state: Mapped[str] = mapped_column(sa.String(16))
    params: Mapped[dict[str, Any]]
    score: Mapped[float | None]
    score_std: Mapped[float | None]
    fold_scores: Mapped[list[Any]]
    best_iterations: Mapped[list[Any]]
    boosting_rounds: Mapped[int | None]
    duration_seconds: Mapped[float | None]
    train_seconds: Mapped[float | None]
    score_se: Mapped[float | None]
    fidelity: Mapped[float | None]
    # The worker that recorded the trial (None for trials re-synced after a crash).
    worker_id: Mapped[str | None] = mapped_column(sa.String(120))
    finished_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)


class Model(Base):
    __tablename__ = "gk_models"
    __table_args__ = (sa.Index("ix_gk_models_listed", "created_at", "id"),)

    id: Mapped[str] = mapped_column(sa.String(40), primary_key=True)
    job_id: Mapped[str] = mapped_column(sa.ForeignKey("gk_jobs.id"), index=True)
    task: Mapped[str] = mapped_column(sa.String(16))
    metric: Mapped[str] = mapped_column(sa.String(32))
    params: Mapped[dict[str, Any]]
    boosting_rounds: Mapped[int]
    trial_number: Mapped[int]
    cv: Mapped[dict[str, Any]]
    holdout: Mapped[dict[str, Any]]
    feature_schema: Mapped[dict[str, Any]]
    classes: Mapped[list[Any] | None] = mapped_column(sa.JSON)
    target: Mapped[str] = mapped_column(sa.String(200))
    feature_importance: Mapped[list[Any]]
    details: Mapped[dict[str, Any]] = mapped_column(default=dict)
    # Binary models: {"threshold", "method", ...} (tuner/decision.py); None before costs
    # were supported, or for other tasks.
    decision: Mapped[dict[str, Any] | None] = mapped_column(sa.JSON)
    sha256: Mapped[str] = mapped_column(sa.String(64))
    file_key: Mapped[str] = mapped_column(sa.String(200))
    size_bytes: Mapped[int] = mapped_column(sa.BigInteger)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)


class Channel(Base):
    """A stable name callers predict through; it points at one model at a time."""

    __tablename__ = "gk_channels"

    name: Mapped[str] = mapped_column(sa.String(100), primary_key=True)
    model_id: Mapped[str] = mapped_column(sa.String(40), index=True)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)
    updated_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)


class ChannelEvent(Base):
    """One move of a channel: set, rollback or promotion; never updated or deleted."""

    __tablename__ = "gk_channel_events"
    __table_args__ = (sa.Index("ix_gk_channel_events_channel", "channel", "id"),)

    id: Mapped[int] = mapped_column(sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                                    primary_key=True, autoincrement=True)
    channel: Mapped[str] = mapped_column(sa.String(100))
    model_id: Mapped[str] = mapped_column(sa.String(40))
    previous_model_id: Mapped[str | None] = mapped_column(sa.String(40))
    action: Mapped[str] = mapped_column(sa.String(16))
    forced: Mapped[bool] = mapped_column(default=False)
    # The API key that made the change (None on a server without keys, or a worker's
    # promotion, which names its job in ``job_id``).
    key_id: Mapped[str | None] = mapped_column(sa.String(40))
    job_id: Mapped[str | None] = mapped_column(sa.String(40))
    at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)


class Scoring(Base):
    """A batch scoring run: one model over one stored dataset, run by a worker in chunks."""

    __tablename__ = "gk_scorings"
    __table_args__ = (sa.Index("ix_gk_scorings_claim", "status", "created_at"),)

    id: Mapped[str] = mapped_column(sa.String(40), primary_key=True)
    model_id: Mapped[str] = mapped_column(sa.String(40), index=True)
    # The channel it was submitted through; its model was fixed at submission.
    channel: Mapped[str | None] = mapped_column(sa.String(100))
    dataset_id: Mapped[str] = mapped_column(sa.String(40))
    keep: Mapped[list[Any]] = mapped_column(default=list)
    unseen: Mapped[str] = mapped_column(sa.String(16), default="error")
    status: Mapped[str] = mapped_column(sa.String(16), default=JobStatus.QUEUED.value)
    rows_total: Mapped[int] = mapped_column(sa.BigInteger, default=0)
    rows_done: Mapped[int] = mapped_column(sa.BigInteger, default=0)
    cancel_requested: Mapped[bool] = mapped_column(default=False)
    error: Mapped[str | None] = mapped_column(sa.Text)
    result_key: Mapped[str | None] = mapped_column(sa.String(200))
    result_sha256: Mapped[str | None] = mapped_column(sa.String(64))
    worker_id: Mapped[str | None] = mapped_column(sa.String(120))
    attempts: Mapped[int] = mapped_column(default=0)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))
    heartbeat_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))
    finished_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))


class Comparison(Base):
    """Two models scored on one dataset's rows by a worker, with their paired difference."""

    __tablename__ = "gk_comparisons"
    __table_args__ = (sa.Index("ix_gk_comparisons_claim", "status", "created_at"),)

    id: Mapped[str] = mapped_column(sa.String(40), primary_key=True)
    model_ids: Mapped[list[Any]]
    dataset_id: Mapped[str] = mapped_column(sa.String(40))
    status: Mapped[str] = mapped_column(sa.String(16), default=JobStatus.QUEUED.value)
    result: Mapped[dict[str, Any] | None] = mapped_column(sa.JSON)
    error: Mapped[str | None] = mapped_column(sa.Text)
    worker_id: Mapped[str | None] = mapped_column(sa.String(120))
    attempts: Mapped[int] = mapped_column(default=0)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)
    started_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))
    heartbeat_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))
    finished_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))


class DriftCounts(Base):
    """Per model and day, the scored rows' counts in the training bins of each feature
    (tuner/drift.py), added to by every API process's periodic flush."""

    __tablename__ = "gk_drift_counts"

    model_id: Mapped[str] = mapped_column(sa.String(40), primary_key=True)
    day: Mapped[str] = mapped_column(sa.String(10), primary_key=True)  # YYYY-MM-DD, UTC
    rows: Mapped[int] = mapped_column(sa.BigInteger, default=0)
    counts: Mapped[list[Any]]  # per feature, per bin (missing last)
    updated_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)


class ApiKey(Base):
    __tablename__ = "gk_api_keys"

    id: Mapped[str] = mapped_column(sa.String(40), primary_key=True)
    scope: Mapped[str] = mapped_column(sa.String(16))
    key_hash: Mapped[str] = mapped_column(sa.String(64), unique=True)
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)
    revoked_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))
    # Optional end of validity; after it the key is refused like a revoked one.
    expires_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))
    # Written at most once a minute per key and API process (service/auth.py).
    last_used_at: Mapped[datetime | None] = mapped_column(sa.DateTime(timezone=True))


class KeyGeneration(Base):
    """One row: a counter bumped in the same transaction as every key creation or
    revocation. API processes read it on each request and drop their cached answers when
    it moves, so a change takes effect at once everywhere. A value above zero also records
    that keys have existed here, which revoking or deleting every key can never undo."""

    __tablename__ = "gk_key_generation"

    id: Mapped[int] = mapped_column(primary_key=True)
    generation: Mapped[int] = mapped_column(sa.BigInteger, default=0)


class AuditEntry(Base):
    """One change made through the API or the key commands: which key, when, what."""

    __tablename__ = "gk_audit"

    id: Mapped[int] = mapped_column(sa.BigInteger().with_variant(sa.Integer, "sqlite"),
                                    primary_key=True, autoincrement=True)
    at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow,
                                         index=True)
    # None: a server without keys, or a command run on the server (keys create/revoke).
    key_id: Mapped[str | None] = mapped_column(sa.String(40))
    action: Mapped[str] = mapped_column(sa.String(40), index=True)
    target: Mapped[str | None] = mapped_column(sa.Text)
    method: Mapped[str | None] = mapped_column(sa.String(8))
    path: Mapped[str | None] = mapped_column(sa.String(300))
    status: Mapped[int | None]
    # What changed, where the action and target do not say it: a channel move's
    # {"from": model, "to": model, "forced": ..., "job_id": ...}.
    detail: Mapped[dict[str, Any] | None] = mapped_column(sa.JSON)


class ServerSecret(Base):
    """Secrets the server makes for itself, by name (``report_links``: the HMAC key of
    signed report links). Kept in the database so every API process signs and checks with
    the same one; made on first use (service/links.py)."""

    __tablename__ = "gk_server_secrets"

    name: Mapped[str] = mapped_column(sa.String(40), primary_key=True)
    value: Mapped[str] = mapped_column(sa.String(128))
    created_at: Mapped[datetime] = mapped_column(sa.DateTime(timezone=True), default=utcnow)

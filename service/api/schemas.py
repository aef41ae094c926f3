"""Request and response shapes, kept apart from the tables."""

from __future__ import annotations

from datetime import UTC, datetime
from typing import TYPE_CHECKING, Any, Literal, TypeAlias, overload

from pydantic import BaseModel, ConfigDict, Field

from service.api.paging import Page

# The job request's shapes live in service/jobrequest.py (the worker reads them too);
# re-exported here beside the other request shapes.
from service.jobrequest import (  # noqa: F401
    DEFAULT_TRIALS,
    MAX_COLUMNS,
    MAX_ENTRIES,
    MAX_NAME,
    Budget,
    CVSpec,
    DecisionSpec,
    JobCreate,
    JobRequest,
    Name,
    PromoteSpec,
    Strict,
)
from vocabulary import JOB_STATUSES, UNSEEN_POLICIES

# The vocabulary's choices, as types of query parameters and fields.
if TYPE_CHECKING:
    Unseen: TypeAlias = str
    StatusName: TypeAlias = str
else:
    Unseen, StatusName = Literal[UNSEEN_POLICIES], Literal[JOB_STATUSES]


@overload
def as_utc(value: datetime) -> datetime: ...
@overload
def as_utc(value: None) -> None: ...
@overload
def as_utc(value: datetime | None) -> datetime | None: ...
def as_utc(value: datetime | None) -> datetime | None:
    # SQLite hands back naive datetimes; every one we store is UTC.
    if value is None or value.tzinfo is not None:
        return value
    return value.replace(tzinfo=UTC)


class ColumnOut(BaseModel):
    name: str
    kind: str
    missing: int
    distinct: int
    dtype: str | None = None
    # The kind declared at upload (?kinds=), if any; ``kind`` then follows it.
    declared: str | None = None


class DatasetOut(BaseModel):
    id: str
    name: str
    rows: int
    n_columns: int
    size_bytes: int
    sha256: str
    source_format: str
    created_at: datetime
    columns: list[ColumnOut]
    warnings: list[str]


class DatasetList(Page[DatasetOut]):
    pass


class Progress(BaseModel):
    trials_completed: int
    trials_pruned: int
    trials_failed: int
    trials_budget: int | None
    best_score: float | None
    best_trial_number: int | None
    elapsed_seconds: float
    # Seconds left, from the pace of the trials so far (None until one has finished).
    eta_seconds: float | None = None
    # Finished trials by the share of the search rows they reached ("1" = all; lower
    # shares only on large tables, where configurations climb row subsamples).
    trials_by_fidelity: dict[str, int] = Field(default_factory=dict)


class JobSummary(BaseModel):
    """A row of the jobs list: what a job is and how far it got. ``GET /v1/jobs/{id}``
    adds the stored request (``spec``), warnings, the problem document and the promotion."""

    id: str
    dataset_id: str
    status: str
    priority: int
    target: str
    task: str
    metric: str
    direction: str
    progress: Progress
    model_id: str | None
    error: str | None
    cancel_requested: bool
    attempts: int
    max_workers: int = 1
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None


class JobOut(JobSummary):
    spec: dict[str, Any]
    # With a promote request, once the job has succeeded: what happened to the channel.
    promotion: dict[str, Any] | None = None
    # A job failed for bad input that only its rows showed: the problem document (RFC
    # 9457, with the fields named) that submission would have answered.
    problem: dict[str, Any] | None = None
    warnings: list[str]


class JobList(Page[JobSummary]):
    pass


class TrialOut(BaseModel):
    number: int
    state: str
    params: dict[str, Any]
    score: float | None
    score_std: float | None
    fold_scores: list[float]
    best_iterations: list[int]
    boosting_rounds: int | None
    duration_seconds: float | None
    train_seconds: float | None = None
    # Standard error of score (over folds; by batch means on a single validation split).
    score_se: float | None = None
    # Largest share of the search rows the trial was scored on (1.0 = all).
    fidelity: float | None = None


class TrialList(Page[TrialOut]):
    pass


class LeaderboardRow(BaseModel):
    rank: int
    number: int
    score: float
    score_std: float | None
    score_se: float | None = None
    params: dict[str, Any]
    boosting_rounds: int | None


class Leaderboard(Page[LeaderboardRow]):
    """A page of the ranked trials; `total` counts every ranked trial."""

    job_id: str
    metric: str
    direction: str


class ModelOut(BaseModel):
    id: str
    job_id: str
    task: str
    metric: str
    target: str
    params: dict[str, Any]
    boosting_rounds: int
    trial_number: int
    cv: dict[str, Any]
    # Hold-out scores only, metric name -> number; see holdout_rows and holdout_intervals.
    holdout: dict[str, float | None]
    # Rows set aside before the search and scored once (0 when none were).
    holdout_rows: int = 0
    # Per metric of holdout: {"estimate", "low", "high", "std_error", "level",
    # "resamples"}, percentile bootstrap on the hold-out rows (empty without a hold-out).
    holdout_intervals: dict[str, dict[str, Any]] = {}
    feature_schema: dict[str, Any]
    classes: list[Any] | None
    feature_importance: list[dict[str, Any]]
    details: dict[str, Any]
    # Binary: {"threshold", "method", "note", ...}; labels are class 1 above threshold.
    decision: dict[str, Any] | None = None
    sha256: str
    size_bytes: int
    created_at: datetime


class ModelSummary(BaseModel):
    """A model as listed: enough to choose one; ``GET /v1/models/{id}`` has the rest."""

    id: str
    job_id: str
    dataset_id: str
    task: str
    metric: str
    target: str
    boosting_rounds: int
    trial_number: int
    cv: dict[str, Any]
    holdout: dict[str, float | None]
    holdout_rows: int = 0
    sha256: str
    created_at: datetime


class ModelList(Page[ModelSummary]):
    pass


class PredictRequest(Strict):
    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={"examples": [{"rows": [{"peak_temp_c": 1240, "clay_body": "raku"}]}]},
    )

    # The row limit itself is a setting (max_prediction_rows, a 413); this bound only
    # stops a list far beyond any setting before it is built.
    rows: list[dict[str, Any]] = Field(min_length=1, max_length=10_000_000)
    # Input columns to return unchanged beside each prediction (also ?keep=a,b).
    keep: list[Name] | None = Field(default=None, max_length=MAX_COLUMNS)


class PredictResponse(BaseModel):
    model_id: str
    predictions: list[Any]
    classes: list[Any] | None = None
    probabilities: list[list[float]] | None = None
    ignored_columns: list[str] = []
    # With ?explain=true: per row {"bias", "features": {name: value}} (TreeSHAP).
    contributions: list[dict[str, Any]] | None = None
    contribution_scale: str | None = None
    # With keep: per row, the kept columns as sent, aligned with predictions.
    kept: list[dict[str, Any]] | None = None


class ChannelPut(Strict):
    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"model_id": "mdl_4567cdef89ab0123"}]})

    model_id: str = Field(min_length=1, max_length=64)
    # Switch even when the new model needs other input columns than the current one.
    force: bool = False


class ChannelMove(BaseModel):
    model_id: str
    previous_model_id: str | None
    action: str  # "set", "rollback" or "promote"
    forced: bool
    key_id: str | None
    job_id: str | None
    at: datetime


class ChannelOut(BaseModel):
    name: str
    model_id: str
    created_at: datetime
    updated_at: datetime
    # Newest first (at most the last 100 moves).
    history: list[ChannelMove]


class ChannelSummary(BaseModel):
    name: str
    model_id: str
    updated_at: datetime


class ChannelList(Page[ChannelSummary]):
    pass


class ScoringCreate(Strict):
    model_config = ConfigDict(extra="forbid", json_schema_extra={
        "examples": [{"dataset_id": "ds_0123abcd4567ef89", "keep": ["firing_id"]}]})

    dataset_id: str = Field(min_length=1, max_length=64)
    # Dataset columns written unchanged beside each prediction, first.
    keep: list[str] = Field(default_factory=list, max_length=100)
    unseen: Unseen = "error"


class ScoringProgress(BaseModel):
    rows_done: int
    rows_total: int
    fraction: float


class ScoringOut(BaseModel):
    id: str
    model_id: str
    channel: str | None
    dataset_id: str
    keep: list[str]
    unseen: str
    status: str
    progress: ScoringProgress
    error: str | None
    # When succeeded: GET it with Accept: text/csv for CSV, else Parquet.
    result_url: str | None
    cancel_requested: bool
    attempts: int
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None


class ComparisonCreate(Strict):
    model_config = ConfigDict(extra="forbid", json_schema_extra={"examples": [
        {"models": ["mdl_4567cdef89ab0123", "mdl_0f1e2d3c4b5a6978"],
         "dataset_id": "ds_0123abcd4567ef89"}]})

    models: list[str] = Field(min_length=2, max_length=2)
    dataset_id: str = Field(min_length=1, max_length=64)


class ComparisonOut(BaseModel):
    id: str
    models: list[str]
    dataset_id: str
    status: str
    # When succeeded: scores per model, difference (second minus first) with its 95%
    # paired bootstrap interval, better (a model id or null), comparable, reasons.
    result: dict[str, Any] | None
    error: str | None
    created_at: datetime
    started_at: datetime | None
    finished_at: datetime | None


class AuditOut(BaseModel):
    id: int
    at: datetime
    key_id: str | None
    action: str
    target: str | None
    method: str | None
    path: str | None
    status: int | None
    #: A channel move's models: {"from", "to"} (and "forced", "job_id" when they apply).
    detail: dict[str, Any] | None = None


class AuditPage(Page[AuditOut]):
    pass

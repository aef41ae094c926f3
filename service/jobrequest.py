"""The typed job request: validated in the API, stored as JSON, re-validated in the worker.

Every field's default, bounds and description come from ``vocabulary/job_fields.py``, and
every choice from ``vocabulary``; this module only adds the types and the checks that
span fields. Pydantic only: the API imports it without the tuner's libraries.
"""

from __future__ import annotations

from collections.abc import Mapping
from typing import TYPE_CHECKING, Annotated, Any, Literal, TypeAlias

from pydantic import BaseModel, ConfigDict, Field, model_validator

from vocabulary import (
    CV_STRATEGIES,
    DECLARED_KINDS,
    FINAL_REFITS,
    PROMOTE_RULES,
    PRUNERS,
    SELECTION_RULES,
    TASKS,
)
from vocabulary.job_fields import (
    DEFAULT_TRIALS,
    MAX_COLUMNS,
    MAX_ENTRIES,
    MAX_ID,
    MAX_NAME,
    JobField,
)
from vocabulary.job_fields import field as job_field

if TYPE_CHECKING:  # the checker sees strings; pydantic sees the vocabulary's choices
    Task: TypeAlias = str
    Strategy: TypeAlias = str
    Pruner: TypeAlias = str
    Selection: TypeAlias = str
    FinalRefit: TypeAlias = str
    PromoteRule: TypeAlias = str
    DeclaredKind: TypeAlias = str
else:
    Task, Strategy = Literal[TASKS], Literal[CV_STRATEGIES]
    Pruner, Selection = Literal[PRUNERS], Literal[SELECTION_RULES]
    FinalRefit, PromoteRule = Literal[FINAL_REFITS], Literal[PROMOTE_RULES]
    DeclaredKind = Literal[DECLARED_KINDS]

Name = Annotated[str, Field(min_length=1, max_length=MAX_NAME)]
__all__ = ["DEFAULT_TRIALS", "MAX_COLUMNS", "MAX_ENTRIES", "MAX_NAME", "Budget", "CVSpec",
           "DecisionSpec", "JobCreate", "JobRequest", "Name", "PromoteSpec", "WarmStart",
           "spec"]


def spec(name: str) -> Any:
    """A pydantic ``Field`` for the job field ``name``: its default, bounds, description
    and example, all from ``vocabulary/job_fields.py``."""
    f: JobField = job_field(name)
    kwargs: dict[str, Any] = {"description": f.description, "examples": [f.example]}
    if f.minimum is not None:
        kwargs["gt" if f.above_minimum else "ge"] = f.minimum
    if f.maximum is not None:
        kwargs["le"] = f.maximum
    if f.max_length is not None:
        kwargs["max_length"] = f.max_length
    if f.max_length in (MAX_NAME, MAX_ID):  # a name or an id is never empty
        kwargs["min_length"] = 1
    if f.required:
        return Field(**kwargs)
    return Field(default=f.default, **kwargs)


class Strict(BaseModel):
    model_config = ConfigDict(extra="forbid")


class Budget(Strict):
    trials: int | None = spec("budget.trials")
    seconds: float | None = spec("budget.seconds")

    @model_validator(mode="after")
    def _default_trials(self) -> Budget:
        if self.trials is None and self.seconds is None:
            self.trials = DEFAULT_TRIALS
        return self


class CVSpec(Strict):
    # None: chosen from the search rows (tuner.validation.validation_splits).
    folds: int | None = spec("cv.folds")
    strategy: Strategy | None = spec("cv.strategy")
    group_column: Name | None = spec("cv.group_column")
    time_column: Name | None = spec("cv.time_column")


class DecisionSpec(Strict):
    """The costs of a binary model's two mistakes, in any one unit."""

    false_positive_cost: float = spec("decision.false_positive_cost")
    false_negative_cost: float = spec("decision.false_negative_cost")

    @model_validator(mode="after")
    def _not_both_zero(self) -> DecisionSpec:
        if self.false_positive_cost + self.false_negative_cost <= 0:
            raise ValueError("at least one of the two costs must be above zero")
        return self


class PromoteSpec(Strict):
    """Move a channel to the job's model when it succeeds (see README, champion and
    challenger)."""

    channel: str = Field(pattern=r"^[A-Za-z0-9][A-Za-z0-9_.-]{0,99}$",
                         description=job_field("promote.channel").description,
                         examples=[job_field("promote.channel").example])
    rule: PromoteRule = spec("promote.rule")


class JobCreate(Strict):
    """A tuning job request. Only ``dataset_id`` and ``target`` are required."""

    model_config = ConfigDict(
        extra="forbid",
        json_schema_extra={
            "examples": [
                {"dataset_id": "ds_0123abcd", "target": "defect", "budget": {"trials": 40}}
            ]
        },
    )

    dataset_id: str = spec("dataset_id")
    target: Name = spec("target")
    task: Task | None = spec("task")
    # Checked against the task (vocabulary.METRICS) once the task is known.
    metric: str | None = spec("metric")
    features: list[Name] | None = spec("features")
    exclude: list[Name] | None = spec("exclude")
    budget: Budget = Field(default_factory=Budget)
    cv: CVSpec = Field(default_factory=CVSpec)
    holdout_fraction: float = spec("holdout_fraction")
    weight_column: Name | None = spec("weight_column")
    search_space: dict[str, Any] | None = spec("search_space")
    seed: int = spec("seed")
    priority: int = spec("priority")
    # Worker processes that may run trials of this job at once (one study, one budget).
    max_workers: int = spec("max_workers")
    # Checked against the task (vocabulary.REGRESSION_OBJECTIVES) once the task is known.
    objective: str | None = spec("objective")
    pruner: Pruner = spec("pruner")
    # None: chosen from the table's size to use every core of the worker
    # (tuner.trial_loop.machine_split), or 1 for a reproducible job.
    max_parallel_trials: int | None = spec("max_parallel_trials")
    # Divided among the running trials (at least one each, never more than the cores).
    num_threads: int | None = spec("num_threads")
    # One trial at a time in one worker (service/admission.py check_reproducible).
    reproducible: bool = spec("reproducible")
    selection: Selection = spec("selection")
    final_refit: FinalRefit = spec("final_refit")
    calibrate: bool = spec("calibrate")
    portfolio: bool = spec("portfolio")
    warm_start_job_id: str | None = spec("warm_start_job_id")
    # Wins over the upload's declarations and inference.
    column_kinds: dict[str, DeclaredKind] | None = spec("column_kinds")
    # Those that would break the service's guarantees are refused (tuner/controls.py).
    fixed: dict[str, Any] | None = spec("fixed")
    monotone: dict[str, Literal[1, -1]] | None = spec("monotone")
    interaction_constraints: list[list[str]] | None = spec("interaction_constraints")
    # Need not be features.
    segments: list[str] | None = spec("segments")
    max_rounds: int = spec("max_rounds")
    early_stopping_rounds: int = spec("early_stopping_rounds")
    # Binary only: the threshold the model serves labels with comes from these costs.
    decision: DecisionSpec | None = None
    promote: PromoteSpec | None = None


class WarmStart(Strict):
    """An earlier job's best trials, resolved at submission so every worker enqueues the
    same ones."""

    job_id: str
    trials: list[int]
    params: list[dict[str, Any]]


class JobRequest(JobCreate):
    """A job request as stored on the job (``spec.request``) and read by the worker: what
    was asked, with the upload's declared kinds merged into ``column_kinds`` and the warm
    start resolved."""

    warm_start: WarmStart | None = None

    @classmethod
    def load(cls, stored: JobRequest | Mapping[str, Any]) -> JobRequest:
        """Re-validate a stored request (a dict from the database, or a model)."""
        if isinstance(stored, JobRequest):
            return stored
        return cls.model_validate(dict(stored))

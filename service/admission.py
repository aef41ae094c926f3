"""Admitting a job request at submission, from its dataset's stored profile alone.

The API reads no table and trains nothing: everything the profile decides (unknown
columns, a constant or single-class target, an impossible CV scheme, a bad metric, search
space or fixed parameter, ...) is a 422 here, and the job is queued with a provisional
effective spec. The worker then runs ``service.jobspec.build_run`` (``prepare``, the
cross-fitted data checks, LightGBM's judgement of fixed parameters); a problem found there
fails the job with the same problem document (``service.errors.input_problem``), and the
full effective spec and the data warnings replace the provisional ones.

Light on purpose: pydantic, the vocabulary and the tuner's plain-Python modules
(``tuner.profiled``, ``tuner.space``, ``tuner.controls``), so the API loads no NumPy,
pandas, Optuna or LightGBM to answer a submission.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from typing import Any

from service.errors import Unprocessable
from service.jobrequest import JobRequest
from tuner.controls import check_fixed, split_fixed
from tuner.errors import ConfigError, SearchSpaceError
from tuner.profiled import judge
from tuner.space import DEFAULT_SPACE, merge_overrides, space_problems

#: How many of an earlier job's best trials a warm start enqueues.
WARM_START_TRIALS = 3

__all__ = ["WARM_START_TRIALS", "admit", "check_reproducible", "prefixed",
           "provisional_objective"]


def prefixed(errors: list[dict[str, Any]], prefix: str) -> list[dict[str, Any]]:
    return [{**e, "field": f"{prefix}{e['field']}"} for e in errors]


def check_reproducible(request: JobRequest) -> None:
    """A reproducible job runs one trial at a time in one worker; anything else is a 422.

    Parallel trials (threads or workers) finish in an order that depends on timing, and
    the sampler proposes each new trial from the ones finished so far, so the trials
    themselves would differ from run to run.
    """
    if not request.reproducible:
        return
    errors = []
    if (request.max_parallel_trials or 1) > 1:
        errors.append({"field": "max_parallel_trials", "message": "a reproducible job runs "
                       "one trial at a time; leave max_parallel_trials at 1"})
    if request.max_workers > 1:
        errors.append({"field": "max_workers", "message": "a reproducible job runs in one "
                       "worker; leave max_workers at 1"})
    if errors:
        raise ConfigError(f"reproducible: {errors[0]['message']}", errors)


def provisional_objective(task: str, metric: str | None, objective: str | None) -> str:
    """``tuner.losses.resolve_objective``, which the worker's spec states for good."""
    if task in ("binary", "multiclass"):
        return task
    if objective is not None:
        return objective
    return "poisson" if metric == "poisson_deviance" else "regression"


def admit(request: JobRequest, columns: Sequence[Mapping[str, Any]], rows: int, *,
          warm_task: str | None = None) -> dict[str, Any]:
    """Check ``request`` against the dataset's profile; return the provisional spec.

    ``warm_task`` is the task of the job named by ``warm_start_job_id``, which must match.

    Raises:
        DatasetError, ConfigError, SearchSpaceError: Bad input the profile shows (422s
            naming the field).
        Unprocessable: Decision costs on a task that is not binary; a warm start from
            a job of another task.
    """
    cv = request.cv
    judged = judge(
        columns, rows, target=request.target, task=request.task, features=request.features,
        exclude=request.exclude, weight_column=request.weight_column,
        group_column=cv.group_column, time_column=cv.time_column,
        column_kinds=request.column_kinds, segments=request.segments,
        strategy=cv.strategy, folds=cv.folds, holdout_fraction=request.holdout_fraction,
        metric=request.metric, objective=request.objective, monotone=request.monotone,
        interaction_constraints=request.interaction_constraints)
    try:
        space = merge_overrides(DEFAULT_SPACE, request.search_space or {})
    except SearchSpaceError as exc:
        exc.errors = prefixed(exc.errors, "search_space.")
        raise
    space, _ = split_fixed(check_fixed(request.fixed), space, request.search_space)
    if judged.task is not None:
        errors = space_problems(judged.task, request.objective, space)
        if errors:
            raise ConfigError(f"invalid search settings: {errors[0]['message']}", errors)
    check_reproducible(request)
    if request.decision is not None and judged.task not in (None, "binary"):
        message = f"decision costs apply to binary tasks; this job is {judged.task}"
        raise Unprocessable(message, errors=[{"field": "decision", "message": message}])
    if warm_task is not None and judged.task is not None and warm_task != judged.task:
        message = (f"job '{request.warm_start_job_id}' tuned a {warm_task} task; this job is "
                   f"{judged.task}")
        raise Unprocessable(message, errors=[{"field": "warm_start_job_id",
                                              "message": message}])
    # Until the worker has read the rows: a task only they can tell (an older profile
    # without its small columns' values) is shown as regression, and corrected then.
    task = judged.task or "regression"
    metric = judged.metric or request.metric or "rmse"
    direction = judged.direction or "minimize"
    given_parallel = request.max_parallel_trials
    auto = (not request.reproducible and given_parallel is None
            and request.num_threads is None)
    warm = request.warm_start
    return {
        # False until a worker has prepared the data: then the spec is rewritten whole
        # (features, rows, the search space sampled, the manifest, ...).
        "prepared": False,
        "target": request.target,
        "task": task,
        "metric": metric,
        "direction": direction,
        "objective": provisional_objective(task, metric, request.objective),
        "column_kinds": dict(request.column_kinds or {}),
        "segments": list(request.segments or ()),
        "weight_column": request.weight_column,
        "budget": {"trials": request.budget.trials, "seconds": request.budget.seconds},
        "cv": {"folds": cv.folds, "strategy": judged.strategy,
               "group_column": cv.group_column, "time_column": cv.time_column},
        "holdout_fraction": request.holdout_fraction,
        "seed": request.seed,
        "pruner": request.pruner,
        "max_parallel_trials": given_parallel or 1,
        "num_threads": request.num_threads or given_parallel or 1,
        "reproducible": request.reproducible,
        "parallelism": "machine" if auto else "given",
        "selection": request.selection,
        "final_refit": request.final_refit,
        "fixed": dict(request.fixed or {}),
        "monotone": dict(request.monotone or {}),
        "interaction_constraints": [list(g) for g in request.interaction_constraints or ()],
        "max_rounds": request.max_rounds,
        "early_stopping_rounds": request.early_stopping_rounds,
        "calibrate": request.calibrate,
        "warm_start": ({"job_id": warm.job_id, "trials": list(warm.trials),
                        "params": [dict(p) for p in warm.params]} if warm else None),
    }

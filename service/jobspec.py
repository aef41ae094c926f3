"""Turns a job request plus its dataset into the tuner's inputs.

The worker runs this when it takes a job (the API only admits the request from the
dataset's profile: service/admission.py); it is deterministic, so every worker on a job,
and a resumed job, get the same data, split and search configuration. Its bad-input
errors fail the job with the problem document the API would have answered.
"""

from __future__ import annotations

import dataclasses
import platform
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

import lightgbm
import numpy
import optuna
import pandas as pd

import tuner
from service.admission import check_reproducible, prefixed
from service.jobrequest import JobRequest
from tuner import fidelity
from tuner.columns import date_part_name
from tuner.config import check_config
from tuner.controls import check_fixed, constraint_params, split_fixed, try_params
from tuner.datachecks import job_warnings
from tuner.losses import default_metric_for, resolve_objective
from tuner.metrics import default_metric, get_metric
from tuner.space import DEFAULT_SPACE, Fixed, effective_space, merge_overrides
from tuner.validation import ValidationPlan, plan_validation


@dataclass(frozen=True)
class RunPlan:
    data: tuner.PreparedData
    plan: ValidationPlan
    config: tuner.SearchConfig
    effective: dict[str, Any]
    #: The typed request the plan was built from.
    request: JobRequest


def versions() -> dict[str, str]:
    """Library versions that decide what a search and its model come out as."""
    return {"lightgbm": lightgbm.__version__, "optuna": optuna.__version__,
            "numpy": numpy.__version__, "pandas": pd.__version__,
            "python": platform.python_version()}


def build_run(stored: JobRequest | Mapping[str, Any], frame: pd.DataFrame, *,
              dataset_sha256: str | None = None) -> RunPlan:
    """Validate a job request against ``frame``; raise on bad input.

    ``stored`` is a :class:`JobRequest` or its JSON (a job's ``spec.request``), which is
    validated into one here: every default comes from the request model
    (``vocabulary/job_fields.py``), none is restated below. Its ``warm_start``, when
    present, was resolved by the API from the earlier job's trials at submission.

    Raises the tuner's ValueError subclasses, each with ``.errors`` naming the field.
    """
    request = JobRequest.load(stored)
    cv = request.cv
    data = tuner.prepare(
        frame,
        target=request.target,
        task=request.task,
        features=request.features,
        exclude=request.exclude,
        weight_column=request.weight_column,
        group_column=cv.group_column,
        time_column=cv.time_column,
        column_kinds=request.column_kinds,
        segments=request.segments,
    )
    # The prepared features replace the raw table: the caller that passed it straight
    # in (service/worker/context.py) holds no other reference, so it is freed here.
    del frame
    if request.decision is not None and data.task != "binary":
        # Judged at submission when the profile told the task; here for the rest.
        message = f"decision costs apply to binary tasks; this job is {data.task}"
        raise tuner.ConfigError(message, [{"field": "decision", "message": message}])
    objective = request.objective
    metric_name = (request.metric or default_metric_for(data.task, objective)
                   or default_metric(data.task))
    metric = get_metric(metric_name, data.task)
    try:
        space = merge_overrides(DEFAULT_SPACE, request.search_space or {})
    except tuner.SearchSpaceError as exc:
        exc.errors = prefixed(exc.errors, "search_space.")
        raise
    # Fixed parameters the search could tune become fixed points of the space (so trials
    # list them); the rest, with the constraints, go to every trial and the final fit.
    space, fixed = split_fixed(check_fixed(request.fixed), space, request.search_space)
    fixed.update(constraint_params(
        data.schema.names, request.monotone, request.interaction_constraints,
        # A date column stands for its calendar parts in a group, for its elapsed time
        # when monotone (its weekday has no direction).
        columns={f.name: f.model_names for f in data.schema.features if f.parts},
        monotone_columns={f.name: [date_part_name(f.name, "elapsed_days")]
                          for f in data.schema.features if f.parts},
        categorical={f.name for f in data.schema.features if f.kind == "categorical"}))
    seed = request.seed
    plan = plan_validation(
        data,
        strategy=cv.strategy,
        n_folds=cv.folds,
        holdout_fraction=request.holdout_fraction,
        seed=seed,
    )
    if data.segments and not len(plan.holdout_idx):
        message = "metrics per segment are computed on the hold-out; set holdout_fraction > 0"
        raise tuner.ConfigError(message, [{"field": "segments", "message": message}])
    # Leaks, target copies, duplicates across the hold-out, imbalance, size: job warnings.
    data = dataclasses.replace(data, warnings=(*data.warnings, *job_warnings(data, plan)))
    warm = request.warm_start
    reproducible = request.reproducible
    check_reproducible(request)
    given_parallel = request.max_parallel_trials
    auto = not reproducible and given_parallel is None and request.num_threads is None
    config = tuner.SearchConfig(
        task=data.task,
        metric=metric.name,
        n_trials=request.budget.trials,
        timeout=request.budget.seconds,
        seed=seed,
        space=space,
        objective=objective,
        pruner=request.pruner,
        max_parallel_trials=given_parallel or 1,
        num_threads=request.num_threads or given_parallel or 1,
        selection=request.selection,
        final_refit=request.final_refit,
        calibrate=request.calibrate,
        portfolio=request.portfolio,
        warm_start=tuple(dict(p) for p in warm.params) if warm else (),
        max_rounds=request.max_rounds,
        early_stopping_rounds=request.early_stopping_rounds,
        fixed_params=fixed,
        # Looked up here, not frozen into SearchConfig's default, so one rule holds for
        # the API's check and the worker's run (tests lower it to use small tables).
        fidelity_from_rows=fidelity.FIDELITY_FROM_ROWS,
    )
    check_config(data, config)  # the checks run_search repeats, here so they are 422s
    if fixed or len(space) != len(DEFAULT_SPACE):
        # LightGBM judges the values itself: a one-round fit on a few rows.
        try_params(data.X.iloc[plan.train_idx], data.y[plan.train_idx], {
            **tuner.base_params(data.task, num_class=len(data.classes or ()),
                                metric=metric.name, seed=seed, num_threads=1,
                                objective=objective, fixed=fixed),
            **{k: v.value for k, v in space.items() if isinstance(v, Fixed)},
        })
    sampled = effective_space(space, n_train_rows=plan.min_fit_rows).to_dict()
    cv_scheme = {
        "folds": len(plan.folds),
        "partition_folds": plan.partition_folds,
        "strategy": plan.strategy,
        "group_column": cv.group_column,
        "time_column": cv.time_column,
    }
    effective = {
        "prepared": True,  # by a worker, from the rows (service/admission.py: before)
        "target": data.target,
        "task": data.task,
        "metric": metric.name,
        "direction": metric.direction,
        "objective": resolve_objective(data.task, metric.name, objective),
        "features": list(data.schema.names),
        "column_kinds": dict(request.column_kinds or {}),
        "segments": list(request.segments or ()),
        "weight_column": request.weight_column,
        "budget": {"trials": config.n_trials, "seconds": config.timeout},
        "cv": cv_scheme,
        "holdout_fraction": request.holdout_fraction,
        "rows": {
            "used": int(len(data.y)),
            "search": int(len(plan.train_idx)),
            "holdout": int(len(plan.holdout_idx)),
        },
        "seed": seed,
        "search_space": sampled,
        "pruner": config.pruner,
        # Row subsamples sampled configurations climb (tuner/fidelity.py); [1.0]: none.
        "fidelity": {"rungs": [round(r, 4) for r in tuner.fidelity_rungs(
            len(plan.train_idx), config.fidelity_from_rows)],
            "from_rows": config.fidelity_from_rows, "keep": f"1/{tuner.REDUCTION}"},
        "max_parallel_trials": config.max_parallel_trials,
        "num_threads": config.num_threads,
        "reproducible": reproducible,
        # "machine": the worker picks parallel trials or threads from the table's size and
        # its cores (then writes what it chose into max_parallel_trials / num_threads).
        "parallelism": "machine" if auto else "given",
        "selection": config.selection,
        "final_refit": config.final_refit,
        "fixed": dict(request.fixed or {}),
        "monotone": dict(request.monotone or {}),
        "interaction_constraints": [list(g) for g in request.interaction_constraints or ()],
        "lightgbm_fixed": fixed,
        "max_rounds": config.max_rounds,
        "early_stopping_rounds": config.early_stopping_rounds,
        "calibrate": config.calibrate,
        # Enqueued after trial 0 and any warm start, in this order (tuner.portfolio).
        "portfolio": (tuner.portfolio_params(space, n_train_rows=plan.min_fit_rows)
                      if config.portfolio else []),
        "warm_start": ({"job_id": warm.job_id, "trials": list(warm.trials),
                        "params": list(config.warm_start)} if warm else None),
        "classes": data.classes,
        # What it takes to repeat this job: same bytes, space, seed, folds and libraries
        # (LightGBM documents that results may differ across versions and systems).
        "manifest": {
            "dataset_sha256": dataset_sha256,
            "search_space": sampled,
            "seed": seed,
            "cv": cv_scheme,
            "versions": versions(),
        },
    }
    return RunPlan(data=data, plan=plan, config=config, effective=effective,
                   request=request)

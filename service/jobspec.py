"""Turns a job request plus its dataset into the tuner's inputs.

The API runs this once at submission so that every problem with the request is a
422 before anything is queued; the worker runs it again, deterministically, to get
the same data, split and search configuration.
"""

from __future__ import annotations

import dataclasses
from dataclasses import dataclass
from typing import Any

import pandas as pd

import tuner
from tuner.datachecks import job_warnings
from tuner.metrics import default_metric, get_metric
from tuner.space import DEFAULT_SPACE, merge_overrides
from tuner.validation import ValidationPlan, plan_validation



@dataclass(frozen=True)
class RunPlan:
    data: tuner.PreparedData
    plan: ValidationPlan
    config: tuner.SearchConfig
    effective: dict[str, Any]


def _prefixed(errors: list[dict[str, Any]], prefix: str) -> list[dict[str, Any]]:
    return [{**e, "field": f"{prefix}{e['field']}"} for e in errors]


def build_run(request: dict[str, Any], frame: pd.DataFrame) -> RunPlan:
    """Validate ``request`` (a ``JobCreate`` dump) against ``frame``; raise on bad input.

    Raises the tuner's ValueError subclasses, each with ``.errors`` naming the field.
    """
    cv = request.get("cv") or {}
    data = tuner.prepare(
        frame,
        target=request["target"],
        task=request.get("task"),
        features=request.get("features"),
        exclude=request.get("exclude"),
        weight_column=request.get("weight_column"),
        group_column=cv.get("group_column"),
        time_column=cv.get("time_column"),
    )
    metric_name = request.get("metric") or default_metric(data.task)
    metric = get_metric(metric_name, data.task)
    try:
        space = merge_overrides(DEFAULT_SPACE, request.get("search_space") or {})
    except tuner.SearchSpaceError as exc:
        exc.errors = _prefixed(exc.errors, "search_space.")
        raise
    seed = int(request.get("seed", 0))
    plan = plan_validation(
        data,
        strategy=cv.get("strategy"),
        n_folds=int(cv.get("folds", 5)),
        holdout_fraction=float(request.get("holdout_fraction", 0.2)),
        seed=seed,
    )
    # Leaks, target copies, duplicates across the hold-out, imbalance, size: job warnings.
    data = dataclasses.replace(data, warnings=(*data.warnings, *job_warnings(data, plan)))
    budget = request.get("budget") or {}
    config = tuner.SearchConfig(
        task=data.task,
        metric=metric.name,
        n_trials=budget.get("trials"),
        timeout=budget.get("seconds"),
        seed=seed,
        space=space,
    )
    effective = {
        "target": data.target,
        "task": data.task,
        "metric": metric.name,
        "direction": metric.direction,
        "features": list(data.schema.names),
        "weight_column": request.get("weight_column"),
        "budget": {"trials": config.n_trials, "seconds": config.timeout},
        "cv": {
            "folds": len(plan.folds),
            "strategy": plan.strategy,
            "group_column": cv.get("group_column"),
            "time_column": cv.get("time_column"),
        },
        "holdout_fraction": request.get("holdout_fraction", 0.2),
        "rows": {
            "used": int(len(data.y)),
            "search": int(len(plan.train_idx)),
            "holdout": int(len(plan.holdout_idx)),
        },
        "seed": seed,
        "search_space": space.to_dict(),
        "classes": data.classes,
    }
    return RunPlan(data=data, plan=plan, config=config, effective=effective)

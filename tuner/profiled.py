"""A job's column choices judged from a table's stored profile alone, without its rows.

``prepare()`` and ``plan_validation()`` read the table; the API must answer a job request
without doing that (the table may be large, and the API process does no heavy work). This
module repeats the checks of theirs that a profile (``tuner.profile.ColumnProfile`` as a
dict: ``name``, ``kind``, ``missing``, ``distinct``, ``infinite``, ``values``) decides for
certain, with the same fields and messages, and leaves the rest to ``prepare()`` in the
worker. It refuses only what ``prepare()`` would refuse too: where a profile cannot tell
(e.g. an older profile without ``values``), it passes. Plain Python: no pandas, no NumPy.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from tuner.errors import ConfigError, DatasetError, summarise
from vocabulary import DEFAULT_METRICS, METRICS, OBJECTIVE_METRICS, REGRESSION_OBJECTIVES
from vocabulary.job_fields import AUTO_FOLDS

#: More classes than this is refused (``tuner.dataset.MAX_CLASSES``; a test keeps them equal).
MAX_CLASSES = 100
_CLASSIFY = ("binary", "multiclass")


@dataclass(frozen=True)
class Judged:
    """What the profile says about a job: its task (``None`` when only the rows can tell),
    metric and its direction, and the CV strategy."""

    task: str | None
    metric: str | None
    direction: str | None
    strategy: str | None


def _error(field: str, message: str) -> dict[str, str]:
    return {"field": field, "message": message}


def _raise(errors: list[dict[str, str]]) -> None:
    if errors:
        raise DatasetError(summarise("cannot prepare the dataset", errors), errors)


def infer_task(column: Mapping[str, Any]) -> str | None:
    """``tuner.dataset.infer_task`` from a profile; ``None`` when the profile cannot tell."""
    kind, distinct = column["kind"], int(column["distinct"])
    if kind == "boolean":
        return "binary"
    if kind in ("categorical", "text"):
        return "binary" if distinct <= 2 else "multiclass"
    if kind != "numeric":
        return "regression"
    if distinct == 2:
        return "binary"
    if 3 <= distinct <= 10:
        values = column.get("values")
        if values is None:
            return None
        return ("multiclass" if [float(v) for v in values] == [float(k) for k in
                                                                  range(distinct)]
                else "regression")
    return "regression"


def check_names(names: list[str], target: str, features: Sequence[str] | None,
                exclude: Sequence[str] | None, roles: dict[str, str | None]) -> None:
    """The target, features, exclusions and role columns named against ``names``;
    shared by admission (stored profile) and ``prepare`` (the rows)."""
    available = set(names)
    if target not in available:
        listing = ", ".join(names[:50]) + (", ..." if len(names) > 50 else "")
        _raise([_error("target", f"column '{target}' not found; available columns: {listing}")])
    errors = []
    for field, chosen in (("features", features), ("exclude", exclude)):
        unknown = [n for n in chosen or () if n not in available]
        if unknown:
            errors.append(_error(field, f"unknown columns: {', '.join(map(repr, unknown))}"))
    if features is not None and target in features:
        errors.append(_error("features", f"the target '{target}' cannot also be a feature"))
    for field, name in roles.items():
        if name is not None and name not in available:
            errors.append(_error(field, f"column '{name}' not found"))
        elif name is not None and name == target:
            errors.append(_error(field, f"column '{name}' is the target"))
    _raise(errors)


def _check_kinds(names: set[str], target: str, features: Sequence[str] | None,
                 kinds: Mapping[str, str]) -> None:
    errors = []
    for name, kind in kinds.items():
        field = f"column_kinds.{name}"
        if name not in names:
            errors.append(_error(field, f"column '{name}' not found"))
        elif name == target:
            errors.append(_error(field, "the target's kind follows from the task"))
        elif kind == "ignore" and name in (features or ()):
            errors.append(_error(field, f"'{name}' is both ignored and listed in features"))
    _raise(errors)


def _label(value: float) -> Any:
    return int(value) if float(value).is_integer() else float(value)


def _check_target(column: Mapping[str, Any], target: str, rows: int,
                  task: str | None) -> str | None:
    """The task, as ``tuner.dataset._target`` decides it (``None``: only rows can tell)."""
    if rows - int(column["missing"]) <= 0:
        _raise([_error("target", f"target '{target}' has no values")])
    kind, distinct = column["kind"], int(column["distinct"])
    if kind == "datetime":
        _raise([_error("target", f"target '{target}' holds dates; it cannot be learned")])
    task = task or infer_task(column)
    if kind == "numeric" and int(column.get("infinite") or 0) > 0:
        _raise([_error("target", f"target '{target}' contains infinite values")])
    if task is None:
        return None
    if task == "regression":
        if kind not in ("numeric", "boolean"):
            _raise([_error("task", f"regression needs a numeric target; '{target}' holds "
                                   f"{kind} values")])
        if distinct < 2:
            _raise([_error("target", f"target '{target}' is constant")])
        return task
    if distinct < 2:
        values = column.get("values")
        if kind == "numeric" and values:
            _raise([_error("target", f"target '{target}' has a single class "
                                     f"{_label(values[0])!r}")])
        if kind in ("categorical", "text"):
            _raise([_error("target", f"target '{target}' has a single class")])
        return task  # a boolean's one class prints as prepare() words it: leave it there
    if task == "binary" and distinct != 2:
        _raise([_error("task", f"binary needs exactly 2 classes; '{target}' has "
                               f"{distinct}")])
    if distinct > MAX_CLASSES:
        _raise([_error("target", f"target '{target}' has {distinct} classes; at most "
                                 f"{MAX_CLASSES} are supported (use task=regression?)")])
    return task


def _check_side_columns(by_name: Mapping[str, Mapping[str, Any]], weight_column: str | None,
                        group_column: str | None, time_column: str | None) -> None:
    errors = []
    if weight_column is not None:
        column = by_name[weight_column]
        if column["kind"] != "numeric":
            errors.append(_error("weight_column", f"'{weight_column}' is not numeric"))
        elif int(column["missing"]) > 0:
            errors.append(_error("weight_column", f"'{weight_column}' has missing values"))
    if group_column is not None and int(by_name[group_column]["missing"]) > 0:
        errors.append(_error("group_column", f"'{group_column}' has missing values"))
    if time_column is not None:
        column = by_name[time_column]
        if column["kind"] not in ("datetime", "numeric"):
            errors.append(_error("time_column", f"'{time_column}' is neither dates nor numbers"))
        elif int(column["missing"]) > 0:
            errors.append(_error("time_column", f"'{time_column}' has missing values"))
    _raise(errors)


def _metric(task: str | None, metric: str | None, objective: str | None
            ) -> tuple[str | None, str | None]:
    """``tuner.metrics.get_metric`` (same message) and the default metric of the task."""
    if metric is None:
        if task is None:
            return None, None
        if task == "regression" and objective is not None:
            metric = OBJECTIVE_METRICS.get(objective)
        metric = metric or DEFAULT_METRICS[task]
    known = METRICS.get(metric)
    if known is None or (task is not None and task not in known[1]):
        shown = task or "any"
        usable = ", ".join(n for n, (_, tasks) in METRICS.items() if task in tasks or not task)
        reason = "unknown metric" if known is None else f"metric not available for {task}"
        message = f"{reason} '{metric}' (task '{shown}'); choose one of: {usable}"
        raise ConfigError(message, [{"field": "metric", "message": message}])
    return metric, known[0] if task is not None else None


def _check_objective(task: str | None, metric: str | None, objective: str | None) -> None:
    """The parts of ``tuner.losses.check_objective`` that need no target values."""
    if objective is None or task is None:
        return
    def fail(message: str, fields: tuple[str, ...] = ("objective",)) -> ConfigError:
        return ConfigError(message, [{"field": f, "message": message} for f in fields])
    if task in _CLASSIFY:
        if objective != task:
            raise fail(f"objective '{objective}' does not fit task '{task}'; leave it out "
                       f"or use '{task}'")
        return
    if objective not in REGRESSION_OBJECTIVES:
        raise fail(f"unknown objective '{objective}' for regression; choose one of: "
                   f"{', '.join(REGRESSION_OBJECTIVES)}")
    if metric == "poisson_deviance" and objective not in ("poisson", "tweedie"):
        raise fail(f"metric 'poisson_deviance' needs positive predictions, which objective "
                   f"'{objective}' cannot promise; use poisson or tweedie",
                   ("metric", "objective"))


def _check_folds(by_name: Mapping[str, Mapping[str, Any]], target: str, rows: int,
                 task: str | None, strategy: str | None, folds: int | None,
                 holdout_fraction: float, group_column: str | None,
                 time_column: str | None) -> str | None:
    """``plan_validation``'s refusals that the counts decide; returns the strategy."""
    classify = task in _CLASSIFY
    if strategy is None and task is None:
        return None
    strategy = strategy or ("stratified" if classify else "kfold")
    if strategy == "stratified" and task is not None and not classify:
        message = "stratified folds need a classification task; use kfold"
        raise ConfigError(message, [{"field": "cv.strategy", "message": message}])
    if strategy == "group" and group_column is None:
        raise DatasetError("the group strategy needs a group column", [
            _error("cv.group_column", "the group strategy needs a group column")])
    if strategy == "time" and time_column is None:
        raise DatasetError("the time strategy needs a time column", [
            _error("cv.time_column", "the time strategy needs a time column")])
    k = folds or AUTO_FOLDS
    n = rows - int(by_name[target]["missing"])
    held = round(n * holdout_fraction)
    if holdout_fraction == 0 or strategy == "kfold":
        train, exact = n - held, True
    else:  # per-class rounding (stratified) or whole groups may keep a few more rows
        train = n - held + (int(by_name[target]["distinct"]) if strategy == "stratified"
                            else held if strategy == "group" else 0)
        exact = False
    if train < k * 2:
        message = (f"{train} training rows are too few for {k} folds" if exact else
                   f"at most {train} training rows are too few for {k} folds")
        raise DatasetError(message, [_error("cv.folds", message)])
    if strategy == "group" and group_column is not None:
        groups = int(by_name[group_column]["distinct"])
        outside = groups - (1 if holdout_fraction > 0 else 0)
        if outside < k:
            message = (f"{outside} groups outside the hold-out are too few for {k} folds"
                       if holdout_fraction == 0 else
                       f"at most {outside} groups outside the hold-out are too few for "
                       f"{k} folds")
            raise DatasetError(message, [_error("cv.folds", message)])
    return strategy


def _check_constraints(by_name: Mapping[str, Mapping[str, Any]], kept_out: set[str],
                       features: Sequence[str] | None, kinds: Mapping[str, str],
                       monotone: Mapping[str, Any] | None,
                       interactions: Sequence[Sequence[str]] | None) -> None:
    """``tuner.controls.constraint_params``' refusals that need no feature list: names that
    are certainly not features of the job, and categorical columns made monotone."""
    def not_a_feature(name: str) -> bool:
        if name in by_name:
            return name in kept_out or (features is not None and name not in features)
        # A date column's calendar parts ("fired_on.weekday") are features too.
        return not any(name.startswith(f"{c}.") for c in by_name)

    def categorical(name: str) -> bool:
        kind = kinds.get(name) or by_name[name]["kind"]
        return kind == "categorical" or (kind == "text" and features is not None)

    errors: list[dict[str, str]] = []
    for name in monotone or {}:
        field = f"monotone.{name}"
        if not_a_feature(str(name)):
            errors.append(_error(field, f"'{name}' is not a feature of this job"))
        elif name in by_name and categorical(str(name)):
            errors.append(_error(field, f"'{name}' is categorical; its levels have no order"))
    for g, group in enumerate(interactions or ()):
        field = f"interaction_constraints[{g}]"
        if not group:
            errors.append(_error(field, "expected a non-empty list of columns"))
            continue
        unknown = [str(n) for n in group if not_a_feature(str(n))]
        if unknown:
            errors.append(_error(field, "not features of this job: "
                                        + ", ".join(map(repr, unknown))))
    if errors:
        raise ConfigError(summarise("invalid constraints", errors), errors)


def judge(columns: Sequence[Mapping[str, Any]], rows: int, *, target: str,
          task: str | None = None, features: Sequence[str] | None = None,
          exclude: Sequence[str] | None = None, weight_column: str | None = None,
          group_column: str | None = None, time_column: str | None = None,
          column_kinds: Mapping[str, str] | None = None,
          segments: Sequence[str] | None = None, strategy: str | None = None,
          folds: int | None = None, holdout_fraction: float = 0.2,
          metric: str | None = None, objective: str | None = None,
          monotone: Mapping[str, Any] | None = None,
          interaction_constraints: Sequence[Sequence[str]] | None = None) -> Judged:
    """Refuse what the profile shows ``prepare()``, ``plan_validation()`` or the metric
    and objective checks would refuse, with their fields and messages.

    Args:
        columns: The table's column profiles (dicts), in table order.
        rows: The table's row count.
        (the rest): As ``prepare()`` and ``plan_validation()`` take them.

    Raises:
        DatasetError, ConfigError: As those functions would, naming the field.
    """
    names = [str(c["name"]) for c in columns]
    by_name = {str(c["name"]): c for c in columns}
    if features is not None:
        features = list(dict.fromkeys(features))
    roles = {"weight_column": weight_column, "group_column": group_column,
             "time_column": time_column}
    check_names(names, target, features, exclude, roles)
    kinds = dict(column_kinds or {})
    _check_kinds(set(names), target, features, kinds)
    unknown = [s for s in segments or () if s not in by_name or s == target]
    if unknown:
        _raise([_error("segments", f"not columns of the table (or the target): "
                                   f"{', '.join(map(repr, unknown))}")])
    task = _check_target(by_name[target], target, rows, task)
    _check_side_columns(by_name, weight_column, group_column, time_column)
    taken = {target, *(n for n in roles.values() if n is not None)}
    left_out = {*(exclude or ()), *(n for n, k in kinds.items() if k == "ignore")}
    candidates = list(features) if features is not None else [n for n in names
                                                                if n not in taken]
    if not [c for c in candidates if c not in left_out]:
        _raise([_error("features", "no usable feature columns left")])
    _check_constraints(by_name, {*taken, *left_out}, features, kinds, monotone,
                       interaction_constraints)
    metric, direction = _metric(task, metric, objective)
    _check_objective(task, metric, objective)
    strategy = _check_folds(by_name, target, rows, task, strategy, folds, holdout_fraction,
                            group_column, time_column)
    if segments and holdout_fraction == 0:
        message = "metrics per segment are computed on the hold-out; set holdout_fraction > 0"
        raise ConfigError(message, [{"field": "segments", "message": message}])
    return Judged(task=task, metric=metric, direction=direction, strategy=strategy)

"""The practitioner's controls: fixed LightGBM parameters and feature constraints.

A job may fix LightGBM training parameters the search does not tune, and constrain how
features act (monotone directions, interaction groups). Everything here turns those
requests into LightGBM parameters shared by every trial and the final fit, and refuses
what would break the service's guarantees, each refusal naming its field.
"""

from __future__ import annotations

import functools
import math
from collections.abc import Collection, Mapping, Sequence
from typing import Any

from tuner.errors import ConfigError, summarise

#: Parameters a job may not fix, canonical LightGBM names -> why (README repeats these).
REFUSED: dict[str, str] = {
    "objective": "set by the job's task and objective",
    "metric": "set by the job's metric (early stopping and scores use it)",
    "num_class": "follows from the target's classes",
    "seed": "the job's seed sets every random stream",
    "data_random_seed": "the job's seed sets every random stream",
    "bagging_seed": "the job's seed sets every random stream",
    "feature_fraction_seed": "the job's seed sets every random stream",
    "extra_seed": "the job's seed sets every random stream",
    "objective_seed": "the job's seed sets every random stream",
    "drop_seed": "the job's seed sets every random stream",
    "deterministic": "needed for repeatable models",
    "force_col_wise": "needed for repeatable models",
    "force_row_wise": "needed for repeatable models",
    "num_threads": "threads are the worker's to share (job field num_threads)",
    "device_type": "workers train on the CPU; other devices are not reproducible",
    "gpu_platform_id": "workers train on the CPU",
    "gpu_device_id": "workers train on the CPU",
    "gpu_device_id_list": "workers train on the CPU",
    "gpu_use_dp": "workers train on the CPU",
    "num_gpu": "workers train on the CPU",
    "num_iterations": "use the job field max_rounds",
    "early_stopping_round": "use the job field early_stopping_rounds",
    "early_stopping_min_delta": "early stopping is the service's (early_stopping_rounds)",
    "first_metric_only": "early stopping is the service's (early_stopping_rounds)",
    "metric_freq": "evaluation is the service's",
    "is_provide_training_metric": "evaluation is the service's",
    "verbosity": "worker logs stay readable",
    "feature_pre_filter": "every trial must see the same features",
    "categorical_feature": "use the job field column_kinds",
    "monotone_constraints": "use the job field monotone (by column name)",
    "interaction_constraints": "use the job field interaction_constraints (by column name)",
    "weight_column": "use the job field weight_column",
    "group_column": "use cv.group_column",
    "label_column": "the job's target is the label",
    "ignore_column": "use the job fields exclude or column_kinds",
    "header": "the service reads the table itself",
    "task": "the service decides what LightGBM does",
    "config": "reads a file on the worker",
    "data": "reads a file on the worker",
    "valid": "reads a file on the worker",
    "input_model": "reads a file on the worker",
    "output_model": "writes a file on the worker",
    "output_result": "writes a file on the worker",
    "save_binary": "writes a file on the worker",
    "snapshot_freq": "writes files on the worker",
    "forcedsplits_filename": "reads a file on the worker",
    "forcedbins_filename": "reads a file on the worker",
    "parser_config_file": "reads a file on the worker",
    "machine_list_filename": "reads a file on the worker",
    "convert_model": "writes a file on the worker",
    "convert_model_language": "writes a file on the worker",
    "tree_learner": "distributed training is not how workers share a job",
    "num_machines": "distributed training is not how workers share a job",
    "machines": "distributed training is not how workers share a job",
    "local_listen_port": "distributed training is not how workers share a job",
    "time_out": "distributed training is not how workers share a job",
    "pre_partition": "distributed training is not how workers share a job",
    "saved_feature_importance_type": "importances are reported by the service",
}
# Prediction-time settings: they change nothing in training, and serving ignores them.
for _name in ("num_iteration_predict", "start_iteration_predict", "predict_raw_score",
              "predict_leaf_index", "predict_contrib", "predict_disable_shape_check",
              "pred_early_stop", "pred_early_stop_freq", "pred_early_stop_margin"):
    REFUSED[_name] = "a prediction setting; the service decides how models predict"


@functools.cache
def _aliases() -> dict[str, str]:
    """Every LightGBM parameter name and alias -> its canonical name.

    Read from LightGBM itself (its C library dumps the table), so a new LightGBM version
    brings its new parameters without a change here.
    """
    from lightgbm.basic import _ConfigAliases

    table: dict[str, str] = {}
    for canonical, names in _ConfigAliases._get_all_param_aliases().items():
        table[canonical] = canonical
        for name in names:
            table.setdefault(name, canonical)
    return table


def canonical_name(name: str) -> str | None:
    """LightGBM's canonical name for ``name`` (an alias or itself); ``None`` if unknown."""
    return _aliases().get(name)


def _value_problem(value: Any) -> str | None:
    if value is None or isinstance(value, dict):
        return "expected a number, a string, true/false or a list of numbers"
    if isinstance(value, float) and not math.isfinite(value):
        return "expected a finite number"
    if isinstance(value, list):
        if not value or not all(isinstance(v, (int, float)) and not isinstance(v, bool)
                                for v in value):
            return "a list must hold numbers"
    if isinstance(value, str) and (not value.strip() or len(value) > 200):
        return "expected a short non-empty string"
    return None


def check_fixed(fixed: Mapping[str, Any] | None) -> dict[str, Any]:
    """Validate the ``fixed`` job field; returns ``{canonical name: value}``.

    Names may be LightGBM aliases; two names for one parameter are refused. Values are
    checked for shape here and by LightGBM itself in :func:`try_params`.

    Raises:
        ConfigError: One entry per bad parameter, field ``fixed.<name>``.
    """
    out: dict[str, Any] = {}
    errors: list[dict[str, str]] = []
    spelled: dict[str, str] = {}
    for name, value in (fixed or {}).items():
        field = f"fixed.{name}"
        canonical = canonical_name(str(name))
        if canonical is None:
            errors.append({"field": field, "message": "not a LightGBM parameter"})
            continue
        if canonical in REFUSED:
            alias = "" if canonical == name else f" ('{name}' is LightGBM's '{canonical}')"
            errors.append({"field": field, "message": f"cannot be fixed{alias}: "
                                                     f"{REFUSED[canonical]}"})
            continue
        if canonical in spelled:
            errors.append({"field": field, "message": f"the same parameter as "
                                                     f"'{spelled[canonical]}'"})
            continue
        problem = _value_problem(value)
        if problem:
            errors.append({"field": field, "message": problem})
            continue
        spelled[canonical] = str(name)
        out[canonical] = value
    if errors:
        raise ConfigError(summarise("invalid fixed parameters", errors), errors)
    return out


def constraint_params(features: Sequence[str], monotone: Mapping[str, Any] | None,
                      interactions: Sequence[Sequence[str]] | None,
                      *, columns: Mapping[str, Sequence[str]] | None = None,
                      monotone_columns: Mapping[str, Sequence[str]] | None = None,
                      categorical: Collection[str] = ()) -> dict[str, Any]:
    """LightGBM's ``monotone_constraints`` / ``interaction_constraints`` in feature order.

    Args:
        features: The model's feature names, in model order.
        monotone: ``{column: 1 | -1}``; 1 means predictions never fall as the value rises.
        interactions: Groups of columns; a tree's splits all come from one group.
        columns: Table column -> the features derived from it (a date's calendar parts);
            a column named here stands for all of them. Features map to themselves.
        monotone_columns: Like ``columns``, for ``monotone`` (a date: its elapsed days).
        categorical: Categorical features, which have no order to be monotone in.

    Returns:
        The parameters to add (empty when nothing is constrained).

    Raises:
        ConfigError: Unknown columns or bad directions, fields ``monotone.<column>`` and
            ``interaction_constraints[i]``.
    """
    index = {name: i for i, name in enumerate(features)}
    derived = dict(columns or {})

    def positions(name: str, derived: Mapping[str, Sequence[str]] = derived
                  ) -> list[int] | None:
        if name in index:
            return [index[name]]
        if name in derived and all(f in index for f in derived[name]):
            return [index[f] for f in derived[name]]
        return None

    errors: list[dict[str, str]] = []
    params: dict[str, Any] = {}
    if monotone:
        directions = [0] * len(features)
        for name, direction in monotone.items():
            field = f"monotone.{name}"
            where = positions(str(name), dict(monotone_columns or {}))
            if where is None:
                errors.append({"field": field, "message": f"'{name}' is not a feature of "
                                                         "this job"})
            elif any(features[i] in categorical for i in where):
                errors.append({"field": field, "message": f"'{name}' is categorical; its "
                                                         "levels have no order"})
            elif isinstance(direction, bool) or direction not in (1, -1):
                errors.append({"field": field, "message": "expected 1 (increasing) or -1 "
                                                         "(decreasing)"})
            else:
                for i in where:
                    directions[i] = int(direction)
        params["monotone_constraints"] = directions
        # "advanced" keeps the constraint exact while splitting more freely than the
        # default "basic" (LightGBM's documentation on monotone_constraints_method).
        params["monotone_constraints_method"] = "advanced"
    if interactions:
        groups: list[list[int]] = []
        for g, group in enumerate(interactions):
            field = f"interaction_constraints[{g}]"
            if isinstance(group, str) or not isinstance(group, Sequence) or not group:
                errors.append({"field": field, "message": "expected a non-empty list of "
                                                         "columns"})
                continue
            unknown = [str(n) for n in group if positions(str(n)) is None]
            if unknown:
                errors.append({"field": field, "message": "not features of this job: "
                                                         + ", ".join(map(repr, unknown))})
                continue
            groups.append(sorted({i for n in group for i in positions(str(n)) or []}))
        params["interaction_constraints"] = groups
    if errors:
        raise ConfigError(summarise("invalid constraints", errors), errors)
    return params


def try_params(X: Any, y: Any, params: Mapping[str, Any], *, rows: int = 200) -> None:
    """Train one round on a few rows so LightGBM itself judges the fixed parameters.

    Raises:
        ConfigError: LightGBM refused a value (field ``fixed``), with its own message.
    """
    import lightgbm as lgb

    from tuner._lgb import make_dataset

    try:
        train_set = make_dataset(X.iloc[:rows], y[:rows], None, dict(params))
        lgb.train(dict(params), train_set, num_boost_round=1)
    except lgb.basic.LightGBMError as exc:
        message = str(exc).strip().splitlines()[-1] if str(exc).strip() else repr(exc)
        raise ConfigError(f"LightGBM refused the fixed parameters: {message}",
                          [{"field": "fixed", "message": f"LightGBM refused: {message}"}]) \
            from None


def split_fixed(fixed: Mapping[str, Any], space: Any,
                searched: Mapping[str, Any] | None = None) -> tuple[Any, dict[str, Any]]:
    """Put fixed parameters the search could tune into ``space`` as fixed values.

    Args:
        fixed: Checked fixed parameters (:func:`check_fixed`).
        space: The search space after the job's ``search_space`` overrides.
        searched: Those overrides; a parameter both fixed and given there is refused.

    Returns:
        The new space and the remaining (never tuned) parameters.

    Raises:
        ConfigError: Field ``fixed.<name>``, for clashes and values out of bounds.
    """
    from tuner.space import TUNABLE, merge_overrides

    tunable = {k: v for k, v in fixed.items() if k in TUNABLE}
    errors = [{"field": f"fixed.{k}", "message": "also set in search_space; fix it or "
                                                 "search it, not both"}
              for k in tunable if k in (searched or {})]
    if errors:
        raise ConfigError(summarise("invalid fixed parameters", errors), errors)
    try:
        space = merge_overrides(space, {k: {"value": v} for k, v in tunable.items()})
    except ValueError as exc:
        errs = [{**e, "field": f"fixed.{e['field']}"} for e in getattr(exc, "errors", [])]
        raise ConfigError(summarise("invalid fixed parameters", errs), errs) from None
    return space, {k: v for k, v in fixed.items() if k not in TUNABLE}

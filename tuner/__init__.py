"""Grovekeeper's tuning library: tables in, tuned LightGBM models out.

Pure library code: every setting arrives as an argument, storage is reached only through
an Optuna storage URL, and nothing here knows about the HTTP service.

Typical flow (the service's worker does this)::

    frame = tuner.read_table("kilns.csv", "csv")
    data = tuner.prepare(frame, target="cracked")
    plan = tuner.plan_validation(data, n_folds=5)
    config = tuner.SearchConfig(task=data.task, metric=tuner.default_metric(data.task))
    result = tuner.run_search(data, plan, config, storage_url="sqlite:///s.db",
                              study_name="job-1")
    fitted = tuner.fit_final(data, plan, config, result.best)
    digest = tuner.save_model(fitted, "models/job-1.txt")
"""

from __future__ import annotations

from tuner.artifacts import Predictor, load_booster, model_metadata, save_model
from tuner.config import FINAL_REFITS, PRUNERS, check_config, make_pruner
from tuner.data import (
    KINDS,
    MAX_CLASSES,
    TASKS,
    ColumnProfile,
    FeatureSchema,
    FeatureSpec,
    PreparedData,
    infer_task,
    prepare,
    profile_table,
    read_table,
)
from tuner.errors import (
    ArtifactError,
    ConfigError,
    DatasetError,
    PredictionInputError,
    SearchSpaceError,
    TunerError,
)
from tuner.losses import REGRESSION_OBJECTIVES
from tuner.metrics import (
    METRICS,
    Metric,
    MetricUndefinedError,
    default_metric,
    get_metric,
    score_all,
)
from tuner.model import FittedModel, fit_final, predict
from tuner.objective import CVObjective, base_params, refit_rounds
from tuner.search import (
    SearchConfig,
    SearchResult,
    TrialRecord,
    close_search,
    init_storage,
    load_study,
    load_trial_records,
    open_study,
    record_from_frozen,
    run_search,
)
from tuner.selection import SELECTION_RULES, select
from tuner.space import (
    DEFAULT_SPACE,
    LIGHTGBM_DEFAULTS,
    TUNABLE,
    Choice,
    Fixed,
    ParamRange,
    SearchSpace,
    effective_space,
    fit_into_space,
    initial_params,
    merge_overrides,
    suggest,
)
from tuner.validation import STRATEGIES, ValidationPlan, plan_validation

__all__ = [
    "ArtifactError", "CVObjective", "Choice", "ColumnProfile", "ConfigError", "DEFAULT_SPACE",
    "DatasetError", "FeatureSchema", "FeatureSpec", "FittedModel", "Fixed", "KINDS",
    "LIGHTGBM_DEFAULTS", "MAX_CLASSES", "METRICS", "Metric", "MetricUndefinedError",
    "ParamRange", "PredictionInputError", "Predictor", "PreparedData", "STRATEGIES",
    "SearchConfig", "SearchResult", "SearchSpace", "SearchSpaceError", "TASKS", "TUNABLE",
    "TrialRecord", "TunerError", "ValidationPlan", "base_params", "close_search", "default_metric",
    "effective_space", "fit_final", "get_metric", "infer_task", "init_storage",
    "initial_params", "load_booster", "load_study", "load_trial_records", "merge_overrides",
    "model_metadata", "open_study", "plan_validation", "predict", "prepare", "profile_table",
    "read_table", "record_from_frozen", "refit_rounds", "run_search", "save_model",
    "score_all", "suggest",
    "FINAL_REFITS", "PRUNERS", "REGRESSION_OBJECTIVES", "SELECTION_RULES", "check_config",
    "fit_into_space", "make_pruner", "select",
]

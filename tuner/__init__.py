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

import importlib
from typing import TYPE_CHECKING, Any

# PEP 562: each name is imported from its module on first use, so importing one part of
# the tuner (say, the schema for serving) does not load Optuna, scikit-learn or matplotlib.
_EXPORTS: dict[str, tuple[str, str]] = {
    "ArtifactError": ("tuner.errors", "ArtifactError"),
    "CVObjective": ("tuner.objective", "CVObjective"),
    "Choice": ("tuner.space", "Choice"),
    "ColumnProfile": ("tuner.profile", "ColumnProfile"),
    "ConfigError": ("tuner.errors", "ConfigError"),
    "DEFAULT_SPACE": ("tuner.space", "DEFAULT_SPACE"),
    "DatasetError": ("tuner.errors", "DatasetError"),
    "FINAL_REFITS": ("vocabulary", "FINAL_REFITS"),
    "FeatureSchema": ("tuner.schema", "FeatureSchema"),
    "FeatureSpec": ("tuner.schema", "FeatureSpec"),
    "FittedModel": ("tuner.model", "FittedModel"),
    "JournalFenced": ("tuner.journal", "JournalFenced"),
    "Fixed": ("tuner.space", "Fixed"),
    "KINDS": ("vocabulary", "COLUMN_KINDS"),
    "LIGHTGBM_DEFAULTS": ("tuner.space", "LIGHTGBM_DEFAULTS"),
    "MAX_CLASSES": ("tuner.dataset", "MAX_CLASSES"),
    "METRICS": ("tuner.metrics", "METRICS"),
    "Metric": ("tuner.metrics", "Metric"),
    "MetricUndefinedError": ("tuner.metrics", "MetricUndefinedError"),
    "PRUNERS": ("vocabulary", "PRUNERS"),
    "ParamRange": ("tuner.space", "ParamRange"),
    "PredictionInputError": ("tuner.errors", "PredictionInputError"),
    "Predictor": ("tuner.artifacts", "Predictor"),
    "PreparedData": ("tuner.dataset", "PreparedData"),
    "REDUCTION": ("tuner.fidelity", "REDUCTION"),
    "REGRESSION_OBJECTIVES": ("vocabulary", "REGRESSION_OBJECTIVES"),
    "SELECTION_RULES": ("vocabulary", "SELECTION_RULES"),
    "STRATEGIES": ("vocabulary", "CV_STRATEGIES"),
    "SearchConfig": ("tuner.config", "SearchConfig"),
    "SearchResult": ("tuner.trials", "SearchResult"),
    "SearchSpace": ("tuner.space", "SearchSpace"),
    "SearchSpaceError": ("tuner.errors", "SearchSpaceError"),
    "TASKS": ("vocabulary", "TASKS"),
    "TUNABLE": ("tuner.space", "TUNABLE"),
    "TrialRecord": ("tuner.trials", "TrialRecord"),
    "TunerError": ("tuner.errors", "TunerError"),
    "ValidationPlan": ("tuner.validation", "ValidationPlan"),
    "base_params": ("tuner._lgb", "base_params"),
    "check_config": ("tuner.config", "check_config"),
    "close_search": ("tuner.study", "close_search"),
    "default_metric": ("tuner.metrics", "default_metric"),
    "effective_space": ("tuner.space", "effective_space"),
    "fit_final": ("tuner.model", "fit_final"),
    "fidelity_rungs": ("tuner.fidelity", "fidelity_rungs"),
    "fit_into_space": ("tuner.space", "fit_into_space"),
    "get_metric": ("tuner.metrics", "get_metric"),
    "infer_task": ("tuner.dataset", "infer_task"),
    "init_storage": ("tuner.study", "init_storage"),
    "initial_params": ("tuner.space", "initial_params"),
    "load_booster": ("tuner.artifacts", "load_booster"),
    "load_study": ("tuner.study", "load_study"),
    "load_trial_records": ("tuner.study", "load_trial_records"),
    "portfolio_params": ("tuner.portfolio", "portfolio_params"),
    "gain_over_defaults": ("tuner.evaluation.gain", "gain_over_defaults"),
    "make_pruner": ("tuner.config", "make_pruner"),
    "merge_overrides": ("tuner.space", "merge_overrides"),
    "model_metadata": ("tuner.artifacts", "model_metadata"),
    "open_study": ("tuner.study", "open_study"),
    "plan_validation": ("tuner.validation", "plan_validation"),
    "predict": ("tuner.model", "predict"),
    "prepare": ("tuner.dataset", "prepare"),
    "profile_table": ("tuner.profile", "profile_table"),
    "read_table": ("tuner.io.read", "read_table"),
    "record_from_frozen": ("tuner.trials", "record_from_frozen"),
    "refit_rounds": ("tuner.objective", "refit_rounds"),
    "run_search": ("tuner.search", "run_search"),
    "save_model": ("tuner.artifacts", "save_model"),
    "score_all": ("tuner.metrics", "score_all"),
    "select": ("tuner.selection", "select"),
    "suggest": ("tuner.space", "suggest"),
}

__all__ = sorted(_EXPORTS)

if TYPE_CHECKING:  # the same names, for type checkers
    from tuner._lgb import base_params
    from tuner.artifacts import Predictor, load_booster, model_metadata, save_model
    from tuner.config import SearchConfig, check_config, make_pruner
    from tuner.dataset import MAX_CLASSES, PreparedData, infer_task, prepare
    from tuner.errors import (
        ArtifactError,
        ConfigError,
        DatasetError,
        PredictionInputError,
        SearchSpaceError,
        TunerError,
    )
    from tuner.evaluation.gain import gain_over_defaults
    from tuner.fidelity import REDUCTION, fidelity_rungs
    from tuner.io.read import read_table
    from tuner.journal import JournalFenced
    from tuner.metrics import (
        METRICS,
        Metric,
        MetricUndefinedError,
        default_metric,
        get_metric,
        score_all,
    )
    from tuner.model import FittedModel, fit_final, predict
    from tuner.objective import CVObjective, refit_rounds
    from tuner.portfolio import portfolio_params
    from tuner.profile import ColumnProfile, profile_table
    from tuner.schema import FeatureSchema, FeatureSpec
    from tuner.search import run_search
    from tuner.selection import select
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
    from tuner.study import close_search, init_storage, load_study, load_trial_records, open_study
    from tuner.trials import SearchResult, TrialRecord, record_from_frozen
    from tuner.validation import ValidationPlan, plan_validation
    from vocabulary import COLUMN_KINDS as KINDS
    from vocabulary import CV_STRATEGIES as STRATEGIES
    from vocabulary import FINAL_REFITS, PRUNERS, REGRESSION_OBJECTIVES, SELECTION_RULES, TASKS


def __getattr__(name: str) -> Any:
    try:
        module, attr = _EXPORTS[name]
    except KeyError:
        raise AttributeError(f"module 'tuner' has no attribute {name!r}") from None
    value = getattr(importlib.import_module(module), attr)
    globals()[name] = value
    return value


def __dir__() -> list[str]:
    return sorted([*globals(), *_EXPORTS])

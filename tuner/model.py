"""Fitting the final model with the best trial's configuration."""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import lightgbm as lgb

from tuner._lgb import base_params, make_dataset, predict
from tuner.config import SearchConfig
from tuner.dataset import PreparedData
from tuner.errors import TunerError
from tuner.metrics import score_all
from tuner.schema import FeatureSchema
from tuner.trials import TrialRecord
from tuner.validation import ValidationPlan

__all__ = ["FittedModel", "fit_final", "predict"]


@dataclass
class FittedModel:
    """The final booster and everything needed to describe and serve it.

    Attributes:
        params: The complete LightGBM parameters used (shared and tuned).
        classes: Original class labels, index = encoded class (``None`` for regression).
        cv: ``{"metric", "mean", "std", "se", "fold_scores"}`` of the chosen trial.
        holdout: ``score_all`` on the hold-out rows plus ``"rows"``; ``{}`` without one.
        feature_importance: ``[{"feature", "gain", "split"}]``, sorted by gain, descending.
    """

    booster: lgb.Booster
    task: str
    metric: str
    params: dict[str, Any]
    boosting_rounds: int
    classes: list[Any] | None
    schema: FeatureSchema
    cv: dict[str, Any]
    holdout: dict[str, Any]
    feature_importance: list[dict[str, Any]]
    train_seconds: float = 0.0
    #: ``{"rows": "train" | "all", "fit_rows": n, ...}``: which rows the served booster
    #: was fit on. With ``"all"`` the hold-out scores belong to an earlier booster fit on
    #: the search rows only, and the served model differs from the scored one.
    refit: dict[str, Any] | None = None


def _importance(booster: lgb.Booster, names: list[str]) -> list[dict[str, Any]]:
    # Importances come back as numpy scalars, in feature order; cast for JSON.
    gain = booster.feature_importance("gain")
    split = booster.feature_importance("split")
    rows = [{"feature": n, "gain": float(g), "split": int(s)}
            for n, g, s in zip(names, gain, split, strict=True)]
    return sorted(rows, key=lambda r: (-r["gain"], -r["split"], r["feature"]))


def fit_final(data: PreparedData, plan: ValidationPlan, config: SearchConfig,
              best: TrialRecord) -> FittedModel:
    """Train on every train-part row with the best trial's parameters, then score the hold-out.

    No early stopping: the round count is the trial's ``boosting_rounds``, derived from
    its folds. The hold-out is predicted once.

    Args:
        data: Prepared data (the same as the search used).
        plan: The search's validation plan.
        config: The search config (task, metric, seed, threads).
        best: A complete trial, e.g. ``run_search(...).best``.

    Returns:
        The fitted model with CV and hold-out scores.

    Raises:
        TunerError: ``best`` is not a complete trial.
    """
    if best.state != "complete" or best.boosting_rounds is None:
        raise TunerError(f"trial {best.number} is {best.state}; only a complete trial "
                         "can be refit")
    params = {
        **base_params(data.task, num_class=len(data.classes or ()), metric=config.metric,
                      seed=config.seed, num_threads=config.num_threads,
                      objective=config.objective),
        **best.params,
    }
    train = plan.train_idx
    weight = None if data.weight is None else data.weight[train]
    dataset = make_dataset(data.X.iloc[train], data.y[train], weight, params)
    started = time.perf_counter()
    booster = lgb.train(params, dataset, num_boost_round=best.boosting_rounds)
    seconds = time.perf_counter() - started

    holdout: dict[str, Any] = {}
    rows = plan.holdout_idx
    if len(rows):
        pred = predict(booster, data.task, data.X.iloc[rows])
        w = None if data.weight is None else data.weight[rows]
        holdout = {**score_all(data.task, data.y[rows], pred, w), "rows": int(len(rows))}
    refit: dict[str, Any] = {"rows": "train", "fit_rows": int(len(train)),
                             "served_is_scored": True}
    if config.final_refit == "all" and len(rows):
        # Scored first, refit after: the hold-out estimate stays honest, and the served
        # model learns from every row. Same round count: the extra rows are few (common
        # practice; the hold-out is at most half the table).
        everything = make_dataset(data.X, data.y, data.weight, params)
        started = time.perf_counter()
        booster = lgb.train(params, everything, num_boost_round=best.boosting_rounds)
        seconds += time.perf_counter() - started
        refit = {"rows": "all", "fit_rows": int(data.n_rows), "served_is_scored": False,
                 "note": "hold-out scores are of a model fit on the search rows only; the "
                         "served model was refit afterwards on every row, hold-out included"}
    return FittedModel(
        booster=booster, task=data.task, metric=config.metric, params=params,
        boosting_rounds=best.boosting_rounds, classes=data.classes, schema=data.schema,
        cv={"metric": config.metric, "mean": best.score, "std": best.score_std,
            "se": best.score_se, "fold_scores": list(best.fold_scores)},
        holdout=holdout, feature_importance=_importance(booster, data.schema.names),
        train_seconds=seconds, refit=refit,
    )


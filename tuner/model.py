"""Fitting the final model with the best trial's configuration."""

from __future__ import annotations

import time
from dataclasses import dataclass
from typing import Any

import lightgbm as lgb
import numpy as np

from tuner import calibration as cal
from tuner._lgb import base_params, feature_matrix, frame_matrix, make_dataset, predict
from tuner.config import SearchConfig
from tuner.dataset import PreparedData
from tuner.errors import TunerError
from tuner.metrics import get_metric, score_all
from tuner.schema import FeatureSchema
from tuner.trials import TrialRecord
from tuner.validation import ValidationPlan

__all__ = ["FittedModel", "fit_final", "out_of_fold_raw", "predict"]

#: Largest difference between LightGBM's own prediction from the calibrated model text and
#: the map applied to the uncalibrated raw scores that still counts as "the same model".
IDENTITY_TOLERANCE = 1e-9


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
    #: What :mod:`tuner.calibration` did: ``applied`` (bool) says whether the served
    #: probabilities are calibrated; ``method``, ``map``, out-of-fold and hold-out log
    #: loss and expected calibration error ``before``/``after``, or ``reason`` when not.
    calibration: dict[str, Any] | None = None
    #: The scored model's hold-out predictions (before any refit on all rows), in the
    #: convention of :mod:`tuner.metrics`; ``None`` without a hold-out. Not saved.
    holdout_pred: np.ndarray | None = None


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
                      objective=config.objective, fixed=config.fixed_params),
        **best.params,
    }
    train = plan.train_idx
    weight = None if data.weight is None else data.weight[train]
    dataset = make_dataset(data.X, data.y[train], weight, params, rows=train)
    started = time.perf_counter()
    booster = lgb.train(params, dataset, num_boost_round=best.boosting_rounds)
    seconds = time.perf_counter() - started

    del dataset  # binned rows of the refit, no longer needed
    cmap, calibration = _choose_calibration(data, plan, config, params, best, booster)
    rows = plan.holdout_idx
    check_rows = rows if len(rows) else plan.train_idx[:1000]
    # The hold-out rows as floats, built once for every prediction below (category codes
    # by the table's levels, which are the model's).
    held = feature_matrix(data.X, rows, order="C")
    check = held if len(rows) else feature_matrix(data.X, check_rows, order="C")
    held_raw = (_raw(booster, data.task, held)
                if len(rows) and "oof_log_loss" in calibration else None)
    if cmap is not None:
        booster, problem = _write_calibration(booster, cmap, check)
        if problem:
            cmap = None
            calibration = {**calibration, "applied": False, "method": None, "reason": problem}
    holdout: dict[str, Any] = {}
    pred = None
    if len(rows):
        pred = predict(booster, data.task, held)
        w = None if data.weight is None else data.weight[rows]
        holdout = {**score_all(data.task, data.y[rows], pred, w), "rows": int(len(rows))}
        if held_raw is not None:
            calibration["holdout"] = _before_after(held_raw, cmap, calibration["sigmoid"],
                                                   data.y[rows], w)
    refit: dict[str, Any] = {"rows": "train", "fit_rows": int(len(train)),
                             "served_is_scored": True}
    if config.final_refit == "all" and len(rows):
        # Scored first, refit after: the hold-out estimate stays honest, and the served
        # model learns from every row. Same round count: the extra rows are few (common
        # practice; the hold-out is at most half the table). The calibration map chosen
        # on the search rows' out-of-fold scores goes into the refit model too.
        everything = make_dataset(data.X, data.y, data.weight, params)
        started = time.perf_counter()
        booster = lgb.train(params, everything, num_boost_round=best.boosting_rounds)
        seconds += time.perf_counter() - started
        del everything
        if cmap is not None:
            booster, problem = _write_calibration(booster, cmap, check)
            if problem:
                raise TunerError(f"calibrating the model refit on all rows: {problem}")
        refit = {"rows": "all", "fit_rows": int(data.n_rows), "served_is_scored": False,
                 "note": "hold-out scores are of a model fit on the search rows only; the "
                         "served model was refit afterwards on every row, hold-out included"}
    return FittedModel(
        booster=booster, task=data.task, metric=config.metric, params=params,
        boosting_rounds=best.boosting_rounds, classes=data.classes, schema=data.schema,
        cv={"metric": config.metric, "mean": best.score, "std": best.score_std,
            "se": best.score_se, "fold_scores": list(best.fold_scores)},
        holdout=holdout, feature_importance=_importance(booster, data.schema.names),
        train_seconds=seconds, refit=refit, calibration=calibration, holdout_pred=pred,
    )


def out_of_fold_raw(data: PreparedData, plan: ValidationPlan, config: SearchConfig,
                    params: dict[str, Any], best: TrialRecord
                    ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """The trial's out-of-fold raw scores, its folds refit one by one.

    Each fold model is trained for the round count the trial's own fold settled on (LightGBM
    is deterministic here, so these are the trial's fold models); a trial without one
    count per fold is refit with early stopping as the search does.

    Returns:
        ``(raw, positions, fold_of)``: raw scores (``(n,)`` or ``(n, K)``), the rows'
        positions in ``data``, and the fold that scored each row. Rows no fold validates
        (the first block of time folds) are left out.
    """
    train = plan.train_idx
    counts = list(best.best_iterations)
    # Large tables score only their first folds (validation_splits): refit those.
    used = plan.folds[:len(counts)] if 0 < len(counts) <= plan.n_folds else plan.folds
    exact = len(counts) == len(used)
    raws, positions, folds = [], [], []
    for k, (fit, valid) in enumerate(used):
        fit_rows, valid_rows = train[fit], train[valid]
        w_fit = None if data.weight is None else data.weight[fit_rows]
        dataset = make_dataset(data.X, data.y[fit_rows], w_fit, params,
                               rows=fit_rows).construct()
        matrix = feature_matrix(data.X, valid_rows, order="C")
        if exact:
            booster = lgb.train(params, dataset, num_boost_round=max(1, int(counts[k])))
        else:
            w_val = None if data.weight is None else data.weight[valid_rows]
            valid_set = make_dataset(data.X, data.y[valid_rows], w_val, params,
                                     reference=dataset, matrix=matrix)
            metric = get_metric(config.metric, data.task).lgb_metric_for(data.task)
            booster = lgb.train(
                {**params, "metric": metric}, dataset, num_boost_round=config.max_rounds,
                valid_sets=[valid_set], valid_names=["valid"],
                callbacks=[lgb.early_stopping(config.early_stopping_rounds,
                                              first_metric_only=True, verbose=False)])
        del dataset
        raw = np.asarray(booster.predict(matrix, raw_score=True,
                                         num_iteration=booster.best_iteration or None),
                         dtype="float64")
        raws.append(raw.reshape(len(valid_rows), -1) if data.task == "multiclass" else raw)
        positions.append(valid_rows)
        folds.append(np.full(len(valid_rows), k))
    fold_of = np.concatenate(folds)
    if len(used) == 1:
        # One validation split: cross-fit the map over interleaved fifths of its rows.
        fold_of = np.arange(len(fold_of)) % 5
    return np.concatenate(raws), np.concatenate(positions), fold_of


def _raw(booster: lgb.Booster, task: str, frame: Any) -> np.ndarray:
    matrix = frame if isinstance(frame, np.ndarray) else frame_matrix(booster, frame)
    out = np.asarray(booster.predict(matrix, raw_score=True), dtype="float64")
    return out.reshape(len(frame), -1) if task == "multiclass" else out


def _choose_calibration(data: PreparedData, plan: ValidationPlan, config: SearchConfig,
                        params: dict[str, Any], best: TrialRecord, booster: lgb.Booster
                        ) -> tuple[cal.CalibrationMap | None, dict[str, Any]]:
    """The map to write into ``booster`` (or ``None``) and the report about it."""
    if data.task == "regression":
        return None, {"applied": False, "method": None,
                      "reason": "regression: no probabilities to calibrate"}
    if not config.calibrate:
        return None, {"applied": False, "method": None, "reason": "switched off (calibrate)"}
    text = booster.model_to_string()
    problem = cal.supported(text)
    if problem:
        return None, {"applied": False, "method": None, "reason": problem}
    sigmoid = cal.model_sigmoid(text)
    raw, positions, fold_of = out_of_fold_raw(data, plan, config, params, best)
    y = data.y[positions]
    w = None if data.weight is None else data.weight[positions]
    cmap, report = cal.calibrate_scores(data.task, raw, y, fold_of, w, sigmoid)
    out: dict[str, Any] = {
        "applied": cmap is not None, "method": None if cmap is None else cmap.kind,
        "map": None if cmap is None else {**cmap.to_dict(), "units": "raw score"},
        "sigmoid": sigmoid, **report,
        "reason": None if cmap is not None else
        "no map lowered the cross-fitted out-of-fold log loss",
    }
    return cmap, out


def _before_after(raw: np.ndarray, cmap: cal.CalibrationMap | None, sigmoid: float,
                  y: np.ndarray, w: np.ndarray | None) -> dict[str, Any]:
    """Hold-out log loss and calibration error without and with the map."""
    after = raw if cmap is None else cal.apply_map(raw, cmap)
    return {
        "rows": int(len(y)),
        "log_loss": {"before": cal.log_loss_of(raw, y, w, sigmoid),
                     "after": cal.log_loss_of(after, y, w, sigmoid)},
        "ece": {"before": cal.expected_calibration_error(cal.probabilities(raw, sigmoid), y, w),
                "after": cal.expected_calibration_error(cal.probabilities(after, sigmoid), y,
                                                        w)},
    }


def _write_calibration(booster: lgb.Booster, cmap: cal.CalibrationMap,
                       check: Any) -> tuple[lgb.Booster, str | None]:
    """``booster`` with ``cmap`` in its trees, checked on the rows ``check``.

    LightGBM's own prediction from the new text must equal the map applied to the old
    raw scores within :data:`IDENTITY_TOLERANCE`; otherwise the old booster comes back
    with the reason.
    """
    text = booster.model_to_string()
    sigmoid = cal.model_sigmoid(text)
    task = "multiclass" if len(cmap.scale) > 1 else "binary"
    expected = cal.probabilities(cal.apply_map(_raw(booster, task, check), cmap), sigmoid)
    calibrated = lgb.Booster(model_str=cal.write_into_model(text, cmap))
    got = predict(calibrated, task, check)
    gap = float(np.max(np.abs(got - expected))) if len(check) else 0.0
    if not gap <= IDENTITY_TOLERANCE:
        return booster, (f"the calibrated model text predicted {gap:.3g} away from the map; "
                         "served uncalibrated")
    return calibrated, None


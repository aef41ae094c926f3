"""Evaluation metrics per task, with sample weights.

Prediction convention (``pred``): binary -> probability of class 1 (shape ``(n,)``);
multiclass -> class probabilities (shape ``(n, K)``); regression -> predicted values.
Class labels in ``y_true`` are the encoded codes ``0..K-1``. The formulas follow the
usual definitions (the same ones scikit-learn documents), written with numpy so that a
fold is scored without scikit-learn's input validation overhead.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np

from tuner.errors import ConfigError, DatasetError
from vocabulary import DEFAULT_METRICS

_EPS = float(np.finfo(np.float64).eps)
CLASSIFICATION = frozenset({"binary", "multiclass"})
REGRESSION = frozenset({"regression"})


class MetricUndefinedError(DatasetError):
    """The metric has no value on these rows (e.g. AUC with a single class present)."""


MetricFn = Callable[[np.ndarray, np.ndarray, np.ndarray | None], float]


@dataclass(frozen=True)
class Metric:
    """A scoring rule and the LightGBM metric used for early stopping inside folds."""

    name: str
    direction: str
    tasks: frozenset[str]
    needs_proba: bool
    lgb_metric: str | dict[str, str]
    fn: MetricFn

    def lgb_metric_for(self, task: str) -> str:
        """The LightGBM metric name used for early stopping on ``task``."""
        return self.lgb_metric[task] if isinstance(self.lgb_metric, dict) else self.lgb_metric

    def __call__(self, y_true: Any, pred: Any, weight: Any = None) -> float:
        """Score predictions (see the module docstring for the convention)."""
        return self.fn(np.asarray(y_true), np.asarray(pred, dtype="float64"),
                       None if weight is None else np.asarray(weight, dtype="float64"))


def _weights(n: int, weight: np.ndarray | None) -> np.ndarray:
    return np.ones(n) if weight is None else np.asarray(weight, dtype="float64")


def _labels(task_pred: np.ndarray) -> np.ndarray:
    if task_pred.ndim == 1:
        # Class 1 only when strictly more likely, as an argmax over (1 - p, p) would pick.
        return (task_pred > 0.5).astype("int64")
    return np.asarray(np.argmax(task_pred, axis=1))


def _binary_auc(positive: np.ndarray, score: np.ndarray, w: np.ndarray) -> float:
    # Area under the weighted ROC curve; tied scores form one diagonal step (trapezoid).
    order = np.argsort(score, kind="mergesort")[::-1]
    s, pos, ww = score[order], positive[order].astype("float64"), w[order]
    last = np.r_[np.flatnonzero(np.diff(s)), len(s) - 1]
    tps = np.cumsum(pos * ww)[last]
    fps = np.cumsum((1.0 - pos) * ww)[last]
    if tps[-1] <= 0 or fps[-1] <= 0:
        raise MetricUndefinedError("roc_auc needs both classes present",
                                   [{"field": "metric", "message": "only one class present"}])
    return float(np.trapezoid(np.r_[0.0, tps] / tps[-1], np.r_[0.0, fps] / fps[-1]))


def roc_auc(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """ROC AUC; multiclass is the unweighted mean of one-vs-rest AUCs (macro)."""
    w = _weights(len(y_true), weight)
    if pred.ndim == 1:
        return _binary_auc(y_true == 1, pred, w)
    return float(np.mean([_binary_auc(y_true == k, pred[:, k], w)
                          for k in range(pred.shape[1])]))


def _binary_average_precision(positive: np.ndarray, score: np.ndarray, w: np.ndarray) -> float:
    # Step-wise area under the precision-recall curve: sum over distinct thresholds of
    # (recall gain) x precision, tied scores taken together, no interpolation.
    order = np.argsort(score, kind="mergesort")[::-1]
    s, pos, ww = score[order], positive[order].astype("float64"), w[order]
    last = np.r_[np.flatnonzero(np.diff(s)), len(s) - 1]
    tps = np.cumsum(pos * ww)[last]
    fps = np.cumsum((1.0 - pos) * ww)[last]
    if tps[-1] <= 0:
        raise MetricUndefinedError("average_precision needs positive rows",
                                   [{"field": "metric", "message": "no positive rows"}])
    precision = tps / (tps + fps)
    recall = tps / tps[-1]
    return float(np.sum(np.diff(np.r_[0.0, recall]) * precision))


def average_precision(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """Average precision (area under the precision-recall curve, step-wise); for rare
    classes. Multiclass is the unweighted mean over classes, one-vs-rest (macro)."""
    w = _weights(len(y_true), weight)
    if pred.ndim == 1:
        return _binary_average_precision(y_true == 1, pred, w)
    return float(np.mean([_binary_average_precision(y_true == k, pred[:, k], w)
                          for k in range(pred.shape[1])]))


def log_loss(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """Mean negative log-likelihood, probabilities clipped to ``[eps, 1 - eps]``."""
    p = np.clip(pred, _EPS, 1 - _EPS)
    y = y_true.astype("int64")
    if p.ndim == 1:
        losses = -np.where(y == 1, np.log(p), np.log(np.clip(1 - pred, _EPS, 1 - _EPS)))
    else:
        losses = -np.log(p[np.arange(len(y)), y])
    return float(np.average(losses, weights=_weights(len(y), weight)))


def accuracy(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """Weighted share of rows whose most likely class is the true class."""
    hits = (_labels(pred) == y_true.astype("int64")).astype("float64")
    return float(np.average(hits, weights=_weights(len(hits), weight)))


def f1_macro(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """Unweighted mean F1 over the classes present in the truth or the predictions."""
    y, guess = y_true.astype("int64"), _labels(pred)
    w = _weights(len(y), weight)
    scores = []
    for k in np.union1d(y, guess):
        tp = w[(y == k) & (guess == k)].sum()
        fp = w[(y != k) & (guess == k)].sum()
        fn = w[(y == k) & (guess != k)].sum()
        denom = 2 * tp + fp + fn
        scores.append(2 * tp / denom if denom > 0 else 0.0)
    return float(np.mean(scores))


def rmse(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """Root of the weighted mean squared error."""
    return float(np.sqrt(np.average((y_true - pred) ** 2, weights=_weights(len(pred), weight))))


def mae(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """Weighted mean absolute error."""
    return float(np.average(np.abs(y_true - pred), weights=_weights(len(pred), weight)))


def r2(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """Coefficient of determination; a constant truth scores 1.0 if matched exactly, else 0."""
    w = _weights(len(pred), weight)
    residual = np.sum(w * (y_true - pred) ** 2)
    total = np.sum(w * (y_true - np.average(y_true, weights=w)) ** 2)
    if total == 0:
        return 1.0 if residual == 0 else 0.0
    return float(1.0 - residual / total)


def poisson_deviance(y_true: np.ndarray, pred: np.ndarray, weight: np.ndarray | None) -> float:
    """Mean Poisson deviance; needs a non-negative truth and positive predictions."""
    if (y_true < 0).any() or (pred <= 0).any():
        raise MetricUndefinedError(
            "poisson_deviance needs non-negative targets and positive predictions",
            [{"field": "metric", "message": "negative target or non-positive prediction"}],
        )
    term = np.where(y_true > 0, y_true * np.log(np.where(y_true > 0, y_true, 1.0) / pred), 0.0)
    return float(np.average(2 * (term - y_true + pred), weights=_weights(len(pred), weight)))


_LOGLOSS = {"binary": "binary_logloss", "multiclass": "multi_logloss"}

METRICS: dict[str, Metric] = {
    m.name: m
    for m in (
        Metric("roc_auc", "maximize", CLASSIFICATION, True,
               {"binary": "auc", "multiclass": "multi_logloss"}, roc_auc),
        Metric("log_loss", "minimize", CLASSIFICATION, True, _LOGLOSS, log_loss),
        Metric("average_precision", "maximize", CLASSIFICATION, True,
               {"binary": "average_precision", "multiclass": "multi_logloss"},
               average_precision),
        Metric("accuracy", "maximize", CLASSIFICATION, False,
               {"binary": "binary_error", "multiclass": "multi_error"}, accuracy),
        Metric("f1_macro", "maximize", CLASSIFICATION, False, _LOGLOSS, f1_macro),
        Metric("rmse", "minimize", REGRESSION, False, "rmse", rmse),
        Metric("mae", "minimize", REGRESSION, False, "l1", mae),
        Metric("r2", "maximize", REGRESSION, False, "l2", r2),
        Metric("poisson_deviance", "minimize", REGRESSION, False, "poisson", poisson_deviance),
    )
}

_DEFAULTS = DEFAULT_METRICS


def get_metric(name: str, task: str) -> Metric:
    """Look up a metric usable for ``task``.

    Raises:
        ConfigError: Unknown metric, or one that does not apply to the task
            (``errors`` field ``"metric"``).
    """
    metric = METRICS.get(name)
    if metric is None or task not in metric.tasks:
        usable = ", ".join(n for n, m in METRICS.items() if task in m.tasks)
        reason = "unknown metric" if metric is None else f"metric not available for {task}"
        message = f"{reason} '{name}' (task '{task}'); choose one of: {usable}"
        raise ConfigError(message, [{"field": "metric", "message": message}])
    return metric


def default_metric(task: str) -> str:
    """Name of the default metric: roc_auc (binary), log_loss (multiclass), rmse (regression)."""
    if task not in _DEFAULTS:
        message = f"unknown task '{task}'"
        raise ConfigError(message, [{"field": "task", "message": message}])
    return _DEFAULTS[task]


def score_all(task: str, y: Any, pred: Any, weight: Any = None) -> dict[str, float]:
    """Every metric applicable to ``task`` that is defined on these rows.

    Metrics without a value here (AUC with a single class, Poisson deviance with negative
    targets or non-positive predictions) are left out rather than reported as NaN.
    """
    scores = {}
    for name, metric in METRICS.items():
        if task not in metric.tasks:
            continue
        try:
            scores[name] = metric(y, pred, weight)
        except MetricUndefinedError:
            continue
    return scores

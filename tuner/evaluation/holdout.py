"""How far to trust the winner: intervals, optimism, calibration, and the diagnostics.

:func:`evaluate_model` runs after :func:`tuner.fit_final` and returns one JSON-ready dict
the service keeps with the model. Everything here is seeded and deterministic.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np

from tuner._lgb import predict
from tuner.config import SearchConfig
from tuner.dataset import PreparedData
from tuner.evaluation.diagnostics import (
    hyperparameter_importance,
    leaf_sizes,
    learning_curve,
)
from tuner.metrics import get_metric, score_all
from tuner.model import FittedModel
from tuner.validation import ValidationPlan

__all__ = [
    "bootstrap_intervals", "calibration", "evaluate_model", "optimism",
]

#: Resamples for the percentile bootstrap; Efron & Tibshirani (1993, ch. 13) suggest at
#: least about 1000 for percentile intervals (a few hundred suffice for standard errors).
N_BOOTSTRAP = 1000
LEVEL = 0.95
#: Twice the combined spread: a gap this large arises by chance about 5% of the time when
#: both estimates are roughly normal and measure the same thing.
OPTIMISM_Z = 2.0


def bootstrap_intervals(task: str, y: np.ndarray, pred: np.ndarray,
                        weight: np.ndarray | None = None, *, n_resamples: int = N_BOOTSTRAP,
                        level: float = LEVEL, seed: int = 0) -> dict[str, dict[str, Any]]:
    """Percentile-bootstrap confidence intervals for every metric of ``score_all``.

    Rows are resampled with replacement ``n_resamples`` times and every metric is
    recomputed (binary tasks: from the draw counts per row over rows sorted once, so 1,000
    resamples of 200,000 rows take seconds); the interval is the ``(1 - level) / 2`` and
    ``(1 + level) / 2`` percentiles of the resampled scores (Efron & Tibshirani, *An
    Introduction to the Bootstrap*, 1993, ch. 13). Resamples on which a metric is undefined
    (AUC with a single class drawn) are skipped and the count used is reported.

    Returns:
        ``{metric: {"estimate", "low", "high", "std_error", "level", "resamples"}}``.
    """
    y = np.asarray(y)
    pred = np.asarray(pred, dtype="float64")
    w = None if weight is None else np.asarray(weight, dtype="float64")
    estimate = score_all(task, y, pred, w)
    rng = np.random.default_rng(seed)
    n = len(y)
    draws: dict[str, list[float]] = {name: [] for name in estimate}
    counted = _CountedBinary(y, pred, w) if task == "binary" and pred.ndim == 1 else None
    for _ in range(n_resamples):
        idx = rng.integers(0, n, n)
        if counted is not None:
            # How often each row was drawn (rows in the resampler's sorted order): the
            # resample is scored without copying it.
            scores = counted.scores(np.bincount(idx, minlength=n))
        else:
            scores = score_all(task, y[idx], pred[idx], None if w is None else w[idx])
        for name, value in scores.items():
            if name in draws:
                draws[name].append(value)
    tail = 100 * (1 - level) / 2
    out: dict[str, dict[str, Any]] = {}
    for name, point in estimate.items():
        values = np.asarray(draws[name])
        if len(values) < 2:
            continue
        low, high = np.percentile(values, [tail, 100 - tail])
        out[name] = {"estimate": float(point), "low": float(low), "high": float(high),
                     "std_error": float(np.std(values, ddof=1)), "level": level,
                     "resamples": int(len(values))}
    return out


class _CountedBinary:
    """The binary metrics of a resample given as draw counts per row, in O(rows).

    The rows are sorted by score once; a resample is a weight vector (its counts times the
    rows' weights), so each metric is a weighted sum over the same sorted rows: no copy
    of the resample and no sort per resample. Equal, up to float rounding, to
    ``score_all`` on the resampled rows themselves (tests/tuner/test_evaluate.py checks
    it against scikit-learn on explicitly resampled rows). Counts are drawn straight
    over the sorted rows: uniform draws, so the same bootstrap distribution.
    """

    def __init__(self, y: np.ndarray, pred: np.ndarray, w: np.ndarray | None) -> None:
        # As tuner.metrics orders rows for the AUC: stable ascending sort, reversed.
        self.order = np.argsort(pred, kind="mergesort")[::-1]
        p = pred[self.order]
        self.y = y[self.order].astype("int64")
        self.w = None if w is None else w[self.order]
        self.pos = (self.y == 1).astype("float64")
        self.last = np.r_[np.flatnonzero(np.diff(p)), len(p) - 1]  # ends of tied runs
        eps = 1e-15
        self.loss = -np.where(self.y == 1, np.log(np.clip(p, eps, 1 - eps)),
                              np.log(np.clip(1 - p, eps, 1 - eps)))
        self.guess = (p > 0.5).astype("int64")
        self.hit = (self.guess == self.y).astype("float64")
        self.cell = 2 * self.y + self.guess

    def scores(self, counts: np.ndarray) -> dict[str, float]:
        """Metrics of the resample drawing row ``self.order[i]`` ``counts[i]`` times."""
        ww = counts.astype("float64")
        if self.w is not None:
            ww = ww * self.w
        total = ww.sum()
        out = {"log_loss": float(ww @ self.loss / total),
               "accuracy": float(ww @ self.hit / total)}
        tps = np.cumsum(self.pos * ww)[self.last]
        fps = np.cumsum((1.0 - self.pos) * ww)[self.last]
        if tps[-1] > 0 and fps[-1] > 0:
            out["roc_auc"] = float(np.trapezoid(np.r_[0.0, tps] / tps[-1],
                                                np.r_[0.0, fps] / fps[-1]))
        if tps[-1] > 0:
            # Step-wise area under the precision-recall curve, as tuner.metrics; runs of
            # rows none of which was drawn add no recall (and no 0/0).
            drawn_so_far = tps + fps
            precision = np.divide(tps, drawn_so_far, out=np.zeros_like(tps),
                                  where=drawn_so_far > 0)
            out["average_precision"] = float(np.sum(np.diff(np.r_[0.0, tps / tps[-1]])
                                                    * precision))
        # Weighted confusion matrix in one pass: cell = 2 * truth + guess.
        cm = np.bincount(self.cell, weights=ww, minlength=4).reshape(2, 2)
        seen = np.bincount(self.cell, weights=(ww > 0), minlength=4).reshape(2, 2)
        f1 = []
        for k in (0, 1):
            if seen[k, :].sum() + seen[:, k].sum() == 0:
                continue  # a class neither drawn nor predicted does not count
            tp, fp, fn = cm[k, k], cm[1 - k, k], cm[k, 1 - k]
            denom = 2 * tp + fp + fn
            f1.append(2 * tp / denom if denom > 0 else 0.0)
        out["f1_macro"] = float(np.mean(f1))
        return out


def optimism(metric: str, task: str, cv: dict[str, Any],
             intervals: dict[str, dict[str, Any]]) -> dict[str, Any] | None:
    """The gap between the winner's CV score and its hold-out score, with a verdict.

    Picking the best of many trials by CV score favours configurations that were lucky
    on these folds, so the winner's CV mean tends to flatter it; the hold-out was never
    used for choosing. ``worse_by`` is positive when the hold-out is worse. The hold-out
    behaves like one more fold: a fold's score scatters around the truth with the CV
    spread (``cv.std``), and the hold-out score has its own sampling noise (its bootstrap
    standard error). ``suspicious`` is set when the hold-out is worse by more than
    ``OPTIMISM_Z`` times their combined spread, ``sqrt(std**2 + se**2)``, which chance
    alone rarely produces.
    """
    held = intervals.get(metric)
    if held is None or cv.get("mean") is None:
        return None
    direction = get_metric(metric, task).direction
    cv_mean, cv_std = float(cv["mean"]), float(cv.get("std") or 0.0)
    gap = held["estimate"] - cv_mean
    worse_by = -gap if direction == "maximize" else gap
    allowed = OPTIMISM_Z * math.sqrt(cv_std**2 + held["std_error"] ** 2)
    return {"metric": metric, "direction": direction, "cv_mean": cv_mean, "cv_std": cv_std,
            "holdout": held["estimate"], "holdout_std_error": held["std_error"],
            "worse_by": float(worse_by), "allowed": float(allowed),
            "suspicious": bool(worse_by > allowed)}


def calibration(y: np.ndarray, prob: np.ndarray, weight: np.ndarray | None = None, *,
                n_bins: int = 10) -> dict[str, Any]:
    """Brier score and a reliability curve for binary probabilities of class 1.

    The curve uses ``n_bins`` equal-width bins over [0, 1] and leaves out empty bins, as
    ``sklearn.calibration.calibration_curve(strategy="uniform")`` does; it is unweighted
    like that function. The Brier score is the (weighted) mean squared difference between
    probability and outcome, as ``sklearn.metrics.brier_score_loss``.
    """
    y = np.asarray(y, dtype="float64")
    prob = np.asarray(prob, dtype="float64")
    w = np.ones(len(y)) if weight is None else np.asarray(weight, dtype="float64")
    edges = np.linspace(0.0, 1.0, n_bins + 1)
    ids = np.searchsorted(edges[1:-1], prob)
    total = np.bincount(ids, minlength=n_bins)
    summed = np.bincount(ids, weights=prob, minlength=n_bins)
    positive = np.bincount(ids, weights=y, minlength=n_bins)
    full = total > 0
    return {
        "brier": float(np.average((prob - y) ** 2, weights=w)),
        "bins": n_bins,
        "mean_predicted": [float(v) for v in summed[full] / total[full]],
        "observed": [float(v) for v in positive[full] / total[full]],
        "counts": [int(v) for v in total[full]],
    }


def _warnings(result: dict[str, Any], metric: str) -> list[str]:
    out: list[str] = []
    gap = result.get("optimism")
    if gap and gap["suspicious"]:
        out.append(
            f"the hold-out {metric} ({gap['holdout']:.4g}) is worse than the CV estimate "
            f"({gap['cv_mean']:.4g}) by {gap['worse_by']:.3g}, more than the "
            f"{gap['allowed']:.3g} that fold spread and hold-out noise explain: the search "
            "may have picked a configuration that was lucky on the folds"
        )
    out += result.get("learning_curve", {}).get("warnings", [])
    out += result.get("leaves", {}).get("warnings", [])
    return out


def evaluate_model(fitted: FittedModel, data: PreparedData, plan: ValidationPlan,
                   config: SearchConfig, *, storage_url: str | None = None,
                   study_name: str | None = None, seed: int = 0,
                   n_resamples: int = N_BOOTSTRAP) -> dict[str, Any]:
    """Everything the service reports about how far to trust ``fitted``.

    Args:
        fitted: The model from :func:`tuner.fit_final` on the same data and plan.
        data: Prepared data of the search.
        plan: Its validation plan (the hold-out is scored, fold 0 gives the curve).
        config: The search config (metric, rounds, early stopping).
        storage_url: Optuna storage of the search, for hyperparameter importance.
        study_name: The study's name; importance is skipped when either is missing.
        seed: Seeds the bootstrap and fANOVA's forest.
        n_resamples: Bootstrap resamples.

    Returns:
        ``holdout_intervals``, ``optimism``, ``learning_curve``, ``leaves``,
        ``calibration`` (binary with a hold-out), ``hyperparameter_importance`` and a
        ``warnings`` list of plain sentences.
    """
    result: dict[str, Any] = {"seed": seed, "bootstrap_resamples": n_resamples}
    rows = plan.holdout_idx
    if len(rows):
        # The scored model's predictions: after a refit on all rows the served booster has
        # seen the hold-out.
        pred = (fitted.holdout_pred if fitted.holdout_pred is not None
                else predict(fitted.booster, data.task, data.X.iloc[rows]))
        y = data.y[rows]
        w = None if data.weight is None else data.weight[rows]
        intervals = bootstrap_intervals(data.task, y, pred, w, n_resamples=n_resamples,
                                        seed=seed)
        result["holdout_intervals"] = intervals
        result["optimism"] = optimism(fitted.metric, data.task, fitted.cv, intervals)
        if data.task == "binary":
            result["calibration"] = calibration(y, pred, w)
    result["learning_curve"] = learning_curve(data, plan, fitted.params, config)
    result["leaves"] = leaf_sizes(fitted.booster)
    if storage_url is not None and study_name is not None:
        result["hyperparameter_importance"] = hyperparameter_importance(
            storage_url, study_name, seed=seed)
    result["warnings"] = _warnings(result, fitted.metric)
    return result

"""What a decision-maker asks of the hold-out: gains, confusion, residuals, segments.

Everything is computed on the hold-out rows the search never saw, seeded and
deterministic, and returned as JSON-ready dicts the report draws from.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
import pandas as pd

from tuner.columns import as_level_strings
from tuner.metrics import get_metric

__all__ = ["confusion", "outcomes_report", "gains", "regression_points", "segment_metrics"]

#: Shares of the rows (ranked by score) at which the gains chart is read.
GAINS_POINTS = 20
#: Levels reported per segment column; the rarer ones are pooled as "(other)".
MAX_SEGMENTS = 20
#: A numeric segment column with more distinct values than this is cut into quantile bins.
NUMERIC_BINS = 5
SEGMENT_RESAMPLES = 500
LEVEL = 0.95
OTHER, MISSING = "(other)", "(missing)"


def gains(y: np.ndarray, score: np.ndarray, *, points: int = GAINS_POINTS) -> dict[str, Any]:
    """Cumulative gains: the share of positives among the top-scored share of rows.

    Rows are ranked by ``score``, highest first (ties keep row order, a stable sort). At
    each share ``q`` of ``1/points, 2/points, ..., 1`` the top ``ceil(q * n)`` rows are
    taken; ``captured`` is the share of all positives among them and ``lift`` is
    ``captured / q`` (1 is what picking rows at random gives).
    """
    y = np.asarray(y, dtype="float64")
    order = np.argsort(-np.asarray(score, dtype="float64"), kind="stable")
    hits = np.cumsum(y[order])
    n, total = len(y), float(y.sum())
    shares, captured, lift = [], [], []
    for i in range(1, points + 1):
        k = math.ceil(i * n / points)
        share = k / n
        got = float(hits[k - 1]) / total if total > 0 else 0.0
        shares.append(share)
        captured.append(got)
        lift.append(got / share)
    return {"share": shares, "captured": captured, "lift": lift, "rows": int(n),
            "positives": int(total)}


def confusion(y: np.ndarray, pred: np.ndarray, classes: list[Any], *,
              threshold: float = 0.5) -> dict[str, Any]:
    """Counts of actual (rows) by predicted (columns) class, in ``classes`` order.

    Binary: ``pred`` is the probability of ``classes[1]``, predicted when it exceeds
    ``threshold`` (the service's labelling rule). Multiclass: the most probable class.
    """
    y = np.asarray(y, dtype="int64")
    pred = np.asarray(pred, dtype="float64")
    if pred.ndim == 1:
        labels = (pred > threshold).astype("int64")
    else:
        labels = np.argmax(pred, axis=1)
    k = len(classes)
    matrix = np.zeros((k, k), dtype="int64")
    np.add.at(matrix, (y, labels), 1)
    out: dict[str, Any] = {"classes": list(classes), "matrix": matrix.tolist(),
                           "rows": int(len(y))}
    if pred.ndim == 1:
        tn, fp, fn, tp = (int(v) for v in matrix.ravel())
        out.update(threshold=float(threshold), rule="predicted positive when its "
                   "probability exceeds the threshold", true_negative=tn,
                   false_positive=fp, false_negative=fn, true_positive=tp)
    return out


def regression_points(y: np.ndarray, pred: np.ndarray, *, max_points: int = 1000,
                      seed: int = 0) -> dict[str, Any]:
    """Actual and predicted values (a seeded sample of at most ``max_points`` rows) and
    the residuals' summary over every hold-out row; residual = actual - predicted."""
    y = np.asarray(y, dtype="float64")
    pred = np.asarray(pred, dtype="float64")
    residual = y - pred
    idx = np.arange(len(y))
    if len(idx) > max_points:
        idx = np.sort(np.random.default_rng(seed).choice(idx, max_points, replace=False))
    return {"actual": [float(v) for v in y[idx]], "predicted": [float(v) for v in pred[idx]],
            "rows": int(len(y)), "shown": int(len(idx)),
            "residual_mean": float(residual.mean()),
            "residual_std": float(residual.std(ddof=1)) if len(y) > 1 else 0.0}


def segment_labels(values: pd.Series | np.ndarray) -> np.ndarray:
    """One label per row: the value's text, quantile bins for many-valued numbers,
    ``(missing)``, and ``(other)`` past the :data:`MAX_SEGMENTS` most frequent."""
    s = pd.Series(values).reset_index(drop=True)
    numeric = pd.api.types.is_numeric_dtype(s.dtype) and not pd.api.types.is_bool_dtype(s)
    if numeric and s.nunique(dropna=True) > MAX_SEGMENTS:
        binned = pd.qcut(s, NUMERIC_BINS, duplicates="drop")
        labels = binned.astype(object).map(lambda b: f"{b.left:.4g} to {b.right:.4g}"
                                           if isinstance(b, pd.Interval) else b)
    else:
        labels = as_level_strings(s)
    labels = labels.astype(object).where(labels.notna(), MISSING)
    counts = labels.value_counts()
    keep = set(counts.index[:MAX_SEGMENTS])
    return labels.where(labels.isin(keep), OTHER).to_numpy(dtype=object)


def _score(metric: Any, y: np.ndarray, pred: np.ndarray, w: np.ndarray | None) -> float | None:
    try:
        value = float(metric(y, pred, w))
    except (ValueError, ZeroDivisionError, FloatingPointError):
        return None
    return value if math.isfinite(value) else None


def segment_metrics(task: str, metric_name: str, y: np.ndarray, pred: np.ndarray,
                    weight: np.ndarray | None, columns: dict[str, np.ndarray], *,
                    n_resamples: int = SEGMENT_RESAMPLES, level: float = LEVEL,
                    seed: int = 0) -> dict[str, Any]:
    """The job's metric on each segment of the hold-out, with bootstrap intervals.

    Each resample draws hold-out rows with replacement and scores both the whole
    resample and each segment's rows in it. A segment's interval is the percentile
    interval of its resampled scores; it is flagged ``worse`` when the percentile interval
    of (segment - whole), signed so that positive is worse, lies above zero: a gap the
    resampling noise does not explain (Efron & Tibshirani 1993, ch. 13, on percentile
    intervals). Segments whose metric is undefined (one class only) get ``None``.

    Returns:
        ``{"metric", "direction", "whole": {"rows", "score"}, "columns": [{"column",
        "segments": [{"value", "rows", "score", "low", "high", "worse"}]}]}``.
    """
    metric = get_metric(metric_name, task)
    sign = -1.0 if metric.direction == "maximize" else 1.0  # positive = worse
    y = np.asarray(y)
    pred = np.asarray(pred, dtype="float64")
    w = None if weight is None else np.asarray(weight, dtype="float64")
    n = len(y)

    def sub(idx: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray | None]:
        return y[idx], pred[idx], None if w is None else w[idx]

    whole = _score(metric, *sub(np.arange(n)))
    labelled = {name: segment_labels(values) for name, values in columns.items()}
    segments = {name: [(value, count, labels == value)
                       for value, count in pd.Series(labels).value_counts().items()]
                for name, labels in labelled.items()}
    # Resample by resample, every segment at once: only one resample of row positions is
    # held at a time (500 of them for 200,000 hold-out rows would be 800 MB).
    resampled: dict[tuple[str, int], tuple[list[float], list[float]]] = {
        (name, j): ([], []) for name, levels in segments.items() for j in range(len(levels))}
    rng = np.random.default_rng(seed)
    for _ in range(n_resamples):
        d = rng.integers(0, n, n)
        whole_d = _score(metric, *sub(d))
        for name, levels in segments.items():
            for j, (_, _, members) in enumerate(levels):
                picked = d[members[d]]
                if len(picked) == 0:
                    continue
                s = _score(metric, *sub(picked))
                if s is None:
                    continue
                scores, gaps = resampled[(name, j)]
                scores.append(s)
                if whole_d is not None:
                    gaps.append(sign * (s - whole_d))
    out_columns = []
    for name, levels in segments.items():
        rows = []
        for j, (value, count, members) in enumerate(levels):
            score = _score(metric, *sub(np.flatnonzero(members)))
            scores, gaps = resampled[(name, j)]
            entry: dict[str, Any] = {"value": str(value), "rows": int(count), "score": score,
                                     "low": None, "high": None, "worse": False}
            tail = 100 * (1 - level) / 2
            if score is not None and len(scores) >= 20:
                low, high = np.percentile(scores, [tail, 100 - tail])
                entry.update(low=float(low), high=float(high))
                gap_low = float(np.percentile(gaps, tail)) if len(gaps) >= 20 else None
                entry["worse"] = bool(gap_low is not None and gap_low > 0)
            rows.append(entry)
        out_columns.append({"column": name, "segments": rows})
    return {"metric": metric.name, "direction": metric.direction, "level": level,
            "resamples": n_resamples, "whole": {"rows": int(n), "score": whole},
            "columns": out_columns}


def outcomes_report(data: Any, rows: np.ndarray, pred: np.ndarray, metric: str, *,
                    threshold: float = 0.5, seed: int = 0) -> dict[str, Any]:
    """Everything above for the hold-out ``rows`` of ``data`` predicted as ``pred``."""
    y = data.y[rows]
    w = None if data.weight is None else data.weight[rows]
    out: dict[str, Any] = {}
    if data.task == "binary":
        out["gains"] = gains(y, pred)
    if data.task in ("binary", "multiclass"):
        out["confusion"] = confusion(y, pred, list(data.classes or ()), threshold=threshold)
    else:
        out["regression"] = regression_points(y, pred, seed=seed)
    if data.segments:
        columns = {name: values[rows] for name, values in data.segments.items()}
        out["segments"] = segment_metrics(data.task, metric, y, pred, w, columns, seed=seed)
    return out

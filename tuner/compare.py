"""Two models scored on the same rows, and their paired difference with a percentile
bootstrap interval (each resample draws rows, and both models are scored on those same
rows, so the noise the two share cancels; Efron & Tibshirani 1993)."""

from __future__ import annotations

from typing import Any

import numpy as np

from tuner.metrics import MetricUndefinedError, get_metric

__all__ = ["paired_comparison"]


def paired_comparison(metric_name: str, task: str, y: np.ndarray, first: np.ndarray,
                      second: np.ndarray, weight: np.ndarray | None = None, *,
                      resamples: int = 1000, seed: int = 0) -> dict[str, Any]:
    """Score both predictions and the 95% interval of ``second - first``.

    Returns:
        ``{"metric", "direction", "rows", "scores": [first, second], "difference",
        "interval": [low, high], "resamples", "better"}``; ``better`` is 1 (the second is
        better beyond noise: the whole interval lies on its side), 0 (the first is), or
        None (the interval holds zero).
    """
    metric = get_metric(metric_name, task)
    y = np.asarray(y)
    a, b = metric(y, first, weight), metric(y, second, weight)
    rng = np.random.default_rng(seed)
    n = len(y)
    diffs = []
    for _ in range(resamples):
        rows = rng.integers(0, n, n)
        w = None if weight is None else weight[rows]
        try:
            diffs.append(metric(y[rows], second[rows], w) - metric(y[rows], first[rows], w))
        except MetricUndefinedError:
            continue  # a resample holding one class only: AUC has no value there
    low, high = (float(v) for v in np.percentile(diffs, [2.5, 97.5]))
    sign = 1.0 if metric.direction == "maximize" else -1.0
    better = 1 if sign * low > 0 and sign * high > 0 else (
        0 if sign * low < 0 and sign * high < 0 else None)
    return {"metric": metric.name, "direction": metric.direction, "rows": int(n),
            "scores": [float(a), float(b)], "difference": float(b - a),
            "interval": [low, high], "resamples": len(diffs), "better": better}

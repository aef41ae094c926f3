"""Per-row feature contributions from LightGBM's built-in TreeSHAP.

``Booster.predict(..., pred_contrib=True)`` gives, for every row, one SHAP value per
feature plus a bias term, which together sum to the row's raw score (Lundberg & Lee, 2017,
"A Unified Approach to Interpreting Model Predictions"; Lundberg et al., 2020, "From local
explanations to global understanding with explainable AI for trees").
"""

from __future__ import annotations

from typing import Any

import lightgbm as lgb
import numpy as np
import pandas as pd

from tuner._lgb import lgb_frame

__all__ = ["contribution_scale", "contributions"]


def contribution_scale(booster: lgb.Booster, task: str) -> str:
    """What the contributions add up to, in words."""
    if task == "binary":
        return "log-odds of the second class (raw score)"
    if task == "multiclass":
        return "raw score per class (before softmax)"
    objective = str(booster.params.get("objective", "regression"))
    return "log of the predicted mean (raw score)" if objective == "poisson" else "prediction"


def contributions(booster: lgb.Booster, task: str, frame: pd.DataFrame,
                  names: list[str]) -> list[dict[str, Any]]:
    """One ``{"bias", "features": {name: value}}`` per row of ``frame``.

    For multiclass every value is a list with one entry per class, in class order.
    ``names`` are the original feature names (``frame`` is in training form).
    """
    raw = np.asarray(booster.predict(lgb_frame(frame), pred_contrib=True), dtype="float64")
    width = len(names) + 1
    k = raw.shape[1] // width  # multiclass: K blocks of (features + bias), class by class
    blocks = raw.reshape(len(frame), k, width)
    rows: list[dict[str, Any]] = []
    for block in blocks:
        if k == 1:
            values = block[0]
            rows.append({"bias": float(values[-1]),
                         "features": {n: float(v) for n, v in zip(names, values, strict=False)}})
        else:
            rows.append({"bias": [float(b) for b in block[:, -1]],
                         "features": {n: [float(v) for v in block[:, j]]
                                      for j, n in enumerate(names)}})
    return rows

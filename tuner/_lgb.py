"""Small LightGBM helpers shared by the CV objective and the final fit."""

from __future__ import annotations

import re
from collections.abc import Mapping
from typing import Any

import lightgbm as lgb
import numpy as np
import pandas as pd

from tuner.losses import resolve_objective

# LightGBM refuses feature names containing JSON punctuation and rewrites whitespace.
_UNSAFE = re.compile(r'[\s",:\[\]{}]')


def lgb_names(names: list[str]) -> list[str]:
    """Feature names LightGBM accepts, unique, in the same order as ``names``."""
    out: list[str] = []
    seen: set[str] = set()
    for name in names:
        safe = _UNSAFE.sub("_", name) or "_"
        candidate, n = safe, 1
        while candidate in seen:
            n += 1
            candidate = f"{safe}__{n}"
        seen.add(candidate)
        out.append(candidate)
    return out


def lgb_frame(frame: pd.DataFrame) -> pd.DataFrame:
    """``frame`` with LightGBM-safe column names (values untouched)."""
    return frame.set_axis(lgb_names([str(c) for c in frame.columns]), axis=1)


def base_params(task: str, *, num_class: int | None, metric: str, seed: int,
                num_threads: int, objective: str | None = None,
                fixed: Mapping[str, Any] | None = None) -> dict[str, Any]:
    """Parameters every model of a search shares, whatever the trial.

    ``deterministic`` plus ``force_col_wise`` is what LightGBM documents as needed for
    repeatable models; ``verbosity=-1`` keeps its C++ logging out of worker output.
    ``objective`` is a regression loss of :data:`tuner.losses.REGRESSION_OBJECTIVES`
    (``None``: the task's default, see :func:`tuner.losses.resolve_objective`).
    ``fixed`` holds the job's own fixed parameters and constraints, already checked by
    :mod:`tuner.controls` never to touch the ones set here.
    """
    params: dict[str, Any] = {
        "objective": resolve_objective(task, metric, objective),
        "verbosity": -1,
        "num_threads": num_threads,
        "seed": seed,
        "deterministic": True,
        "force_col_wise": True,
        # Pre-filtering drops features by the trial's min_data_in_leaf; keeping them all
        # makes every trial (and the final fit) see the same feature set.
        "feature_pre_filter": False,
    }
    if task == "multiclass":
        params["num_class"] = num_class
    params.update(fixed or {})
    return params


def make_dataset(X: pd.DataFrame, y: np.ndarray, weight: np.ndarray | None,
                 params: dict[str, Any], reference: lgb.Dataset | None = None, *,
                 rows: np.ndarray | None = None,
                 matrix: np.ndarray | None = None) -> lgb.Dataset:
    """A Dataset of ``X``'s rows at positions ``rows`` (every row: ``None``).

    ``y`` and ``weight`` are those rows' already. Categoricals are the pandas
    ``category`` columns, as LightGBM's pandas path takes them (codes, levels kept as
    ``pandas_categorical``), but the float matrix LightGBM bins is gathered straight from
    ``X``'s columns (:func:`feature_matrix`): no ``X.iloc[rows]`` copy of the frame, and
    no second conversion inside LightGBM. ``matrix``: that matrix, built already.
    """
    names = lgb_names([str(c) for c in X.columns])
    cats = [c for c in X.columns if isinstance(X[c].dtype, pd.CategoricalDtype)]
    unordered = [name for name, c in zip(names, X.columns, strict=True)
                 if c in cats and not X[c].cat.ordered]
    data = feature_matrix(X, rows) if matrix is None else matrix
    dataset = lgb.Dataset(data, label=y, weight=weight, reference=reference, params=params,
                          free_raw_data=True, feature_name=names,
                          categorical_feature=unordered)
    if reference is None:
        # What LightGBM's pandas path records; the model file keeps it for predictions.
        dataset.pandas_categorical = [list(X[c].cat.categories) for c in cats]
    return dataset


def feature_matrix(X: pd.DataFrame, rows: np.ndarray | None = None, *,
                   order: str = "F") -> np.ndarray:
    """The float64 matrix LightGBM's pandas path makes of ``X`` (category codes, missing
    and unseen levels as NaN), of the rows at positions ``rows`` only (all: ``None``).

    Gathered column by column, so no copy of the frame is made on the way. Column-major
    by default (LightGBM reads either layout without copying it; filling columns of a
    column-major matrix is the fast way round).
    """
    n = len(X) if rows is None else len(rows)
    out = np.empty((X.shape[1], n), dtype=np.float64).T if order == "F" else \
        np.empty((n, X.shape[1]), dtype=np.float64)
    for j, name in enumerate(X.columns):
        column = X[name]
        if isinstance(column.dtype, pd.CategoricalDtype):
            codes = column.cat.codes.to_numpy()
            codes = codes if rows is None else codes[rows]
            out[:, j] = codes
            out[codes < 0, j] = np.nan
        else:
            values = column.to_numpy(dtype=np.float64, na_value=np.nan)
            out[:, j] = values if rows is None else values[rows]
    return out


def predict(booster: lgb.Booster, task: str, frame: pd.DataFrame | np.ndarray,
            num_iteration: int | None = None) -> np.ndarray:
    """Predict with the convention of :mod:`tuner.metrics`.

    ``frame`` is a prepared frame, or a matrix :func:`frame_matrix` already built for it.

    Returns:
        Binary: probability of class 1, shape ``(n,)``; multiclass: ``(n, K)``
        probabilities; regression: values.
    """
    matrix = frame if isinstance(frame, np.ndarray) else frame_matrix(booster, frame)
    out = booster.predict(matrix, num_iteration=num_iteration)
    out = np.asarray(out, dtype="float64")
    if task == "multiclass" and out.ndim == 1:
        out = out.reshape(len(frame), -1)
    return out


def frame_matrix(booster: lgb.Booster | lgb.Dataset,
                 frame: pd.DataFrame) -> np.ndarray | pd.DataFrame:
    """The float matrix LightGBM would build from ``frame``, built without its pandas path.

    ``booster`` may also be the constructed Dataset it is (to be) trained on: both carry
    the category levels seen in training (``pandas_categorical``).

    LightGBM turns a pandas frame into category codes (missing and unseen levels as NaN)
    and float64 values on every call, which dominates the cost of predicting a few rows.
    The codes only mean the same thing when the frame's levels are the ones the model was
    trained with (its ``pandas_categorical``); otherwise the frame goes to LightGBM as it is
    and LightGBM remaps the levels itself.
    """
    cats = [c for c in frame.columns if isinstance(frame[c].dtype, pd.CategoricalDtype)]
    trained = booster.pandas_categorical or []
    if len(trained) != len(cats) or any(
        list(frame[c].cat.categories) != list(levels) for c, levels in zip(cats, trained,
                                                                            strict=True)
    ):
        return lgb_frame(frame)
    return feature_matrix(frame, order="C")

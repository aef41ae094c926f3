"""The search holds the table once: folds are built from it without copies of it.

Reference for the Datasets: LightGBM's own pandas path. A Dataset built from rows of the
prepared frame (``make_dataset(..., rows=...)``, a float matrix gathered column by column)
must give the very model ``lgb.Dataset`` on those rows of the frame gives.

Memory: tracemalloc counts NumPy's and pandas' buffers, not LightGBM's binned rows (C++),
so its peak over a search's trials bounds the float copies made on the way. A copy of the
train part kept by the objective, plus a frame copy and LightGBM's own float conversion
of each fold's rows, came to 3.6 times the feature frame here (measured, 40,000 and
200,000 rows alike); the fit rows' float matrix beside the validation rows the folds keep
(log loss is scored from our own predictions) comes to 2.6 times.
"""

from __future__ import annotations

import tracemalloc

import lightgbm as lgb
import numpy as np
import optuna

from tuner import CVObjective, get_metric, plan_validation, prepare
from tuner._lgb import base_params, lgb_frame, make_dataset
from tuner.space import DEFAULT_SPACE, LIGHTGBM_DEFAULTS, fit_into_space


def _with_missing(frame):
    frame = frame.copy()
    frame.loc[::7, "temp_c"] = np.nan
    frame.loc[::5, "clay_body"] = None
    return frame


def test_datasets_from_rows_are_lightgbm_pandas_datasets(make_frame) -> None:
    data = prepare(_with_missing(make_frame("binary", n_rows=600, seed=5)), target="cracked")
    assert data.X["temp_c"].isna().any() and data.X["clay_body"].isna().any()
    rows = np.arange(1, 600, 2)
    held = np.arange(0, 600, 2)
    params = {**base_params("binary", num_class=2, metric="log_loss", seed=0, num_threads=1),
              "metric": "binary_logloss"}

    def fit(train_set, valid_set):
        return lgb.train(params, train_set, num_boost_round=30, valid_sets=[valid_set])

    pandas_train = lgb.Dataset(lgb_frame(data.X.iloc[rows]), label=data.y[rows],
                               params=params)
    pandas_valid = lgb.Dataset(lgb_frame(data.X.iloc[held]), label=data.y[held],
                               reference=pandas_train, params=params)
    ours_train = make_dataset(data.X, data.y[rows], None, params, rows=rows)
    ours_valid = make_dataset(data.X, data.y[held], None, params, reference=ours_train,
                              rows=held)
    by_pandas, ours = fit(pandas_train, pandas_valid), fit(ours_train, ours_valid)
    assert ours.model_to_string() == by_pandas.model_to_string()
    assert ours.pandas_categorical == by_pandas.pandas_categorical == [
        list(data.X["clay_body"].cat.categories)]


def test_a_search_holds_under_three_feature_frames(make_frame) -> None:
    data = prepare(make_frame("binary", n_rows=40_000, seed=2), target="cracked")
    plan = plan_validation(data, n_folds=5, holdout_fraction=0.0, seed=0)
    frame_bytes = int(data.X.memory_usage(deep=True).sum())
    # log_loss: every fold is scored from our own predictions, so its rows are kept.
    metric = get_metric("log_loss", "binary")
    base = {**base_params("binary", num_class=2, metric="log_loss", seed=0, num_threads=1),
            "metric": metric.lgb_metric_for("binary")}
    first = fit_into_space(dict(LIGHTGBM_DEFAULTS), DEFAULT_SPACE, n_train_rows=32_000)
    study = optuna.create_study(direction="minimize")
    for _ in range(2):
        study.enqueue_trial(first)
    tracemalloc.start()
    try:
        objective = CVObjective(data, plan, metric, params_base=base, space=DEFAULT_SPACE,
                                max_rounds=5, early_stopping_rounds=5)
        study.optimize(objective, n_trials=2)
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    assert [t.state for t in study.trials] == [optuna.trial.TrialState.COMPLETE] * 2
    assert peak < 3.0 * frame_bytes, (peak, frame_bytes)

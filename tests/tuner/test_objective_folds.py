"""The CV objective reuses each fold's constructed Datasets across trials.

Reference: LightGBM itself. A trial that reuses a fold must score exactly what a fresh
``lgb.train`` on freshly built Datasets scores (the binning is deterministic), scored by
scikit-learn's ``roc_auc_score``; and a trial with other Dataset parameters (``max_bin``)
must get Datasets of its own, not the cached ones. The objective itself takes LightGBM's
own AUC at the best round (unweighted binary AUC only), so this also holds that number
to scikit-learn's.
"""

from __future__ import annotations

import lightgbm as lgb
import optuna
import pytest
from sklearn import metrics as skm

from tuner import CVObjective, get_metric, plan_validation, prepare
from tuner._lgb import base_params, make_dataset, predict
from tuner.space import DEFAULT_SPACE, LIGHTGBM_DEFAULTS, fit_into_space, merge_overrides
from tuner.trials import trial_attrs

# max_bin shapes the Dataset itself: a space that tunes it must not share one Dataset.
SPACE = merge_overrides(DEFAULT_SPACE, {"max_bin": {"choices": [15, 255]}})


def _by_hand(data, plan, params: dict, fold: int) -> float:
    fit, valid = plan.folds[fold]
    rows_fit, rows_valid = plan.train_idx[fit], plan.train_idx[valid]
    train_set = make_dataset(data.X.iloc[rows_fit], data.y[rows_fit], None, params)
    valid_set = make_dataset(data.X.iloc[rows_valid], data.y[rows_valid], None, params,
                             reference=train_set)
    booster = lgb.train(params, train_set, num_boost_round=40, valid_sets=[valid_set],
                        callbacks=[lgb.early_stopping(5, first_metric_only=True,
                                                      verbose=False)])
    pred = predict(booster, "binary", data.X.iloc[rows_valid],
                   num_iteration=booster.best_iteration)
    return float(skm.roc_auc_score(data.y[rows_valid], pred))


def test_reused_folds_score_what_fresh_datasets_score(make_frame) -> None:
    data = prepare(make_frame("binary", n_rows=400, seed=4), target="cracked")
    plan = plan_validation(data, n_folds=3, seed=0)
    base = {**base_params("binary", num_class=2, metric="roc_auc", seed=0, num_threads=1),
            "metric": "auc"}
    objective = CVObjective(data, plan, get_metric("roc_auc", "binary"), params_base=base,
                            space=SPACE, max_rounds=40, early_stopping_rounds=5)
    first = fit_into_space(dict(LIGHTGBM_DEFAULTS), SPACE, n_train_rows=200)
    coarse = {**first, "max_bin": 15}
    study = optuna.create_study(direction="maximize")
    for params in (first, first, coarse, first):
        study.enqueue_trial(params)
    study.optimize(objective, n_trials=4)
    scores = [trial_attrs(t)["fold_scores"] for t in study.trials]
    assert scores[0] == scores[1] == scores[3]  # the same parameters, reused folds
    for trial_scores, params in ((scores[1], first), (scores[2], coarse)):
        full = {**base, **params}
        for k in range(plan.n_folds):
            assert trial_scores[k] == pytest.approx(_by_hand(data, plan, full, k), abs=1e-12)
    assert scores[2] != scores[0]  # 15 bins per feature is a different model

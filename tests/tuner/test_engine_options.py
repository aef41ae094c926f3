"""Objectives, weights in training, pruners, parallel trials, warm start, one-SE rule and
refitting on every row, on real (small) LightGBM searches."""

from __future__ import annotations

import dataclasses
import threading

import lightgbm as lgb
import numpy as np
import pytest
from sklearn import metrics as skm

from tuner import (
    ConfigError,
    SearchConfig,
    TrialRecord,
    fit_final,
    load_trial_records,
    plan_validation,
    prepare,
    run_search,
)
from tuner._lgb import base_params, make_dataset
from tuner.config import check_config
from tuner.selection import complexity, select, standard_error
from tuner.space import DEFAULT_SPACE, fit_into_space, merge_overrides
from tuner.trial_loop import threads_per_trial

SMALL = {"max_rounds": 30, "early_stopping_rounds": 5, "n_startup_trials": 2}


@pytest.fixture
def regression(make_frame):
    data = prepare(make_frame("regression", n_rows=240), target="shrinkage",
                   weight_column="weight")
    return data, plan_validation(data, n_folds=3, holdout_fraction=0.2, seed=0)


@pytest.mark.parametrize("objective", ["poisson", "tweedie", "huber", "quantile"])
def test_regression_objectives_reach_lightgbm(regression, storage_url, objective) -> None:
    data, plan = regression
    metric = "poisson_deviance" if objective in ("poisson", "tweedie") else "mae"
    config = SearchConfig(task="regression", metric=metric, n_trials=2, objective=objective,
                          **SMALL)
    result = run_search(data, plan, config, storage_url=storage_url, study_name="s")
    fitted = fit_final(data, plan, config, result.best)
    assert fitted.params["objective"] == objective
    assert fitted.booster.params["objective"] == objective  # restored from the model
    assert metric in fitted.holdout


def test_objective_checks_name_the_fields(regression) -> None:
    data, _ = regression
    negative = dataclasses.replace(data, y=data.y - 100.0)
    for bad, fields, frame in [
        (SearchConfig(task="regression", metric="rmse", objective="poisson"), {"objective"},
         negative),
        (SearchConfig(task="regression", metric="poisson_deviance", objective="huber"),
         {"objective", "metric"}, data),
        (SearchConfig(task="regression", metric="rmse", objective="gamma-ish"), {"objective"},
         data),
        (SearchConfig(task="regression", metric="mae", objective="quantile",
                      space=merge_overrides(DEFAULT_SPACE, {"alpha": {"low": 0.5,
                                                                      "high": 3.0}})),
         {"search_space.alpha"}, data),
        (SearchConfig(task="regression", metric="rmse", pruner="hyper"), {"pruner"}, data),
    ]:
        with pytest.raises(ConfigError) as info:
            check_config(frame, bad)
        assert {e["field"] for e in info.value.errors} == fields


def test_weights_are_used_in_training_and_in_fold_scores(regression, storage_url) -> None:
    data, plan = regression
    config = SearchConfig(task="regression", metric="rmse", n_trials=1, **SMALL)
    run_search(data, plan, config, storage_url=storage_url, study_name="s")
    trial0 = load_trial_records(storage_url, "s")[0]
    # Recompute fold 0 by hand: weighted LightGBM fit, scored by scikit-learn's
    # mean_squared_error with sample_weight on the same predictions.
    params = {**base_params("regression", num_class=None, metric="rmse", seed=0,
                            num_threads=1), "metric": "rmse", **trial0.params}
    fit, valid = plan.folds[0]
    rows_fit, rows_valid = plan.train_idx[fit], plan.train_idx[valid]
    booster = lgb.train(params, make_dataset(data.X.iloc[rows_fit], data.y[rows_fit],
                                             data.weight[rows_fit], params),
                        num_boost_round=trial0.best_iterations[0])
    pred = booster.predict(data.X.iloc[rows_valid])  # LightGBM's own predict
    expected = np.sqrt(skm.mean_squared_error(data.y[rows_valid], pred,
                                              sample_weight=data.weight[rows_valid]))
    assert trial0.fold_scores[0] == pytest.approx(expected, rel=1e-9)
    unweighted = lgb.train(params, make_dataset(data.X.iloc[rows_fit], data.y[rows_fit],
                                                None, params),
                           num_boost_round=trial0.best_iterations[0])
    assert not np.allclose(pred, unweighted.predict(data.X.iloc[rows_valid]))


def test_pruners_prune_and_record_state(make_frame, storage_url) -> None:
    data = prepare(make_frame("binary", n_rows=300), target="cracked")
    plan = plan_validation(data, n_folds=5, seed=0)
    for pruner in ("halving", "none"):
        config = SearchConfig(task="binary", metric="log_loss", n_trials=6, pruner=pruner,
                              **SMALL)
        result = run_search(data, plan, config, storage_url=storage_url, study_name=pruner)
        records = load_trial_records(storage_url, pruner)
        assert result.n_complete + result.n_pruned == 6
        pruned = [r for r in records if r.state == "pruned"]
        assert len(pruned) == result.n_pruned
        assert all(len(r.fold_scores) < 5 for r in pruned)
        assert (result.n_pruned > 0) == (pruner != "none")


def test_parallel_trials_keep_the_budget_and_divide_threads(make_frame, storage_url,
                                                           monkeypatch) -> None:
    assert threads_per_trial(4, 2) == 2 and threads_per_trial(2, 4) == 1
    data = prepare(make_frame("binary", n_rows=300), target="cracked")
    plan = plan_validation(data, n_folds=3, seed=0)
    seen_threads = set()
    original = lgb.train

    def spy(params, *args, **kwargs):
        seen_threads.add((threading.get_ident(), params["num_threads"]))
        return original(params, *args, **kwargs)

    monkeypatch.setattr(lgb, "train", spy)
    config = SearchConfig(task="binary", metric="roc_auc", n_trials=5, pruner="none",
                          max_parallel_trials=2, num_threads=2, **SMALL)
    result = run_search(data, plan, config, storage_url=storage_url, study_name="p")
    assert result.n_complete == 5  # exact: not one trial per thread over the budget
    assert {n for _, n in seen_threads} == {1}
    # Trial 0 (enqueued) runs alone in the calling thread, then two pool threads share
    # the rest.
    pool = {t for t, _ in seen_threads} - {threading.main_thread().ident}
    assert len(pool) == 2


def test_warm_start_enqueues_earlier_winners_after_trial_0(make_frame, storage_url) -> None:
    data = prepare(make_frame("binary", n_rows=240), target="cracked")
    plan = plan_validation(data, n_folds=3, seed=0)
    earlier = {**fit_into_space({}, DEFAULT_SPACE, n_train_rows=100), "num_leaves": 12,
               "learning_rate": 0.2, "min_data_in_leaf": 500, "unknown_knob": 3}
    config = SearchConfig(task="binary", metric="roc_auc", n_trials=3, warm_start=(earlier,),
                          **SMALL)
    run_search(data, plan, config, storage_url=storage_url, study_name="w")
    records = load_trial_records(storage_url, "w")
    warm = records[1].params
    assert warm["num_leaves"] == 12 and warm["learning_rate"] == 0.2
    assert warm["min_data_in_leaf"] == max(5, plan.min_fit_rows // 10)  # clamped into space
    assert "unknown_knob" not in warm


def _rec(number: int, score: float, folds: list[float], leaves: int, rounds: int):
    return TrialRecord(number=number, state="complete", params={"num_leaves": leaves},
                       score=score, score_std=float(np.std(folds)), fold_scores=folds,
                       boosting_rounds=rounds)


def test_one_se_rule_on_hand_made_trials() -> None:
    # Reference for the rule: Hastie, Tibshirani & Friedman, The Elements of Statistical
    # Learning (2nd ed.), section 7.10: take the simplest model whose score is within one
    # standard error of the best. The expected choices below are worked out by hand.
    best = _rec(0, 0.90, [0.88, 0.90, 0.92], 64, 100)  # SE = 0.02 / sqrt(3) ~ 0.0115
    close_simple = _rec(1, 0.895, [0.89, 0.895, 0.90], 8, 100)
    far_simpler = _rec(2, 0.80, [0.80, 0.80, 0.80], 2, 10)
    chosen, report = select([best, close_simple, far_simpler], "maximize", "one_se")
    assert chosen is close_simple and report["best_trial"] == 0
    assert report["standard_error"] == pytest.approx(0.02 / np.sqrt(3))
    minimised, _ = select([_rec(0, 1.0, [0.9, 1.1], 64, 50), _rec(1, 1.05, [1.0, 1.1], 4, 50)],
                          "minimize", "one_se")
    assert minimised.number == 1  # 1.05 <= 1.0 + 0.1/sqrt(2)
    assert select([best, close_simple], "maximize", "best")[0] is best


def test_one_se_rule_on_a_real_search(make_frame, storage_url) -> None:
    data = prepare(make_frame("binary", n_rows=300), target="cracked")
    plan = plan_validation(data, n_folds=3, seed=0)
    config = SearchConfig(task="binary", metric="roc_auc", n_trials=8, selection="one_se",
                          pruner="none", **SMALL)
    result = run_search(data, plan, config, storage_url=storage_url, study_name="o")
    best, chosen = result.best, result.chosen
    assert result.selection["rule"] == "one_se"
    assert complexity(chosen) <= complexity(best)
    assert chosen.score >= best.score - standard_error(best.fold_scores)
    simpler = [r for r in load_trial_records(storage_url, "o") if r.state == "complete"
               and r.score >= best.score - standard_error(best.fold_scores)]
    assert complexity(chosen) == min(complexity(r) for r in simpler)


def test_final_refit_on_all_rows_scores_first(make_frame, storage_url) -> None:
    data = prepare(make_frame("binary", n_rows=240), target="cracked")
    plan = plan_validation(data, n_folds=3, seed=0)
    config = SearchConfig(task="binary", metric="roc_auc", n_trials=1, **SMALL)
    best = run_search(data, plan, config, storage_url=storage_url, study_name="f").best
    scored = fit_final(data, plan, config, best)
    served = fit_final(data, plan, dataclasses.replace(config, final_refit="all"), best)
    assert served.holdout == scored.holdout  # the hold-out score is of the scored model
    assert scored.refit["rows"] == "train" and served.refit["rows"] == "all"
    assert served.refit["fit_rows"] == data.n_rows and not served.refit["served_is_scored"]
    assert served.booster.model_to_string() != scored.booster.model_to_string()

"""Searches on a real SQLite storage: trial 0, resume, determinism, stopping."""

from __future__ import annotations

import dataclasses

import lightgbm as lgb
import optuna
import pytest
from optuna.trial import TrialState

from tuner import (
    LIGHTGBM_DEFAULTS,
    ConfigError,
    SearchConfig,
    fit_final,
    load_study,
    load_trial_records,
    open_study,
    plan_validation,
    prepare,
    run_search,
)
from tuner.metrics import get_metric
from tuner.objective import CVObjective, base_params
from tuner.trials import trial_attrs


@pytest.fixture
def setup(make_frame):
    data = prepare(make_frame("binary", n_rows=500), target="cracked", exclude=["kiln"])
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.2, seed=0)
    config = SearchConfig(task="binary", metric="roc_auc", n_trials=3, max_rounds=40,
                          early_stopping_rounds=10, seed=7, n_startup_trials=2)
    return data, plan, config


def test_search_starts_from_defaults_and_resumes(setup, storage_url) -> None:
    data, plan, config = setup
    seen = []
    result = run_search(data, plan, config, storage_url=storage_url, study_name="s",
                        on_trial=seen.append)
    assert [r.number for r in seen] == [0, 1, 2]
    assert seen[0].params == LIGHTGBM_DEFAULTS
    assert result.n_complete == 3 and result.direction == "maximize"
    for record in seen:
        assert record.state == "complete" and len(record.fold_scores) == 3
        assert len(record.best_iterations) == 3 and record.boosting_rounds >= 1
        assert record.score == pytest.approx(sum(record.fold_scores) / 3)
        assert record.train_seconds > 0 and record.duration_seconds > 0
    assert result.best == max(seen, key=lambda r: r.score)

    more = dataclasses.replace(config, n_trials=5)
    resumed = []
    result = run_search(data, plan, more, storage_url=storage_url, study_name="s",
                        on_trial=resumed.append)
    assert [r.number for r in resumed] == [3, 4] and result.n_complete == 5
    params = [tuple(sorted(r.params.items())) for r in seen + resumed]
    assert len(set(params)) == 5  # the resumed sampler does not replay earlier draws
    assert [r.number for r in load_trial_records(storage_url, "s")] == [0, 1, 2, 3, 4]
    # A finished budget runs nothing more.
    assert run_search(data, plan, more, storage_url=storage_url, study_name="s").n_complete == 5


def test_same_seed_gives_identical_searches_and_models(setup, tmp_path) -> None:
    data, plan, config = setup
    runs = []
    for name in ("a", "b"):
        url = f"sqlite:///{tmp_path / name}.db"
        result = run_search(data, plan, config, storage_url=url, study_name="s")
        records = load_trial_records(url, "s")
        model = fit_final(data, plan, config, result.best)
        runs.append(([r.params for r in records], [r.score for r in records],
                     model.booster.model_to_string()))
    assert runs[0][0] == runs[1][0]
    assert runs[0][1] == runs[1][1]
    assert runs[0][2] == runs[1][2]


def test_stop_request_ends_the_search(setup, storage_url) -> None:
    data, plan, config = setup
    calls = {"n": 0, "after_first": False}

    def on_trial(record) -> None:
        calls["after_first"] = True

    def should_stop() -> bool:
        # Once trial 0 is done it is polled after that trial, before trial 1's first fold
        # and then every boosting round: the 5th call is in round 3 of trial 1's fold 0.
        calls["n"] += calls["after_first"]
        return calls["n"] >= 5

    result = run_search(data, plan, dataclasses.replace(config, n_trials=10),
                        storage_url=storage_url, study_name="s", should_stop=should_stop,
                        on_trial=on_trial)
    records = load_trial_records(storage_url, "s")
    assert [r.state for r in records] == ["complete", "pruned"] and result.n_pruned == 1
    assert records[1].fold_scores == [] and records[1].score is None
    # A stop takes effect inside the fold: three rounds boosted, not the fold's 20.
    study = load_study(storage_url, "s")
    assert trial_attrs(study.trials[1])["rounds_trained"] == 3


def test_crashed_running_trial_is_failed_on_resume(setup, storage_url) -> None:
    data, plan, config = setup
    study = open_study(storage_url, "s", direction="maximize", seed=0, create=True)
    study.ask()  # trial 0 claimed by a worker that then died
    result = run_search(data, plan, config, storage_url=storage_url, study_name="s")
    states = [r.state for r in load_trial_records(storage_url, "s")]
    assert states[0] == "failed" and states.count("complete") == 3
    assert result.n_failed == 1


def test_failures_stop_after_the_cap(setup, storage_url, monkeypatch) -> None:
    data, plan, config = setup

    def broken(self, params, fold, *rest):
        raise lgb.basic.LightGBMError("simulated failure")

    monkeypatch.setattr(CVObjective, "_fit_fold", broken)
    result = run_search(data, plan, config, storage_url=storage_url, study_name="s")
    assert result.best is None and result.n_failed == 5 and result.n_complete == 0
    study = load_study(storage_url, "s")
    assert all(t.state == TrialState.FAIL for t in study.trials)


def test_config_must_fit_the_data(setup, storage_url) -> None:
    data, plan, _ = setup
    for config, field in (
        (SearchConfig(task="regression", metric="rmse"), "task"),
        (SearchConfig(task="binary", metric="rmse"), "metric"),
        (SearchConfig(task="binary", metric="roc_auc", n_trials=0), "n_trials"),
    ):
        with pytest.raises(ConfigError) as info:
            run_search(data, plan, config, storage_url=storage_url, study_name="s")
        assert info.value.errors[0]["field"] == field


def test_missing_study_has_no_records(storage_url) -> None:
    assert load_trial_records(storage_url, "never-created") == []


@pytest.mark.parametrize(
    ("task", "strategy", "metric", "extra"),
    [
        ("multiclass", "stratified", "f1_macro", {}),
        ("regression", "time", "mae", {"time_column": "fired_on"}),
        ("regression", "kfold", "poisson_deviance", {"weight_column": "weight"}),
        ("binary", "group", "accuracy", {"group_column": "kiln"}),
    ],
)
def test_every_task_and_strategy_runs(make_frame, storage_url, task, strategy, metric,
                                      extra) -> None:
    target = {"binary": "cracked", "multiclass": "grade", "regression": "shrinkage"}[task]
    data = prepare(make_frame(task, n_rows=240), target=target, **extra)
    plan = plan_validation(data, strategy=strategy, n_folds=3)
    config = SearchConfig(task=task, metric=metric, n_trials=2, max_rounds=20,
                          early_stopping_rounds=5)
    result = run_search(data, plan, config, storage_url=storage_url, study_name="s")
    assert result.n_complete == 2 and result.best is not None
    assert result.direction == get_metric(metric, task).direction
    fitted = fit_final(data, plan, config, result.best)
    assert metric in fitted.holdout


def test_pruned_trials_keep_their_fold_scores(setup) -> None:
    data, plan, config = setup
    metric = get_metric("roc_auc", "binary")
    objective = CVObjective(
        data, plan, metric, space=config.space, max_rounds=20, early_stopping_rounds=5,
        params_base=base_params("binary", num_class=2, metric="roc_auc", seed=0,
                                num_threads=1),
    )
    # An upper threshold below any AUC prunes every trial at its first report.
    study = optuna.create_study(direction="maximize",
                                pruner=optuna.pruners.ThresholdPruner(upper=0.0))
    # LightGBM's defaults (learning rate 0.1) for both trials: a sampled high learning rate
    # would reach an in-fold checkpoint and be pruned before fold 0 ends.
    for _ in range(2):
        study.enqueue_trial(dict(LIGHTGBM_DEFAULTS))
    study.optimize(objective, n_trials=2)
    for trial in study.trials:
        assert trial.state == TrialState.PRUNED
        assert len(trial_attrs(trial)["fold_scores"]) == 1
        # Fold 0's score is reported at the step of its end (20 rounds x 10 steps each);
        # 20 rounds at a learning rate of 0.1 never reach the first in-fold checkpoint.
        assert list(trial.intermediate_values) == [200]

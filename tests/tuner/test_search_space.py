"""Search-space overrides, sampling and the trial-0 defaults."""

from __future__ import annotations

import optuna
import pytest

from tuner import (
    DEFAULT_SPACE,
    LIGHTGBM_DEFAULTS,
    Choice,
    Fixed,
    ParamRange,
    SearchSpace,
    SearchSpaceError,
    effective_space,
    initial_params,
    merge_overrides,
    suggest,
)


def test_overrides_apply() -> None:
    space = merge_overrides(DEFAULT_SPACE, {
        "num_leaves": {"low": 16, "high": 64, "log": True},
        "learning_rate": 0.05,
        "extra_trees": {"choices": [True, False]},
        "max_bin": {"choices": [63, 255]},
        "lambda_l1": {"high": 1.0},  # the missing bound comes from the base range
    })
    assert space["num_leaves"] == ParamRange(16, 64, log=True, kind="int")
    assert space["learning_rate"] == Fixed(0.05)
    assert space["extra_trees"] == Choice((True, False))
    assert space["max_bin"] == Choice((63, 255))
    assert space["lambda_l1"] == ParamRange(1e-8, 1.0, log=True)
    assert DEFAULT_SPACE["num_leaves"] == ParamRange(4, 256, log=True, kind="int")  # unchanged


@pytest.mark.parametrize(
    ("overrides", "field"),
    [
        ({"n_estimators": 100}, "n_estimators"),  # alias / not tunable
        ({"boosting": {"choices": ["gbdt", "dart"]}}, "boosting"),
        ({"num_leaves": {"low": 64, "high": 16}}, "num_leaves"),
        ({"num_leaves": {"low": 1, "high": 16}}, "num_leaves"),
        ({"num_leaves": {"low": 8.5, "high": 16}}, "num_leaves"),
        ({"learning_rate": {"low": 0.0, "high": 0.1, "log": True}}, "learning_rate"),
        ({"learning_rate": -0.1}, "learning_rate"),
        ({"feature_fraction": {"low": 0.5, "high": 1.2}}, "feature_fraction"),
        ({"bagging_fraction": 0.0}, "bagging_fraction"),
        ({"lambda_l2": {"low": -1.0, "high": 1.0}}, "lambda_l2"),
        ({"min_data_in_leaf": "many"}, "min_data_in_leaf"),
        ({"extra_trees": {"low": 0, "high": 1}}, "extra_trees"),
        ({"max_bin": {"choices": []}}, "max_bin"),
        ({"max_cat_to_onehot": 0}, "max_cat_to_onehot"),
        ({"bagging_freq": {"low": 0, "high": 5, "log": "yes"}}, "bagging_freq"),
        ({"path_smooth": {"low": 0.1}}, "path_smooth"),  # no base range to inherit from
        ({"cat_smooth": {"mid": 1}}, "cat_smooth"),
    ],
)
def test_bad_overrides_name_the_parameter(overrides, field) -> None:
    with pytest.raises(SearchSpaceError) as info:
        merge_overrides(DEFAULT_SPACE, overrides)
    assert [e["field"] for e in info.value.errors] == [field]


def test_all_bad_parameters_reported_together() -> None:
    with pytest.raises(SearchSpaceError) as info:
        merge_overrides(DEFAULT_SPACE, {"num_leaves": 1, "ghost": 3})
    assert {e["field"] for e in info.value.errors} == {"num_leaves", "ghost"}


def test_round_trip_through_dict() -> None:
    space = merge_overrides(DEFAULT_SPACE, {"learning_rate": 0.05,
                                            "extra_trees": {"choices": [True, False]}})
    assert SearchSpace.from_dict(space.to_dict()) == space
    assert hash(SearchSpace.from_dict(space.to_dict())) == hash(space)


def test_defaults_lie_inside_the_default_space() -> None:
    assert set(LIGHTGBM_DEFAULTS) == set(DEFAULT_SPACE)
    assert initial_params(DEFAULT_SPACE, n_train_rows=10_000) == LIGHTGBM_DEFAULTS


def test_min_data_in_leaf_is_clamped_for_small_tables() -> None:
    small = effective_space(DEFAULT_SPACE, n_train_rows=120)
    assert small["min_data_in_leaf"] == ParamRange(5, 12, kind="int")
    assert initial_params(DEFAULT_SPACE, n_train_rows=120)["min_data_in_leaf"] == 12
    tiny = effective_space(DEFAULT_SPACE, n_train_rows=20)
    assert tiny["min_data_in_leaf"] == ParamRange(5, 5, kind="int")


def test_suggest_samples_inside_ranges_and_keeps_fixed_values() -> None:
    space = merge_overrides(DEFAULT_SPACE, {"learning_rate": 0.05,
                                            "max_bin": {"choices": [63, 127]}})
    study = optuna.create_study(sampler=optuna.samplers.RandomSampler(seed=3))
    for _ in range(20):
        trial = study.ask()
        params = suggest(trial, space, n_train_rows=300)
        assert params["learning_rate"] == 0.05 and "learning_rate" not in trial.params
        assert 5 <= params["min_data_in_leaf"] <= 30
        assert 4 <= params["num_leaves"] <= 256 and isinstance(params["num_leaves"], int)
        assert 0.4 <= params["feature_fraction"] <= 1.0
        assert params["max_bin"] in (63, 127)
        study.tell(trial, 0.0)

"""Fixed LightGBM parameters, round controls and feature constraints (tuner.controls)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tuner import SearchConfig, fit_final, plan_validation, prepare, run_search
from tuner.controls import (
    REFUSED,
    canonical_name,
    check_fixed,
    constraint_params,
    split_fixed,
    try_params,
)
from tuner.errors import ConfigError
from tuner.space import DEFAULT_SPACE, Fixed, merge_overrides


def _fields(exc: pytest.ExceptionInfo) -> list[str]:
    return [e["field"] for e in exc.value.errors]


@pytest.mark.parametrize(("name", "reason"), [
    ("objective", "objective"), ("metric", "metric"), ("num_class", "classes"),
    ("seed", "seed"), ("random_state", "seed"),  # an alias of seed in LightGBM's table
    ("deterministic", "repeatable"), ("num_threads", "threads"), ("n_jobs", "threads"),
    ("device_type", "CPU"), ("device", "CPU"), ("n_estimators", "max_rounds"),
    ("early_stopping_rounds", "early_stopping_rounds"), ("monotone_constraints", "monotone"),
    ("input_model", "file"), ("forcedsplits_filename", "file"),
])
def test_refused_parameters_name_the_field_and_say_why(name, reason) -> None:
    with pytest.raises(ConfigError) as exc:
        check_fixed({name: 1})
    assert _fields(exc) == [f"fixed.{name}"]
    assert reason in exc.value.errors[0]["message"]


def test_unknown_parameters_bad_values_and_double_spellings_are_refused() -> None:
    with pytest.raises(ConfigError) as exc:
        check_fixed({"max_bins_please": 3, "min_data_in_bin": {"a": 1},
                     "lambda_l1": 1.0, "reg_alpha": 2.0})
    assert sorted(_fields(exc)) == ["fixed.max_bins_please", "fixed.min_data_in_bin",
                                    "fixed.reg_alpha"]


def test_aliases_become_canonical_names() -> None:
    # LightGBM's own alias table (Parameters.rst): reg_alpha is lambda_l1, subsample is
    # bagging_fraction.
    assert canonical_name("reg_alpha") == "lambda_l1"
    assert check_fixed({"subsample": 0.8, "min_data_in_bin": 7}) == {
        "bagging_fraction": 0.8, "min_data_in_bin": 7}
    assert all(canonical_name(n) == n for n in REFUSED)  # every refusal is a real name


def test_tunable_fixed_parameters_become_fixed_points_of_the_space() -> None:
    space, rest = split_fixed({"num_leaves": 15, "max_bin": 63, "min_data_in_bin": 7},
                              DEFAULT_SPACE)
    assert space["num_leaves"] == Fixed(15) and space["max_bin"] == Fixed(63)
    assert rest == {"min_data_in_bin": 7}
    searched = merge_overrides(DEFAULT_SPACE, {"num_leaves": {"low": 8, "high": 16}})
    with pytest.raises(ConfigError) as exc:
        split_fixed({"num_leaves": 15}, searched, {"num_leaves": {"low": 8, "high": 16}})
    assert _fields(exc) == ["fixed.num_leaves"]
    with pytest.raises(ConfigError) as exc:
        split_fixed({"num_leaves": 1}, DEFAULT_SPACE)
    assert _fields(exc) == ["fixed.num_leaves"]


def test_lightgbm_judges_values_it_alone_knows() -> None:
    X = pd.DataFrame({"a": np.arange(50.0)})
    y = np.arange(50.0)
    base = {"objective": "regression", "verbosity": -1, "num_threads": 1}
    try_params(X, y, {**base, "min_data_in_bin": 3})
    with pytest.raises(ConfigError) as exc:
        try_params(X, y, {**base, "boosting": "no_such_booster"})
    assert _fields(exc) == ["fixed"]


def test_constraints_follow_feature_order_and_name_unknown_columns() -> None:
    params = constraint_params(["a", "b", "c"], {"c": -1, "a": 1}, [["a", "c"], ["b"]])
    assert params["monotone_constraints"] == [1, 0, -1]
    assert params["interaction_constraints"] == [[0, 2], [1]]
    with pytest.raises(ConfigError) as exc:
        constraint_params(["a", "b"], {"zz": 1, "a": 2, "b": -1}, [["a", "nope"], []],
                          categorical={"b"})
    assert sorted(_fields(exc)) == ["interaction_constraints[0]",
                                    "interaction_constraints[1]", "monotone.a", "monotone.b",
                                    "monotone.zz"]


def _wiggly(task: str, n: int = 600, seed: int = 3) -> pd.DataFrame:
    """A target that rises and falls with 'price' (so a free model is not monotone)."""
    rng = np.random.default_rng(seed)
    price = rng.uniform(0, 10, n)
    other = rng.normal(0, 1, n)
    mood = rng.choice(["calm", "busy"], n)
    signal = np.sin(price) * 2 + 0.3 * price + other + (mood == "busy") * 0.5
    frame = pd.DataFrame({"price": price, "other": other, "mood": mood})
    if task == "binary":
        frame["y"] = (signal + rng.normal(0, 0.5, n) > 1.5).astype(int)
    else:
        frame["y"] = signal + rng.normal(0, 0.2, n)
    return frame


def _fit(frame: pd.DataFrame, task: str, fixed: dict, tmp_path) -> tuple:
    data = prepare(frame, target="y", task=task)
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.2, seed=0)
    metric = "roc_auc" if task == "binary" else "rmse"
    config = SearchConfig(task=task, metric=metric, n_trials=3, max_rounds=60,
                          early_stopping_rounds=10, fixed_params=fixed)
    result = run_search(data, plan, config, storage_url=f"sqlite:///{tmp_path}/s.db",
                        study_name="c")
    return data, fit_final(data, plan, config, result.best)


def _max_wrong_step(booster, data, feature: str, direction: int, rows: int = 100) -> float:
    """Largest move against ``direction`` along a grid over ``feature``, other columns
    held at each of ``rows`` table rows; predictions by LightGBM's own Booster.predict."""
    grid = np.linspace(-1, 11, 60)
    worst = 0.0
    base = data.X.iloc[:rows]
    for i in range(len(base)):
        frame = base.iloc[[i] * len(grid)].reset_index(drop=True)
        frame[feature] = grid
        pred = booster.predict(frame)
        steps = np.diff(pred) * direction
        worst = max(worst, float(-steps.min()))
    return worst


@pytest.mark.parametrize("task", ["binary", "regression"])
@pytest.mark.parametrize("direction", [1, -1])
def test_monotone_predictions_never_move_the_wrong_way(task, direction, tmp_path) -> None:
    frame = _wiggly(task)
    data = prepare(frame, target="y", task=task)
    fixed = constraint_params(data.schema.names, {"price": direction}, None,
                              categorical={"mood"})
    data, fitted = _fit(frame, task, fixed, tmp_path)
    assert _max_wrong_step(fitted.booster, data, "price", direction) <= 1e-12
    assert fitted.params["monotone_constraints"] == fixed["monotone_constraints"]
    # The check can fail: unconstrained, the same data gives a model that moves both ways.
    (tmp_path / "free").mkdir()
    _, free = _fit(frame, task, {}, tmp_path / "free")
    assert _max_wrong_step(free.booster, data, "price", direction) > 1e-3


def test_interaction_groups_keep_trees_within_one_group(tmp_path) -> None:
    frame = _wiggly("regression")
    data = prepare(frame, target="y", task="regression")
    fixed = constraint_params(data.schema.names, None, [["price"], ["other", "mood"]])
    _, fitted = _fit(frame, "regression", fixed, tmp_path)
    # LightGBM's own tree dump: every tree's split features fall in one group.
    groups = [{"price"}, {"other", "mood"}]
    for tree in fitted.booster.dump_model()["tree_info"]:
        used: set[str] = set()
        stack = [tree["tree_structure"]]
        while stack:
            node = stack.pop()
            if "split_feature" in node:
                used.add(data.schema.names[node["split_feature"]])
                stack += [node["left_child"], node["right_child"]]
        assert any(used <= g for g in groups), used


def test_round_cap_and_fixed_parameter_reach_lightgbm(tmp_path) -> None:
    frame = _wiggly("regression")
    data = prepare(frame, target="y", task="regression")
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.2, seed=0)
    config = SearchConfig(task="regression", metric="rmse", n_trials=2, max_rounds=7,
                          early_stopping_rounds=3, fixed_params={"min_data_in_bin": 9})
    result = run_search(data, plan, config, storage_url=f"sqlite:///{tmp_path}/s.db",
                        study_name="r")
    assert max(result.best.best_iterations) <= 7
    fitted = fit_final(data, plan, config, result.best)
    assert fitted.booster.num_trees() <= 7 * 3 // 2 + 1  # refit_rounds scales by k/(k-1)
    # The model file's own parameter section records what LightGBM trained with.
    assert "[min_data_in_bin: 9]" in fitted.booster.model_to_string()

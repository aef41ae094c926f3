"""Hold-out and fold plans: no leakage, whole groups, forward in time."""

from __future__ import annotations

import numpy as np
import pytest

from tuner import ConfigError, DatasetError, plan_validation, prepare


@pytest.fixture
def data(make_frame):
    frame = make_frame("binary", n_rows=240)
    return prepare(frame, target="cracked", group_column="kiln", time_column="fired_on")


@pytest.mark.parametrize("strategy", ["kfold", "stratified", "group", "time"])
@pytest.mark.parametrize("fraction", [0.0, 0.25])
def test_holdout_never_in_a_fold(data, strategy, fraction) -> None:
    plan = plan_validation(data, strategy=strategy, n_folds=4, holdout_fraction=fraction,
                           seed=5)
    hold = set(plan.holdout_idx.tolist())
    assert hold.isdisjoint(plan.train_idx.tolist())
    assert sorted(hold | set(plan.train_idx.tolist())) == list(range(data.n_rows))
    assert (len(hold) == 0) == (fraction == 0.0)
    for fit, valid in plan.folds:
        rows_fit, rows_valid = plan.train_idx[fit], plan.train_idx[valid]
        assert hold.isdisjoint(rows_fit.tolist()) and hold.isdisjoint(rows_valid.tolist())
        assert set(rows_fit.tolist()).isdisjoint(rows_valid.tolist())
    if strategy != "time":  # forward chaining never validates on the first block
        covered = np.concatenate([valid for _, valid in plan.folds])
        assert sorted(covered.tolist()) == list(range(len(plan.train_idx)))


def test_group_strategy_keeps_groups_whole(data) -> None:
    plan = plan_validation(data, strategy="group", n_folds=3, holdout_fraction=0.2)
    groups = data.groups
    assert set(groups[plan.holdout_idx]).isdisjoint(groups[plan.train_idx])
    for fit, valid in plan.folds:
        assert set(groups[plan.train_idx[fit]]).isdisjoint(groups[plan.train_idx[valid]])


def test_time_strategy_moves_forward(data) -> None:
    plan = plan_validation(data, strategy="time", n_folds=3, holdout_fraction=0.2)
    times = data.times
    assert times[plan.holdout_idx].min() > times[plan.train_idx].max()
    for fit, valid in plan.folds:
        assert times[plan.train_idx[valid]].min() > times[plan.train_idx[fit]].max()
    fit_sizes = [len(fit) for fit, _ in plan.folds]
    assert fit_sizes == sorted(fit_sizes)


def test_stratified_keeps_class_balance(data) -> None:
    plan = plan_validation(data, n_folds=4, holdout_fraction=0.25)
    assert plan.strategy == "stratified"
    overall = data.y.mean()
    assert abs(data.y[plan.holdout_idx].mean() - overall) < 0.02
    for _, valid in plan.folds:
        assert abs(data.y[plan.train_idx[valid]].mean() - overall) < 0.05


def test_same_seed_same_plan(data) -> None:
    a = plan_validation(data, strategy="kfold", seed=11)
    b = plan_validation(data, strategy="kfold", seed=11)
    c = plan_validation(data, strategy="kfold", seed=12)
    assert np.array_equal(a.holdout_idx, b.holdout_idx)
    assert all(np.array_equal(x[1], y[1]) for x, y in zip(a.folds, b.folds, strict=True))
    assert not np.array_equal(a.holdout_idx, c.holdout_idx)


def test_regression_defaults_to_kfold(make_frame) -> None:
    data = prepare(make_frame("regression", n_rows=50), target="shrinkage")
    assert plan_validation(data, n_folds=3).strategy == "kfold"
    with pytest.raises(ConfigError) as info:
        plan_validation(data, strategy="stratified")
    assert info.value.errors[0]["field"] == "cv.strategy"


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"strategy": "bootstrap"}, "cv.strategy"),
        ({"n_folds": 1}, "cv.folds"),
        ({"holdout_fraction": 0.95}, "cv.holdout_fraction"),
        ({"n_folds": 200}, "cv.folds"),
    ],
)
def test_bad_settings(data, kwargs, field) -> None:
    with pytest.raises((ConfigError, DatasetError)) as info:
        plan_validation(data, **kwargs)
    assert info.value.errors[0]["field"] == field


def test_missing_side_columns_and_rare_classes(make_frame) -> None:
    frame = make_frame("binary", n_rows=40)
    plain = prepare(frame, target="cracked")
    for strategy, field in (("group", "cv.group_column"), ("time", "cv.time_column")):
        with pytest.raises(DatasetError) as info:
            plan_validation(plain, strategy=strategy)
        assert info.value.errors[0]["field"] == field
    frame["cracked"] = ["yes"] * 3 + ["no"] * 37
    with pytest.raises(DatasetError) as info:
        plan_validation(prepare(frame, target="cracked"), n_folds=5)
    assert info.value.errors[0]["field"] == "cv.folds" and "'yes'" in str(info.value)

"""Judging a job from the table's profile (tuner/profiled.py) refuses only what the rows
refuse too, with the same field and message, and infers the same task."""

from __future__ import annotations

from typing import Any

import numpy as np
import pandas as pd
import pytest

from tuner.dataset import MAX_CLASSES, infer_task, prepare
from tuner.errors import TunerError
from tuner.profile import profile_table
from tuner.profiled import MAX_CLASSES as PROFILED_MAX_CLASSES
from tuner.profiled import infer_task as profiled_task
from tuner.profiled import judge
from tuner.validation import plan_validation

RNG = np.random.default_rng(3)
N = 60


def _table(**extra: Any) -> pd.DataFrame:
    frame = pd.DataFrame({
        "x": RNG.normal(size=N), "kiln": RNG.choice(["a", "b", "c"], N),
        "y": RNG.integers(0, 2, N), "amount": RNG.gamma(2.0, size=N),
        "klass": RNG.integers(0, 4, N), "shift": RNG.integers(1, 5, N),
        "grp": np.repeat(np.arange(6), N // 6), "when": np.arange(N, dtype=float),
        "flag": RNG.choice([True, False], N), "one": np.ones(N),
    })
    for name, values in extra.items():
        frame[name] = values
    return frame


def _profiles(frame: pd.DataFrame) -> list[dict[str, Any]]:
    return [p.to_dict() for p in profile_table(frame)[0]]


def _refusal(call: Any) -> tuple[str, str] | None:
    try:
        call()
    except TunerError as exc:
        first = exc.errors[0]
        return first["field"], first["message"]
    return None


REQUESTS = [
    {"target": "y"},
    {"target": "nope"},
    {"target": "y", "features": ["x", "colour"]},
    {"target": "y", "exclude": ["nope"]},
    {"target": "y", "features": ["y", "x"]},
    {"target": "y", "weight_column": "y"},
    {"target": "y", "weight_column": "kiln"},
    {"target": "y", "time_column": "kiln", "strategy": "time"},
    {"target": "y", "column_kinds": {"nope": "numeric"}},
    {"target": "y", "column_kinds": {"y": "categorical"}},
    {"target": "y", "segments": ["nope"]},
    {"target": "one"},
    {"target": "one", "task": "binary"},
    {"target": "kiln", "task": "binary"},
    {"target": "kiln", "task": "regression"},
    {"target": "amount", "task": "binary"},
    {"target": "klass"},
    {"target": "shift"},
    {"target": "flag"},
    {"target": "y", "exclude": ["x", "kiln", "amount", "klass", "shift", "grp", "when",
                                "flag", "one"]},
    {"target": "y", "features": []},
    {"target": "y", "folds": 20, "holdout_fraction": 0.5},
    {"target": "amount", "folds": 20, "holdout_fraction": 0.5},
    {"target": "y", "strategy": "group"},
    {"target": "y", "strategy": "group", "group_column": "grp", "folds": 6},
    {"target": "y", "strategy": "group", "group_column": "grp", "folds": 6,
     "holdout_fraction": 0.0},
    {"target": "y", "strategy": "group", "group_column": "grp", "folds": 5,
     "holdout_fraction": 0.0},
    {"target": "amount", "strategy": "stratified"},
    {"target": "y", "strategy": "time"},
    {"target": "y", "strategy": "time", "time_column": "when"},
    {"target": "y", "metric": "rmse"},
    {"target": "amount", "metric": "roc_auc"},
    {"target": "y", "metric": "vibes"},
    {"target": "amount", "objective": "hinge"},
    {"target": "y", "objective": "poisson"},
    {"target": "amount", "objective": "huber", "metric": "poisson_deviance"},
    {"target": "y", "monotone": {"nope": 1}},
    {"target": "y", "monotone": {"kiln": 1}},
    {"target": "y", "monotone": {"x": 1}, "exclude": ["x"]},
    {"target": "y", "interaction_constraints": [["x", "nope"]]},
]


@pytest.mark.parametrize("request_", REQUESTS, ids=lambda r: ",".join(f"{k}={v}" for k, v in
                                                                        r.items())[:60])
def test_the_profile_refuses_only_what_the_rows_refuse(request_: dict[str, Any]) -> None:
    from tuner.controls import constraint_params
    from tuner.losses import check_objective
    from tuner.metrics import default_metric, get_metric

    frame = _table(inf=np.r_[np.inf, RNG.normal(size=N - 1)])
    early = _refusal(lambda: judge(_profiles(frame), len(frame), **request_))

    def from_rows() -> None:
        kw = dict(request_)
        data = prepare(frame, **{k: v for k, v in kw.items() if k in (
            "target", "task", "features", "exclude", "weight_column", "time_column",
            "group_column", "column_kinds", "segments")})
        metric = kw.get("metric") or default_metric(data.task)
        get_metric(metric, data.task)
        check_objective(data.task, metric, kw.get("objective"), data.y)
        constraint_params(data.schema.names, kw.get("monotone"),
                          kw.get("interaction_constraints"),
                          categorical={f.name for f in data.schema.features
                                       if f.kind == "categorical"})
        plan_validation(data, strategy=kw.get("strategy"), n_folds=kw.get("folds"),
                        holdout_fraction=kw.get("holdout_fraction", 0.2))

    late = _refusal(from_rows)
    if early is not None:
        assert late is not None, f"the profile refused {early}, the rows accepted"
        assert early[0] == late[0]
        if not early[1].startswith("at most"):  # a bound where the rows give the count
            assert early[1] == late[1]


def test_an_infinite_target_is_refused_from_the_profile() -> None:
    frame = _table(inf=np.r_[np.inf, RNG.normal(size=N - 1)])
    early = _refusal(lambda: judge(_profiles(frame), N, target="inf"))
    late = _refusal(lambda: prepare(frame, target="inf"))
    assert early == late == ("target", "target 'inf' contains infinite values")


@pytest.mark.parametrize("values", [
    [0, 1, 0, 1], [1, 2, 1, 2], [0, 1, 2, 0], [1, 2, 3, 1], [0, 1, 2, 3, 4, 5, 6, 7, 8, 9],
    [0.5, 1.5, 2.5], list(range(12)), ["a", "b", "a"], ["a", "b", "c"], [True, False],
    [0, 2, 3, 1, 4], [1.0, 1.0, 2.0],
])
def test_task_inferred_from_the_profile_matches_the_rows(values: list[Any]) -> None:
    column = pd.Series(values * 5, name="t")
    (profile,) = _profiles(column.to_frame())
    assert profiled_task(profile) == infer_task(column)


def test_an_older_profile_without_values_leaves_the_task_open() -> None:
    (profile,) = _profiles(pd.Series([0, 1, 2, 1] * 5, name="t").to_frame())
    assert profiled_task({**profile, "values": None}) is None


def test_class_limits_agree() -> None:
    assert PROFILED_MAX_CLASSES == MAX_CLASSES

"""The portfolio of starting configurations: enqueued right after trial 0 and the warm
start, in order, clipped into the job's space."""

from __future__ import annotations

import dataclasses

from optuna.trial import TrialState

from tuner import (
    DEFAULT_SPACE,
    SearchConfig,
    load_study,
    load_trial_records,
    plan_validation,
    prepare,
    run_search,
)
from tuner.portfolio import PORTFOLIO, portfolio_params
from tuner.space import Choice, ParamRange, effective_space, fit_into_space, merge_overrides


def _inside(params: dict, space) -> bool:
    for name, value in params.items():
        spec = space[name]
        if isinstance(spec, ParamRange) and not spec.low <= value <= spec.high:
            return False
        if isinstance(spec, Choice) and value not in spec.values:
            return False
    return True


def test_portfolio_lies_inside_the_default_space() -> None:
    assert 3 <= len(PORTFOLIO) <= 8
    big = effective_space(DEFAULT_SPACE, n_train_rows=100_000)
    for config in PORTFOLIO:
        assert set(config) == set(DEFAULT_SPACE)
        assert _inside(dict(config), big)
    # On a large table nothing needs clipping: the configurations run as learned.
    assert portfolio_params(DEFAULT_SPACE, n_train_rows=100_000) == [dict(c) for c in PORTFOLIO]


def test_enqueued_after_trial_zero_and_warm_start_in_order(make_frame, storage_url) -> None:
    data = prepare(make_frame("binary", n_rows=200), target="cracked")
    plan = plan_validation(data, n_folds=3, seed=0)
    # A narrower space and a fixed parameter: the portfolio is clipped to them.
    space = merge_overrides(DEFAULT_SPACE, {"num_leaves": {"low": 6, "high": 20},
                                            "learning_rate": {"low": 0.05, "high": 0.2},
                                            "extra_trees": False})
    warm = ({"num_leaves": 9, "learning_rate": 0.07},)
    config = SearchConfig(task="binary", metric="log_loss", n_trials=len(PORTFOLIO) + 3,
                          space=space, warm_start=warm, pruner="none", max_rounds=30,
                          early_stopping_rounds=5)
    run_search(data, plan, config, storage_url=storage_url, study_name="p")
    trials = sorted(load_trial_records(storage_url, "p"), key=lambda r: r.number)
    rows = plan.min_fit_rows
    sampled = effective_space(space, n_train_rows=rows)
    expected = [fit_into_space(w, space, n_train_rows=rows) for w in warm]
    expected += portfolio_params(space, n_train_rows=rows)
    got = [{k: t.params[k] for k in expected[0]} for t in trials[1:1 + len(expected)]]
    assert got == expected
    for params in got[len(warm):]:
        assert _inside(params, sampled)
        assert 6 <= params["num_leaves"] <= 20 and 0.05 <= params["learning_rate"] <= 0.2
    assert all(t.params["extra_trees"] is False for t in trials)
    # The portfolio clipped: at least one learned value lay outside this narrow space.
    assert any(dict(c) != p for c, p in zip(PORTFOLIO, got[len(warm):], strict=True))
    # Switched off, nothing but trial 0 and the warm start is enqueued.
    off = SearchConfig(task="binary", metric="log_loss", n_trials=2, space=space,
                       warm_start=warm, portfolio=False, max_rounds=30,
                       early_stopping_rounds=5)
    run_search(data, plan, off, storage_url=storage_url, study_name="q")
    assert not load_study(storage_url, "q").get_trials(states=(TrialState.WAITING,))
    on = dataclasses.replace(off, portfolio=True)
    run_search(data, plan, on, storage_url=storage_url, study_name="r")
    waiting = load_study(storage_url, "r").get_trials(states=(TrialState.WAITING,))
    assert len(waiting) == len(PORTFOLIO)  # enqueued, beyond this two-trial budget

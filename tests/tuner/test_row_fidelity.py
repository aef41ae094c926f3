"""Rows as a fidelity: the rung schedule, the promotion rule, and real searches that use
them (successive halving over seeded row subsamples, tuner/fidelity.py)."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from tuner import SearchConfig, plan_validation, prepare, run_search
from tuner.fidelity import (
    FIDELITY_FROM_ROWS,
    REDUCTION,
    RUNG_SHARES,
    fidelity_rungs,
    promoted,
    rung_key,
    subsample_rank,
)
from tuner.metrics import get_metric
from tuner.objective import CVObjective, base_params
from tuner.space import DEFAULT_SPACE
from tuner.study import load_trial_records

# A lowered threshold so a few thousand rows climb rungs (the service's is 50,000).
SMALL_FROM = 1_000


@pytest.mark.parametrize(("rows", "rungs"), [
    (300, (1.0,)), (49_999, (1.0,)), (50_000, (1 / 9, 1 / 3, 1.0)),
    (640_000, (1 / 9, 1 / 3, 1.0)), (10**7, (1 / 9, 1 / 3, 1.0)),
])
def test_rungs_follow_the_documented_rule(rows: int, rungs: tuple[float, ...]) -> None:
    assert FIDELITY_FROM_ROWS == 50_000
    assert fidelity_rungs(rows) == pytest.approx(rungs)
    # The lowest rung of the smallest table that climbs still has over 5,500 rows.
    if len(rungs) > 1:
        assert rows * rungs[0] >= 5_555
    assert fidelity_rungs(rows, None) == (1.0,)
    assert fidelity_rungs(rows, 1) == RUNG_SHARES
    # Each rung is REDUCTION times the one below it, ending on all the rows.
    assert all(math.isclose(b / a, REDUCTION)
               for a, b in zip(RUNG_SHARES, RUNG_SHARES[1:], strict=False))
    assert RUNG_SHARES[-1] == 1.0


def test_rung_keys_are_short_and_stable() -> None:
    assert [rung_key(s) for s in RUNG_SHARES] == ["0.1111", "0.3333", "1"]


def test_promotion_keeps_the_best_third_of_a_rung() -> None:
    # Log loss: lower is better. The first at a rung has no rival and goes on.
    assert promoted(0.9, [], "minimize")
    # With fewer than six scores only the best so far goes on; a tie is no defeat.
    assert promoted(0.5, [0.6], "minimize") and not promoted(0.7, [0.6], "minimize")
    assert promoted(0.6, [0.6, 0.7], "minimize")
    # Six scores: the best two go on.
    rivals = [0.1, 0.2, 0.3, 0.4, 0.5]
    assert promoted(0.15, rivals, "minimize") and not promoted(0.25, rivals, "minimize")
    # AUC: higher is better.
    assert promoted(0.95, [0.9, 0.8], "maximize") and not promoted(0.85, [0.9], "maximize")
    assert not promoted(float("nan"), [], "minimize")
    assert promoted(0.5, [float("nan")], "minimize")


def test_subsamples_are_seeded_and_nested() -> None:
    a, b = subsample_rank(10_000, 3), subsample_rank(10_000, 3)
    assert np.array_equal(a, b) and not np.array_equal(a, subsample_rank(10_000, 4))
    assert np.array_equal(np.sort(a), np.arange(10_000))  # a permutation of the rows
    small, large = a < round(10_000 / 9), a < round(10_000 / 3)
    assert small.sum() == 1_111 and large.sum() == 3_333
    assert not (small & ~large).any()  # every row of the lower rung is in the higher one


def _table(n: int, seed: int = 0) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 5))
    logit = x[:, 0] - 0.5 * x[:, 1] ** 2 + np.sin(2 * x[:, 2]) + 0.4 * x[:, 3] * x[:, 4]
    frame = pd.DataFrame(x, columns=["a", "b", "c", "d", "e"])
    frame["y"] = (rng.random(n) < 1 / (1 + np.exp(-(logit + 0.3)))).astype("int64")
    return frame


@pytest.fixture(scope="module")
def table():
    data = prepare(_table(3_000), target="y")
    return data, plan_validation(data, n_folds=3, seed=0)


def test_each_rung_scores_the_folds_own_rows_of_its_subsample(table) -> None:
    data, plan = table
    metric = get_metric("log_loss", "binary")
    objective = CVObjective(
        data, plan, metric, space=DEFAULT_SPACE, rungs=RUNG_SHARES, subsample_seed=5,
        params_base=base_params("binary", num_class=None, metric="log_loss", seed=0,
                                num_threads=1))
    n = len(plan.train_idx)
    for k, (fit, valid) in enumerate(plan.folds):
        whole = objective._positions(k, 1.0)
        assert whole[0] is fit and whole[1] is valid
        (f_low, v_low), (f_mid, v_mid) = (objective._positions(k, 1 / 9),
                                          objective._positions(k, 1 / 3))
        assert set(f_low) <= set(f_mid) <= set(fit)
        assert set(v_low) <= set(v_mid) <= set(valid)
        # About a third of the fold's rows on each side (a random subsample of the rows).
        assert len(f_mid) == pytest.approx(len(fit) / 3, rel=0.1)
        assert len(v_mid) == pytest.approx(len(valid) / 3, rel=0.2)
    assert sum(len(objective._positions(k, 1 / 9)[1]) for k in range(plan.n_folds)) == \
        round(n / 9)  # the validation folds partition the rows: 1/9 of them in all


def _search(table, storage_url: str, name: str, **config) -> tuple[list, object]:
    data, plan = table
    settings = {"task": "binary", "metric": "log_loss", "n_trials": 18, "seed": 0,
                "max_rounds": 150, "fidelity_from_rows": SMALL_FROM, **config}
    result = run_search(data, plan, SearchConfig(**settings), storage_url=storage_url,
                        study_name=name)
    return load_trial_records(storage_url, name), result


def test_search_climbs_rungs_one_trial_per_configuration(table, storage_url) -> None:
    # No in-fold pruning, so every pruned trial was stopped at a rung.
    records, result = _search(table, storage_url, "climb", pruner="none")
    finished = [r for r in records if r.state in ("complete", "pruned")]
    assert len(finished) == len(records) == 18  # the budget counts configurations
    assert len({r.number for r in records}) == 18
    enqueued = 5  # trial 0 (LightGBM's defaults) and the four portfolio configurations
    for r in records[:enqueued]:
        assert (r.state, r.fidelity, r.rung_scores) == ("complete", 1.0, {})
    shares = {rung_key(s): round(s, 4) for s in RUNG_SHARES}
    for r in records[enqueued:]:
        assert r.fidelity in shares.values()
        assert r.state == ("complete" if r.fidelity == 1.0 else "pruned")
        # A score at every lower rung it finished: up to the one it stopped at.
        assert set(r.rung_scores) == {k for k, s in shares.items() if s <= r.fidelity < 1
                                      or s < r.fidelity == 1}
        assert (r.score is None) == (r.fidelity < 1.0)  # no low-fidelity score competes
        assert len(r.fold_scores) == table[1].n_folds  # the folds at the share reached
    assert any(r.fidelity == round(1 / 9, 4) for r in records)  # some stopped low
    assert any(r.fidelity == 1.0 for r in records[enqueued:])  # some climbed to the top
    # The search's winner is a trial on all the rows.
    assert result.best is not None and result.best.fidelity == 1.0
    assert result.n_complete == sum(r.state == "complete" for r in records)
    assert result.n_complete + result.n_pruned == 18
    # Promotion was honest: replay the rule on the recorded rung scores, in trial order
    # (one trial at a time, so each saw exactly the trials before it).
    for key in ("0.1111", "0.3333"):
        seen: list[float] = []
        for r in records[enqueued:]:
            if key not in r.rung_scores:
                continue
            went_on = r.fidelity > shares[key]
            assert went_on == promoted(r.rung_scores[key], seen, "minimize"), (key, r)
            seen.append(r.rung_scores[key])


def test_row_fidelity_search_is_reproducible(table, tmp_path) -> None:
    runs = []
    for name in ("a", "b"):
        records, _ = _search(table, f"sqlite:///{tmp_path / name}.db", "same", n_trials=10)
        runs.append([(r.number, r.state, r.fidelity, r.score, r.rung_scores, r.params,
                      r.fold_scores) for r in records])
    assert runs[0] == runs[1]
    assert {r[2] for r in runs[0]} - {1.0}  # the rungs were used


def test_small_tables_keep_every_trial_on_all_rows(make_frame, storage_url) -> None:
    data = prepare(make_frame("binary", n_rows=300), target="cracked")
    plan = plan_validation(data, seed=0)
    config = SearchConfig(task="binary", metric="log_loss", n_trials=8, seed=0,
                          max_rounds=100)
    run_search(data, plan, config, storage_url=storage_url, study_name="small")
    records = load_trial_records(storage_url, "small")
    assert len(records) == 8
    assert all(r.fidelity == 1.0 and r.rung_scores == {} for r in records)


def test_promoted_search_finds_a_score_within_one_se_of_the_full_search(table,
                                                                       storage_url) -> None:
    # Same seed and budget: every configuration on all the rows, or climbing rungs.
    _, full = _search(table, storage_url, "full", n_trials=14, fidelity_from_rows=None)
    _, rungs = _search(table, storage_url, "rungs", n_trials=14)
    assert full.best is not None and rungs.best is not None
    assert full.best.score_se is not None and full.best.score_se > 0
    assert rungs.best.score <= full.best.score + full.best.score_se

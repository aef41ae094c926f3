"""Validation that scales with the rows: fold count, standard errors, in-fold pruning."""

from __future__ import annotations

import math

import numpy as np
import optuna
import pytest
from optuna.trial import TrialState

from tuner import SearchConfig, plan_validation, prepare, run_search
from tuner.metrics import get_metric
from tuner.objective import CVObjective, base_params, checkpoints, fold_steps, pruner_step
from tuner.selection import select, split_standard_error
from tuner.space import DEFAULT_SPACE, LIGHTGBM_DEFAULTS
from tuner.trials import TrialRecord, trial_attrs
from tuner.validation import PARTITION_FOLDS, SE_BOUND, SE_ROWS, validation_splits


@pytest.mark.parametrize(("rows", "splits"), [
    (500, 5), (49_999, 5), (50_000, 4), (66_666, 4), (66_667, 3), (99_999, 3),
    (100_000, 2), (199_999, 2), (200_000, 1), (640_000, 1), (5_000_000, 1),
])
def test_fold_count_follows_the_documented_table(rows, splits) -> None:
    assert validation_splits(rows) == splits


@pytest.mark.parametrize("rows", [1_000, 30_000, 50_000, 70_000, 150_000, 250_000, 10**7])
def test_fewer_folds_only_where_the_bound_still_holds(rows) -> None:
    m = validation_splits(rows)
    scored = m * rows / PARTITION_FOLDS
    # Standard error of a mean over `scored` rows, in per-row standard deviations.
    if m < PARTITION_FOLDS:
        assert 1 / math.sqrt(scored) <= SE_BOUND + 1e-12
    # One fold fewer would break the bound: no more folds than it needs.
    assert m == 1 or 1 / math.sqrt((m - 1) * rows / PARTITION_FOLDS) > SE_BOUND
    assert SE_ROWS == 40_000


def _big_frame(n: int, seed: int = 0):
    import pandas as pd

    rng = np.random.default_rng(seed)
    x = rng.normal(size=(n, 3))
    p = 1 / (1 + np.exp(-(x[:, 0] - 0.5 * x[:, 1] ** 2 + 0.3)))
    return pd.DataFrame({"a": x[:, 0], "b": x[:, 1], "c": x[:, 2],
                         "y": (rng.random(n) < p).astype("int64")})


def test_plan_uses_the_first_folds_of_a_five_fold_partition() -> None:
    data = prepare(_big_frame(150_000), target="y")
    plan = plan_validation(data, holdout_fraction=0.2, seed=3)
    assert len(plan.train_idx) == 120_000
    assert plan.n_folds == 2 and plan.partition_folds == PARTITION_FOLDS
    for fit, valid in plan.folds:
        assert len(valid) == pytest.approx(24_000, abs=2)  # a fifth of the search rows
        assert len(fit) + len(valid) == 120_000 and not np.intersect1d(fit, valid).size
    assert not np.intersect1d(plan.folds[0][1], plan.folds[1][1]).size
    # Asking for k folds still gives k folds, whatever the rows.
    assert plan_validation(data, n_folds=5, seed=3).n_folds == 5


def test_single_split_standard_error_matches_the_textbook_formula() -> None:
    # Log loss is a mean of per-row losses; the standard error of a mean is
    # sd(per-row loss) / sqrt(n) (any statistics handbook). Batch means must agree.
    rng = np.random.default_rng(1)
    n = 60_000
    p = rng.uniform(0.05, 0.95, n)
    y = (rng.random(n) < p).astype("int64")
    per_row = -(y * np.log(p) + (1 - y) * np.log(1 - p))
    textbook = per_row.std(ddof=1) / math.sqrt(n)
    se = split_standard_error(get_metric("log_loss", "binary"), y, p, None)
    assert se == pytest.approx(textbook, rel=0.5)
    assert se > 0


def test_one_se_rule_uses_the_recorded_standard_error() -> None:
    def rec(number: int, score: float, leaves: int, se: float | None) -> TrialRecord:
        return TrialRecord(number=number, state="complete", params={"num_leaves": leaves},
                           score=score, score_std=None, fold_scores=[score],
                           boosting_rounds=100, score_se=se)

    records = [rec(0, 0.900, 63, 0.004), rec(1, 0.897, 7, None), rec(2, 0.880, 3, None)]
    chosen, report = select(records, "maximize", "one_se")
    assert report["standard_error"] == 0.004 and chosen.number == 1


def test_single_split_search_reports_score_se_and_no_std(storage_url) -> None:
    data = prepare(_big_frame(260_000, seed=2), target="y")
    plan = plan_validation(data, holdout_fraction=0.2, seed=0)
    assert plan.n_folds == 1
    config = SearchConfig(task="binary", metric="log_loss", n_trials=2, max_rounds=30,
                          early_stopping_rounds=5, num_threads=2)
    seen: list[TrialRecord] = []
    result = run_search(data, plan, config, storage_url=storage_url, study_name="s",
                        on_trial=seen.append)
    assert result.n_complete == 2
    for record in seen:
        assert record.score_std is None and len(record.fold_scores) == 1
        # ~41,600 validation rows, per-row log-loss sd below 1: SE well under 0.005
        assert 0 < record.score_se < SE_BOUND
        assert record.fidelity == 1.0


def test_a_clearly_worse_trial_stops_inside_its_first_fold(make_frame) -> None:
    data = prepare(make_frame("binary", n_rows=2_000), target="cracked", exclude=["kiln"])
    plan = plan_validation(data, n_folds=3, seed=0)
    max_rounds = 400
    objective = CVObjective(
        data, plan, get_metric("log_loss", "binary"), space=DEFAULT_SPACE,
        max_rounds=max_rounds, early_stopping_rounds=400,
        params_base=base_params("binary", num_class=2, metric="log_loss", seed=0,
                                num_threads=1),
    )
    study = optuna.create_study(direction="minimize",
                                pruner=optuna.pruners.MedianPruner(n_startup_trials=1))
    study.enqueue_trial(dict(LIGHTGBM_DEFAULTS))
    # Every split needs a gain of 1 and sees 40% of the columns: it barely leaves the
    # base rate, while the defaults at the same progress are near their best.
    study.enqueue_trial({**LIGHTGBM_DEFAULTS, "min_gain_to_split": 1.0,
                         "feature_fraction": 0.4, "lambda_l1": 10.0, "lambda_l2": 10.0})
    study.optimize(objective, n_trials=2)
    good, bad = study.trials
    assert good.state == TrialState.COMPLETE
    assert bad.state == TrialState.PRUNED
    attrs = trial_attrs(bad)
    assert attrs["fold_scores"] == []  # its first fold never finished
    # First checkpoint: progress 2.5 = 25 rounds at the defaults' learning rate of 0.1.
    first = checkpoints(max_rounds)[0]
    assert attrs["rounds_trained"] == 25 < max_rounds
    assert list(bad.intermediate_values) == [pruner_step(0, first, max_rounds)]


def test_checkpoints_compare_equal_progress_not_equal_rounds() -> None:
    assert checkpoints(1000)[:4] == (25, 50, 100, 200)
    assert checkpoints(1000)[-1] < fold_steps(1000) == 10_000
    # A fold's end lies past all its checkpoints and before the next fold's first one.
    assert pruner_step(0, fold_steps(1000), 1000) < pruner_step(1, 25, 1000)

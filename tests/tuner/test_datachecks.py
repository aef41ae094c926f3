"""Data warnings: leaks, target copies, duplicates across the hold-out, imbalance, size."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import tuner
from examples.demo_data import greenhouse, kilns
from tuner.datachecks import job_warnings, single_feature_power, table_warnings


def _warnings(frame: pd.DataFrame, target: str, **kw) -> list[str]:
    data = tuner.prepare(frame, target=target, **kw)
    # Both demo tables have a date column and random folds; that warning has its own tests
    # (test_date_parts.py), the others are what these tests are about.
    return [w for w in job_warnings(data, tuner.plan_validation(data, n_folds=5, seed=0))
            if "hold dates but the folds" not in w]


@pytest.mark.parametrize("make,target", [(kilns, "defect"), (greenhouse, "yield_kg_per_m2")])
def test_silent_on_the_demo_tables(make, target: str) -> None:
    frame = make()  # the sizes the demo uses
    assert _warnings(frame, target) == []
    assert table_warnings(frame) == []


@pytest.mark.parametrize("make,target", [(kilns, "defect"), (greenhouse, "yield_kg_per_m2")])
def test_leak_fires_on_target_plus_tiny_noise(make, target: str) -> None:
    frame = make(n_rows=500, seed=3)
    y = frame[target].astype("float64")
    frame["sensor_after"] = y + np.random.default_rng(0).normal(0, 0.01 * y.std(), len(y))
    found = _warnings(frame, target)
    assert len(found) == 1 and "'sensor_after'" in found[0] and "leakage" in found[0]


def test_strong_but_honest_feature_is_not_a_leak() -> None:
    rng = np.random.default_rng(1)
    x = rng.normal(size=600)
    frame = pd.DataFrame({"x": x, "other": rng.normal(size=600),
                          "y": x + rng.normal(0, 0.4, 600)})  # |Spearman| about 0.92
    data = tuner.prepare(frame, target="y")
    assert 0.85 < single_feature_power(data)["x"] < tuner.datachecks.LEAK_SHARE
    assert job_warnings(data, tuner.plan_validation(data, seed=0)) == []


def test_copies_of_the_target() -> None:
    frame = kilns(n_rows=400, seed=1)
    frame["verdict"] = np.where(frame["defect"] == 1, "reject", "keep")
    found = _warnings(frame, "defect")
    assert any("'verdict' is a copy of the target" in w for w in found)
    green = greenhouse(n_rows=300, seed=1)
    green["yield_g"] = green["yield_kg_per_m2"] * 1000
    assert any("'yield_g' is a copy" in w for w in _warnings(green, "yield_kg_per_m2"))


def test_identifiers_earn_no_credit() -> None:
    frame = kilns(n_rows=400, seed=1)
    data = tuner.prepare(frame, target="defect", features=["firing_id", "kiln"])
    assert single_feature_power(data)["firing_id"] < 0.2


def test_duplicates_straddling_the_holdout() -> None:
    frame = greenhouse(n_rows=300, seed=2)
    doubled = pd.concat([frame, frame.iloc[:60]], ignore_index=True)
    data = tuner.prepare(doubled, target="yield_kg_per_m2")
    plan = tuner.plan_validation(data, n_folds=5, seed=0)
    found = [w for w in job_warnings(data, plan) if "hold-out row" in w]
    # Count by hand: hold-out rows whose twin (position +-300) is among the search rows.
    train = set(plan.train_idx.tolist())
    twin = {i: i + 300 for i in range(60)} | {i + 300: i for i in range(60)}
    expected = sum(1 for i in plan.holdout_idx.tolist() if twin.get(i) in train)
    assert expected > 0 and found == [found[0]] and found[0].startswith(f"{expected} of ")
    assert "60 row(s) are exact duplicates" in table_warnings(doubled)[0]


def test_imbalance_lists_class_counts() -> None:
    rng = np.random.default_rng(0)
    frame = pd.DataFrame({"x": rng.normal(size=1000),
                          "z": rng.normal(size=1000),
                          "rare": np.r_[np.ones(30, dtype=int), np.zeros(970, dtype=int)]})
    found = [w for w in _warnings(frame, "rare") if "imbalanced" in w]
    assert found and "0: 970" in found[0] and "1: 30" in found[0]
    # It says what to act with: LightGBM's balancing, the positive weight (negatives /
    # positives = 970 / 30 at the top of the range) and a metric that suits rare positives.
    assert "is_unbalance" in found[0] and "scale_pos_weight" in found[0]
    assert '"high": 32.3' in found[0] and "average_precision" in found[0]
    frame["rare"] = np.r_[np.full(20, 2), np.ones(30, dtype=int), np.zeros(950, dtype=int)]
    found = [w for w in _warnings(frame, "rare") if "imbalanced" in w]
    assert found and "weight_column" in found[0]


def test_imbalance_controls_are_checked_and_reach_lightgbm(tmp_path) -> None:
    from tuner.config import SearchConfig, check_config
    from tuner.errors import ConfigError
    from tuner.space import DEFAULT_SPACE, merge_overrides

    rng = np.random.default_rng(0)
    frame = pd.DataFrame({"x": rng.normal(size=400),
                          "rare": (rng.random(400) < 0.1).astype(int)})
    data = tuner.prepare(frame, target="rare")
    both = merge_overrides(DEFAULT_SPACE, {"scale_pos_weight": {"low": 1, "high": 9},
                                           "is_unbalance": True})
    with pytest.raises(ConfigError) as exc:
        check_config(data, SearchConfig(task="binary", metric="roc_auc", space=both))
    assert [e["field"] for e in exc.value.errors] == ["search_space.scale_pos_weight"]
    space = merge_overrides(DEFAULT_SPACE, {"scale_pos_weight": {"low": 1, "high": 9}})
    plan = tuner.plan_validation(data, n_folds=3, seed=0)
    config = SearchConfig(task="binary", metric="roc_auc", space=space, n_trials=3,
                          max_rounds=20, early_stopping_rounds=5)
    result = tuner.run_search(data, plan, config, storage_url=f"sqlite:///{tmp_path}/s.db",
                              study_name="w")
    weight = result.best.params["scale_pos_weight"]
    assert 1 <= weight <= 9
    fitted = tuner.fit_final(data, plan, config, result.best)
    # LightGBM's own model file records the weight it trained with.
    assert f"[scale_pos_weight: {weight:g}" in fitted.booster.model_to_string()


def test_too_few_rows_for_the_columns() -> None:
    rng = np.random.default_rng(0)
    frame = pd.DataFrame(rng.normal(size=(60, 12)), columns=[f"c{i}" for i in range(12)])
    found = _warnings(frame, "c0")
    assert any("48 search rows for 11 feature column(s)" in w for w in found), found
    assert any("60 rows for 11 feature column(s)" in w for w in table_warnings(frame))

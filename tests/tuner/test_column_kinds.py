"""Column kinds the user declares: at read time, in prepare(), in the model LightGBM writes."""

from __future__ import annotations

import re

import numpy as np
import pandas as pd
import pytest

from tuner import SearchConfig, fit_final, plan_validation, prepare, read_table, run_search
from tuner.columns import MAX_DECLARED_LEVELS
from tuner.errors import DatasetError
from tuner.profile import profile_table


def _stores(n: int = 400, seed: int = 5) -> pd.DataFrame:
    """Sales by store; store ids are digit strings with leading zeros, and the target
    depends on the store in no numeric order."""
    rng = np.random.default_rng(seed)
    stores = np.array(["0007", "0042", "0100", "0013", "0301", "0099"])
    effect = dict(zip(stores, [2.0, -1.0, 1.5, -2.0, 0.5, 0.0], strict=True))
    store = rng.choice(stores, n)
    footfall = rng.normal(100, 20, n)
    sales = np.array([effect[s] for s in store]) + footfall / 50 + rng.normal(0, 0.3, n)
    return pd.DataFrame({"store_id": store, "footfall": footfall, "sales": sales})


def _csv(tmp_path, frame: pd.DataFrame):
    path = tmp_path / "stores.csv"
    frame.to_csv(path, index=False)
    return path


def _categorical_in_model_file(model_text: str) -> list[str]:
    """Feature names LightGBM's own model file lists as categorical (its parameters
    section holds ``[categorical_feature: i,j]``, its header ``feature_names=``)."""
    names = re.search(r"^feature_names=(.*)$", model_text, re.M).group(1).split(" ")
    found = re.search(r"^\[categorical_feature: (.*)\]$", model_text, re.M)
    indices = [int(i) for i in found.group(1).split(",") if i.strip()] if found else []
    return [names[i] for i in indices]


def _model_text(frame: pd.DataFrame, tmp_path, **kinds) -> tuple[str, object]:
    data = prepare(frame, target="sales", task="regression", column_kinds=kinds or None)
    plan = plan_validation(data, n_folds=3, holdout_fraction=0.2, seed=0)
    config = SearchConfig(task="regression", metric="rmse", n_trials=2, max_rounds=40,
                          early_stopping_rounds=5)
    result = run_search(data, plan, config, storage_url=f"sqlite:///{tmp_path}/s.db",
                        study_name="k")
    fitted = fit_final(data, plan, config, result.best)
    return fitted.booster.model_to_string(), data


def test_declared_text_keeps_leading_zeros_when_read(tmp_path) -> None:
    path = _csv(tmp_path, _stores())
    plain = read_table(path, "csv")
    kept = read_table(path, "csv", text_columns=["store_id"])
    assert plain["store_id"].dtype.kind in "if"  # pandas' own inference: numbers
    assert sorted(kept["store_id"].unique()) == ["0007", "0013", "0042", "0099", "0100",
                                                  "0301"]
    profiles, _ = profile_table(kept, {"store_id": "categorical"})
    assert profiles[0].kind == "categorical" and profiles[0].declared == "categorical"


def test_digits_declared_categorical_reach_lightgbm_as_categorical(tmp_path) -> None:
    path = _csv(tmp_path, _stores())
    (tmp_path / "a").mkdir()
    (tmp_path / "b").mkdir()
    declared, data = _model_text(read_table(path, "csv", text_columns=["store_id"]),
                                 tmp_path / "a", store_id="categorical")
    spec = data.schema.features[data.schema.columns.index("store_id")]
    assert spec.kind == "categorical" and "0007" in spec.levels
    assert _categorical_in_model_file(declared) == ["store_id"]
    # Without the declaration the same digits are a number to LightGBM.
    undeclared, data = _model_text(read_table(path, "csv"), tmp_path / "b")
    assert data.schema.features[data.schema.columns.index("store_id")].kind == "numeric"
    assert _categorical_in_model_file(undeclared) == []


def test_declared_kinds_are_checked_and_name_the_column() -> None:
    frame = _stores()
    frame["note"] = [f"remark {i}" for i in range(len(frame))]
    frame["many"] = [f"level{i % (MAX_DECLARED_LEVELS + 5)}" for i in range(len(frame))]
    big = pd.concat([frame] * 3, ignore_index=True)
    big["many"] = [f"level{i}" for i in range(len(big))]
    with pytest.raises(DatasetError) as exc:
        prepare(big, target="sales", column_kinds={
            "note": "numeric", "many": "categorical", "nope": "numeric",
            "footfall": "colour", "sales": "categorical", "store_id": "datetime"})
    fields = {e["field"]: e["message"] for e in exc.value.errors}
    assert set(fields) == {"column_kinds.note", "column_kinds.many", "column_kinds.nope",
                           "column_kinds.footfall", "column_kinds.sales",
                           "column_kinds.store_id"}
    assert "not numbers" in fields["column_kinds.note"]
    assert f"{len(big)} distinct values" in fields["column_kinds.many"]


def test_ignore_and_text_keep_columns_out_and_numeric_wins_over_inference() -> None:
    frame = _stores()
    frame["code"] = frame["store_id"].astype(str)
    data = prepare(frame, target="sales", column_kinds={"store_id": "ignore",
                                                       "code": "text"})
    assert data.schema.names == ["footfall"]
    data = prepare(frame, target="sales", column_kinds={"store_id": "numeric"})
    assert data.schema.features[data.schema.columns.index("store_id")].kind == "numeric"
    assert sorted(set(data.X["store_id"])) == [7.0, 13.0, 42.0, 99.0, 100.0, 301.0]

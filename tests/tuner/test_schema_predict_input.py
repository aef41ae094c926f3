"""Prediction input is checked against the schema and encoded exactly as in training."""

from __future__ import annotations

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest

from tuner import FeatureSchema, PredictionInputError, prepare
from tuner.errors import MAX_ERRORS, ConfigError


@pytest.fixture
def trained(make_frame):
    frame = make_frame("binary", n_rows=200)
    data = prepare(frame, target="cracked", exclude=["weight", "kiln"])
    params = {"objective": "binary", "verbosity": -1, "num_threads": 1, "seed": 0,
              "min_data_in_leaf": 5, "max_cat_to_onehot": 1}
    booster = lgb.train(params, lgb.Dataset(data.X, data.y), num_boost_round=20)
    return frame, data, booster


def test_rows_in_another_order_and_level_subset_predict_like_training(trained) -> None:
    frame, data, booster = trained
    # Rows whose clay bodies cover only two of the four levels, in shuffled order.
    subset = frame.index[frame["clay_body"].isin(["raku", "stoneware"])].to_numpy()
    picked = np.random.default_rng(1).permutation(subset)[:25]
    rows = frame.loc[picked].to_dict(orient="records")
    built, ignored = data.schema.frame_from_rows(rows)
    assert ignored == ["cracked", "kiln", "weight"]
    assert list(built.columns) == data.schema.names
    reference = data.X.iloc[picked]  # no target was missing, so positions are unchanged
    np.testing.assert_array_equal(built["clay_body"].cat.codes.to_numpy(),
                                  reference["clay_body"].cat.codes.to_numpy())
    np.testing.assert_array_equal(booster.predict(built), booster.predict(reference))


def test_table_input_predicts_like_training(trained) -> None:
    frame, data, booster = trained
    table = frame.iloc[::-1].drop(columns=["cracked"])  # reversed order, target absent
    built, ignored = data.schema.frame_from_table(table)
    assert ignored == ["kiln", "weight"]
    reference = data.X.iloc[::-1]
    np.testing.assert_array_equal(booster.predict(built), booster.predict(reference))


def _row(**overrides):
    row = {"temp_c": 1210.0, "clay_body": "porcelain", "glazed": "true",
           "fired_on": "2024-03-01"}
    row.update(overrides)
    return row


def test_nulls_are_missing_values(trained) -> None:
    _, data, _ = trained
    built, _ = data.schema.frame_from_rows([_row(temp_c=None, clay_body=None, glazed=None,
                                                 fired_on=None)])
    assert built.isna().all(axis=None)


def test_json_spellings_are_accepted(trained) -> None:
    _, data, _ = trained
    built, _ = data.schema.frame_from_rows([
        _row(temp_c="1210.5", glazed=True, fired_on="2024-03-01T12:00:00Z"),
        _row(temp_c=1200, glazed="FALSE"),
    ])
    assert built["temp_c"].tolist() == [1210.5, 1200.0]
    assert built["glazed"].tolist() == [1.0, 0.0]
    # Reference: pandas' Timestamp (2024-03-01 was a Friday, weekday 4).
    stamp = pd.Timestamp("2024-03-01T12:00:00Z")
    assert built["fired_on.elapsed_days"].iloc[0] == stamp.timestamp() / 86400
    assert built["fired_on.weekday"].iloc[0] == stamp.day_of_week == 4


@pytest.mark.parametrize(
    ("row", "field"),
    [
        ({"clay_body": "raku", "glazed": "true", "fired_on": "2024-01-01"}, "rows[0].temp_c"),
        (_row(temp_c="hot"), "rows[0].temp_c"),
        (_row(temp_c=True), "rows[0].temp_c"),
        (_row(glazed="maybe"), "rows[0].glazed"),
        (_row(fired_on="yesterday"), "rows[0].fired_on"),
        (_row(clay_body=["raku"]), "rows[0].clay_body"),
    ],
)
def test_row_errors_name_row_and_column(trained, row, field) -> None:
    _, data, _ = trained
    with pytest.raises(PredictionInputError) as info:
        data.schema.frame_from_rows([row])
    assert [e["field"] for e in info.value.errors] == [field]


def test_unseen_levels(trained) -> None:
    _, data, _ = trained
    rows = [_row(clay_body="bone china"), _row(), _row(clay_body="paper clay")]
    with pytest.raises(PredictionInputError) as info:
        data.schema.frame_from_rows(rows)
    [error] = info.value.errors
    assert error["field"] == "clay_body"
    assert "'bone china'" in error["message"] and "'paper clay'" in error["message"]
    built, _ = data.schema.frame_from_rows(rows, unseen="missing")
    assert built["clay_body"].isna().tolist() == [True, False, True]
    with pytest.raises(ConfigError):
        data.schema.frame_from_rows(rows, unseen="ignore")


def test_errors_are_collected_and_capped(trained) -> None:
    _, data, _ = trained
    with pytest.raises(PredictionInputError) as info:
        data.schema.frame_from_rows([{} for _ in range(100)])
    assert len(info.value.errors) == MAX_ERRORS
    with pytest.raises(PredictionInputError):
        data.schema.frame_from_rows([])
    with pytest.raises(PredictionInputError) as info:
        data.schema.frame_from_rows(["not an object"])
    assert info.value.errors[0]["field"] == "rows[0]"


def test_table_errors_name_columns_and_lines(trained) -> None:
    frame, data, _ = trained
    with pytest.raises(PredictionInputError) as info:
        data.schema.frame_from_table(frame.drop(columns=["glazed"]))
    assert info.value.errors[0]["field"] == "glazed"
    bad = frame.head(5).assign(temp_c=["1", "2", "hot", "4", "5"])
    with pytest.raises(PredictionInputError) as info:
        data.schema.frame_from_table(bad)
    [error] = info.value.errors
    assert error["field"] == "temp_c" and "line 4" in error["message"]


def test_schema_round_trips_through_dict(trained) -> None:
    _, data, _ = trained
    assert FeatureSchema.from_dict(data.schema.to_dict()) == data.schema
    assert data.schema.to_dict()["features"][1] == {
        "name": "clay_body", "kind": "categorical",
        "levels": ["earthenware", "porcelain", "raku", "stoneware"],
    }

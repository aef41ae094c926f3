"""The JSON-rows fast path must predict exactly what LightGBM's own pandas path does."""

from __future__ import annotations

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest

import tuner
from examples.demo_data import greenhouse, kilns


def _fit(frame: pd.DataFrame, target: str) -> tuple[tuner.Predictor, tuner.PreparedData]:
    data = tuner.prepare(frame, target=target)
    params = {"objective": "binary" if data.task == "binary" else "regression",
              "verbosity": -1, "num_threads": 1, "seed": 0}
    booster = lgb.train(params, lgb.Dataset(data.X, data.y), num_boost_round=20)
    # Round trip through the model text, as the service does.
    booster = lgb.Booster(model_str=booster.model_to_string())
    return tuner.Predictor(booster, data.schema, data.task, data.classes), data


def _rows(frame: pd.DataFrame, names: list[str]) -> list[dict]:
    out = []
    for record in frame[names].to_dict(orient="records"):
        out.append({k: (None if pd.isna(v) else v) for k, v in record.items()})
    return out


@pytest.mark.parametrize(("make", "target"), [(kilns, "defect"), (greenhouse, "yield_kg_per_m2")])
def test_fast_rows_equal_lightgbm_on_pandas(make, target) -> None:
    frame = make(n_rows=300, seed=5)
    predictor, data = _fit(frame, target)
    assert "datetime" in [f.kind for f in data.schema.features]  # dates take it too
    rows = _rows(frame.head(50), list(data.schema.columns))
    assert predictor._rows.encode(rows) is not None  # the fast path is taken
    fast = predictor.predict_rows(rows)
    # Reference: LightGBM's own predict on the training-form pandas frame.
    expected = predictor.booster.predict(data.X.head(50))
    got = (np.array(fast["probabilities"])[:, 1] if data.task == "binary"
           else np.array(fast["predictions"]))
    np.testing.assert_allclose(got, expected, rtol=0, atol=1e-12)


def test_rows_needing_validation_fall_back_with_the_same_errors() -> None:
    frame = kilns(n_rows=300, seed=5)
    predictor, data = _fit(frame, "defect")
    row = _rows(frame.head(1), list(data.schema.columns))[0]
    for bad in ({**row, "clay_body": "basalt"}, {**row, "peak_temp_c": "hot"},
                {**row, "fired_on": "14 March 2026"},
                {k: v for k, v in row.items() if k != "kiln"}):
        assert predictor._rows.encode([bad]) is None
        with pytest.raises(tuner.PredictionInputError):
            predictor.predict_rows([bad])
    # An unseen level with unseen="missing" takes the full path and predicts like NaN.
    nan_row = {**row, "clay_body": None}
    assert predictor.predict_rows([{**row, "clay_body": "basalt"}], unseen="missing") == \
        predictor.predict_rows([nan_row])
    extra = predictor.predict_rows([{**row, "note": "x"}])
    assert extra["ignored_columns"] == ["note"]

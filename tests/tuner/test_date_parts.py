"""Dates as features: calendar parts at training and prediction time, against pandas' own
``.dt`` accessors."""

from __future__ import annotations

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest

import tuner
from tuner.datachecks import job_warnings
from tuner.schema import FeatureSchema

STAMPS = ["2024-01-01T00:30:00", "2024-02-29T23:59:59", "2023-12-31T12:00:00+05:00",
          "2024-07-14T08:15:00Z", "2024-03-31T01:30:00", None, "2025-11-05T17:45:30.250"]


def _orders(n: int = 300, seed: int = 4, times: bool = True) -> pd.DataFrame:
    """A pottery studio's orders: pick-ups on Saturdays take longer to pack."""
    rng = np.random.default_rng(seed)
    start = pd.Timestamp("2024-01-01")
    offsets = pd.to_timedelta(rng.integers(0, 365 * 24 * 60, n), unit="min")
    stamps = start + offsets if times else (start + offsets).normalize()
    size = rng.uniform(1, 10, n)
    minutes = 5 * size + 15 * (stamps.day_of_week == 5) + rng.normal(0, 1, n)
    fmt = "%Y-%m-%dT%H:%M:%S" if times else "%Y-%m-%d"
    return pd.DataFrame({"ordered_at": pd.Series(stamps.strftime(fmt), dtype="str"),
                         "size": size, "pack_minutes": minutes})


def _pandas_parts(values) -> dict[str, np.ndarray]:
    """Reference: pandas' .dt accessors on UTC timestamps (naive ones taken as UTC)."""
    stamps = pd.to_datetime(pd.Series(values, dtype=object), format="ISO8601", utc=True)
    return {"weekday": stamps.dt.day_of_week, "day": stamps.dt.day, "month": stamps.dt.month,
            "hour": stamps.dt.hour,
            "elapsed_days": (stamps - pd.Timestamp("1970-01-01", tz="UTC"))
            / pd.Timedelta(days=1)}


def _assert_parts(frame: pd.DataFrame, column: str, values, parts) -> None:
    expected = _pandas_parts(values)
    for part in parts:
        got = frame[f"{column}.{part}"].to_numpy(dtype="float64")
        want = expected[part].to_numpy(dtype="float64", na_value=np.nan)
        np.testing.assert_allclose(got, want, rtol=1e-12, equal_nan=True, err_msg=part)


def test_training_parts_equal_pandas_dt_accessors() -> None:
    frame = _orders()
    data = tuner.prepare(frame, target="pack_minutes")
    spec = data.schema.features[data.schema.columns.index("ordered_at")]
    assert spec.parts == ("weekday", "day", "month", "hour", "elapsed_days")
    assert [n for n in data.schema.names if n.startswith("ordered_at")] == [
        "ordered_at.weekday", "ordered_at.day", "ordered_at.month", "ordered_at.hour",
        "ordered_at.elapsed_days"]
    assert list(data.X.columns) == data.schema.names
    _assert_parts(data.X, "ordered_at", frame["ordered_at"], spec.parts)


def test_bare_dates_have_no_hour() -> None:
    data = tuner.prepare(_orders(times=False), target="pack_minutes")
    assert data.schema.features[0].parts == ("weekday", "day", "month", "elapsed_days")


@pytest.mark.parametrize("how", ["rows", "table"])
def test_prediction_parts_equal_pandas_dt_accessors(how) -> None:
    data = tuner.prepare(_orders(), target="pack_minutes")
    schema = FeatureSchema.from_dict(data.schema.to_dict())  # as a served model has it
    if how == "rows":
        frame, _ = schema.frame_from_rows([{"ordered_at": s, "size": 1.0} for s in STAMPS])
    else:
        frame, _ = schema.frame_from_table(pd.DataFrame({"ordered_at": STAMPS, "size": 1.0}))
    _assert_parts(frame, "ordered_at", STAMPS, schema.features[0].parts)


def test_fast_row_path_derives_the_same_parts(tmp_path) -> None:
    frame = _orders()
    data = tuner.prepare(frame, target="pack_minutes")
    booster = lgb.train({"objective": "regression", "verbosity": -1, "num_threads": 1},
                        lgb.Dataset(data.X, data.y), num_boost_round=30)
    booster = lgb.Booster(model_str=booster.model_to_string())
    predictor = tuner.Predictor(booster, data.schema, data.task, data.classes)
    rows = [{"ordered_at": s, "size": 2.0} for s in STAMPS if s is not None]
    rows = [r for r in rows if "." not in r["ordered_at"]]  # the fast path's plain shapes
    encoded = predictor._rows.encode(rows)
    assert encoded is not None
    reference, _ = data.schema.frame_from_rows(rows)
    np.testing.assert_allclose(encoded[0], reference.to_numpy(dtype="float64"), rtol=1e-12)
    # Reference: LightGBM's own predict on the pandas-built frame.
    np.testing.assert_allclose(predictor.predict_rows(rows)["predictions"],
                               booster.predict(reference), rtol=1e-12)


def test_the_weekday_is_learnable() -> None:
    # Saturdays add 15 minutes; the model should split on the weekday part.
    data = tuner.prepare(_orders(n=600), target="pack_minutes")
    booster = lgb.train({"objective": "regression", "verbosity": -1, "num_threads": 1},
                        lgb.Dataset(data.X, data.y), num_boost_round=50)
    gain = dict(zip(data.schema.names, booster.feature_importance("gain"), strict=True))
    assert gain["ordered_at.weekday"] > gain["ordered_at.month"]
    assert gain["ordered_at.weekday"] > gain["ordered_at.day"]


def test_dates_with_random_folds_are_warned_about() -> None:
    data = tuner.prepare(_orders(), target="pack_minutes", time_column=None)
    plan = tuner.plan_validation(data, n_folds=3, holdout_fraction=0.2, seed=0)
    assert any("'ordered_at' hold dates" in w and "cv.strategy 'time'" in w
               for w in job_warnings(data, plan))
    frame = _orders()
    frame["when"] = frame["ordered_at"]
    timed = tuner.prepare(frame, target="pack_minutes", time_column="when")
    plan = tuner.plan_validation(timed, strategy="time", n_folds=3, holdout_fraction=0.2,
                                 seed=0)
    assert not any("hold dates" in w for w in job_warnings(timed, plan))

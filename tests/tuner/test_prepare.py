"""Task inference and turning tables into model-ready data."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from tuner import DatasetError, infer_task, prepare


@pytest.mark.parametrize(
    ("values", "task"),
    [
        (pd.Series([True, False, True]), "binary"),
        (pd.Series(["yes", "no", "yes", None], dtype="str"), "binary"),
        (pd.Series(["a", "b", "c"], dtype="str"), "multiclass"),
        (pd.Series([3, 7, 3]), "binary"),
        (pd.Series([0.0, 1.0, np.nan]), "binary"),
        (pd.Series([0, 1, 2, 2, 1]), "multiclass"),
        (pd.Series([1, 2, 3, 3]), "regression"),  # not 0..k-1: looks like a count
        (pd.Series(list(range(11)) * 2), "regression"),  # more than 10 distinct values
        (pd.Series([0.5, 1.5, 2.5]), "regression"),
    ],
)
def test_infer_task(values, task) -> None:
    assert infer_task(values) == task


def test_prepare_converts_every_kind(make_frame) -> None:
    frame = make_frame("binary", n_rows=60)
    frame.loc[[1, 2], "cracked"] = None
    frame.loc[3, "glazed"] = None
    data = prepare(frame, target="cracked", exclude=["weight"], group_column="kiln")
    assert data.task == "binary" and data.classes == ["no", "yes"]
    assert data.schema.columns == ["temp_c", "clay_body", "glazed", "fired_on"]
    assert data.schema.names == ["temp_c", "clay_body", "glazed", "fired_on.weekday",
                                 "fired_on.day", "fired_on.month", "fired_on.elapsed_days"]
    assert len(data.X) == len(data.y) == 58 and data.warnings[0].startswith("dropped 2 row")
    assert data.X["temp_c"].dtype == np.float64
    assert data.X["clay_body"].cat.categories.tolist() == sorted(set(frame["clay_body"]))
    assert set(data.X["glazed"].dropna()) == {0.0, 1.0} and data.X["glazed"].isna().sum() == 1
    kept = frame.dropna(subset=["cracked"]).reset_index(drop=True)
    # Reference: pandas' own datetime arithmetic and accessors on the same dates.
    stamps = pd.to_datetime(kept["fired_on"])
    expected = (stamps - pd.Timestamp("1970-01-01")).dt.total_seconds() / 86400
    np.testing.assert_array_equal(data.X["fired_on.elapsed_days"].to_numpy(), expected.to_numpy())
    np.testing.assert_array_equal(data.X["fired_on.month"].to_numpy(), stamps.dt.month)
    np.testing.assert_array_equal(data.y, (kept["cracked"] == "yes").astype(int).to_numpy())
    assert data.groups is not None and data.groups.dtype == np.int64
    assert not any(str(d) == "str" for d in data.X.dtypes)  # LightGBM rejects pandas str


def test_labels_are_python_scalars_in_sorted_order() -> None:
    frame = pd.DataFrame({"x": np.arange(9.0), "y": [2.0, 0.0, 1.0] * 3})
    data = prepare(frame, target="y")
    assert data.task == "multiclass" and data.classes == [0, 1, 2]
    assert all(type(c) is int for c in data.classes)
    flags = pd.DataFrame({"x": np.arange(4.0), "y": ["TRUE", "false", "True", "FALSE"]})
    assert prepare(flags, target="y").classes == [False, True]


def test_text_columns_are_left_out_unless_requested() -> None:
    n = 30
    frame = pd.DataFrame({"note": [f"free text {i}" for i in range(n)],
                          "x": np.arange(n) % 7, "y": np.arange(n) % 2})
    data = prepare(frame, target="y")
    assert data.schema.names == ["x"]
    assert any("'note' looks like free text" in w for w in data.warnings)
    chosen = prepare(frame, target="y", features=["note", "x"])
    assert [f.kind for f in chosen.schema.features] == ["categorical", "numeric"]


def _field(exc: pytest.ExceptionInfo) -> set[str]:
    return {e["field"] for e in exc.value.errors}


@pytest.mark.parametrize(
    ("kwargs", "field"),
    [
        ({"target": "nope"}, "target"),
        ({"target": "y", "features": ["x", "missing"]}, "features"),
        ({"target": "y", "exclude": ["ghost"]}, "exclude"),
        ({"target": "y", "features": ["y"]}, "features"),
        ({"target": "y", "exclude": ["x", "s", "w", "bad_w", "const_s", "inf_y"]}, "features"),
        ({"target": "s", "task": "regression"}, "task"),
        ({"target": "s", "task": "binary"}, "task"),
        ({"target": "const_s"}, "target"),
        ({"target": "inf_y"}, "target"),
        ({"target": "y", "task": "ranking"}, "task"),
        ({"target": "y", "weight_column": "s"}, "weight_column"),
        ({"target": "y", "weight_column": "bad_w"}, "weight_column"),
        ({"target": "y", "group_column": "ghost"}, "group_column"),
        ({"target": "y", "time_column": "s"}, "time_column"),
    ],
)
def test_prepare_errors_name_the_field(kwargs, field) -> None:
    frame = pd.DataFrame({
        "x": [1.0, 2.0, 3.0, 4.0, 5.0, 6.0],
        "y": [0, 1, 0, 1, 0, 1],
        "s": pd.Series(["a", "b", "c", "a", "b", "c"], dtype="str"),
        "w": [1.0] * 6,
        "bad_w": [1.0, -1.0, 1.0, 1.0, 1.0, 1.0],
        "const_s": pd.Series(["k"] * 6, dtype="str"),
        "inf_y": [1.0, np.inf, 2.0, 3.0, 4.0, 5.0],
    })
    with pytest.raises(DatasetError) as info:
        prepare(frame, **kwargs)
    assert field in _field(info)
    assert isinstance(info.value, ValueError)


def test_missing_target_lists_available_columns() -> None:
    with pytest.raises(DatasetError) as info:
        prepare(pd.DataFrame({"a": [1], "b": [2]}), target="c")
    assert "available columns: a, b" in info.value.errors[0]["message"]


def test_weights_and_times_are_carried() -> None:
    frame = pd.DataFrame({
        "x": np.arange(8.0), "y": np.arange(8.0) * 1.5, "w": np.linspace(0.5, 2, 8),
        "t": pd.Series(pd.date_range("2024-01-01", periods=8).strftime("%Y-%m-%d"), dtype="str"),
    })
    data = prepare(frame, target="y", weight_column="w", time_column="t")
    assert data.task == "regression" and data.schema.names == ["x"]
    np.testing.assert_allclose(data.weight, frame["w"])
    assert np.all(np.diff(data.times) == 86400.0)

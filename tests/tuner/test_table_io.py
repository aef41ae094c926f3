"""Reading uploads and inferring column kinds."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pytest

from tuner import DatasetError, profile_table, read_table


def _write(tmp_path, text: str | bytes, name: str = "t.csv"):
    path = tmp_path / name
    if isinstance(text, bytes):
        path.write_bytes(text)
    else:
        path.write_text(text, encoding="utf-8")
    return path


def test_reads_csv_with_bom_and_default_dtypes(tmp_path) -> None:
    path = _write(tmp_path, "\ufeffa,b,c\n1,x,true\n2,y,false\n")
    frame = read_table(path, "csv")
    assert list(frame.columns) == ["a", "b", "c"]  # the BOM is not part of the first name
    assert frame["a"].dtype == np.int64
    assert frame["b"].dtype == "str"


@pytest.mark.parametrize(
    ("text", "field", "fragment"),
    [
        ("a,b\n1,2\n3,4,5\n6,7\n", "line 3", "line 3"),
        ("", "file", "empty"),
        ("\n\n", "file", "empty"),
        ("a,b,c\n", "file", "no data rows"),
        ("a,b,a\n1,2,3\n", "a", "duplicate column name 'a'"),
        ("a,,c\n1,2,3\n", "column 2", "no name"),
    ],
    ids=["ragged-row", "empty", "blank-lines", "header-only", "duplicate", "unnamed"],
)
def test_csv_errors_name_what_and_where(tmp_path, text, field, fragment) -> None:
    with pytest.raises(DatasetError) as info:
        read_table(_write(tmp_path, text), "csv")
    assert info.value.errors[0]["field"] == field
    assert fragment in str(info.value)


def test_invalid_utf8_reports_the_line(tmp_path) -> None:
    path = _write(tmp_path, b"a,b\n1,ok\n2,caf\xe9\n")
    with pytest.raises(DatasetError) as info:
        read_table(path, "csv")
    assert info.value.errors[0]["field"] == "line 3"


def test_parquet_round_trip_drops_arrow_dtypes(tmp_path) -> None:
    frame = pd.DataFrame({
        "n": pd.array([1, None, 3], dtype="int64[pyarrow]"),
        "s": pd.array(["a", None, "b"], dtype=pd.ArrowDtype(pa.string())),
        "b": pd.array([True, None, False], dtype="bool[pyarrow]"),
        "t": pd.array(["2024-01-01", None, "2024-02-01"], dtype="timestamp[us][pyarrow]"),
    })
    path = tmp_path / "t.parquet"
    frame.to_parquet(path)
    back = read_table(path, "parquet")
    assert not any(isinstance(d, pd.ArrowDtype) for d in back.dtypes)
    assert back["n"].dtype == np.float64 and back["s"].dtype == "str"
    assert str(back["t"].dtype).startswith("datetime64")
    assert [p.kind for p in profile_table(back)[0]] == ["numeric", "categorical", "boolean",
                                                        "datetime"]


def test_invalid_parquet(tmp_path) -> None:
    with pytest.raises(DatasetError, match="Parquet"):
        read_table(_write(tmp_path, "not parquet", "x.parquet"), "parquet")


def test_unknown_format(tmp_path) -> None:
    with pytest.raises(DatasetError) as info:
        read_table(_write(tmp_path, "a\n1\n"), "xlsx")
    assert info.value.errors[0]["field"] == "format"


def test_kind_inference() -> None:
    n = 40
    frame = pd.DataFrame({
        "flag": pd.Series(["True", "false", "TRUE", None] * 10, dtype="str"),
        "real_bool": [True, False] * 20,
        "num": np.arange(n) * 0.5,
        "day": pd.Series(["2024-01-02", "2024-03-04T10:00:00Z", None, "2024-05-06 08:30"] * 10,
                         dtype="str"),
        "stamp": pd.date_range("2024-01-01", periods=n),
        "colour": pd.Series(["red", "green", "blue", "red"] * 10, dtype="str"),
        "note": pd.Series([f"note {i}" for i in range(n)], dtype="str"),
        "year_like": pd.Series(["2020", "2021"] * 20, dtype="str"),
    })
    profiles, _ = profile_table(frame)
    kinds = {p.name: p.kind for p in profiles}
    assert kinds == {
        "flag": "boolean", "real_bool": "boolean", "num": "numeric", "day": "datetime",
        "stamp": "datetime", "colour": "categorical", "note": "text",
        "year_like": "categorical",  # bare years are not ISO-8601 dates
    }
    flag = next(p for p in profiles if p.name == "flag")
    assert (flag.missing, flag.distinct) == (10, 2)


def test_categorical_versus_text_threshold() -> None:
    # 10 non-missing values: up to max(2, 0.5 * 10) = 5 distinct is categorical.
    five = pd.Series(list("abcde") * 2, dtype="str")
    six = pd.Series(list("abcdef") + list("abcd"), dtype="str")
    kinds = [p.kind for p in profile_table(pd.DataFrame({"five": five, "six": six}))[0]]
    assert kinds == ["categorical", "text"]


def test_profile_warnings() -> None:
    n = 25
    frame = pd.DataFrame({
        "row_id": np.arange(n),
        "code": pd.Series([f"c{i}" for i in range(n)], dtype="str"),
        "const": [7] * n,
        "x": np.tile([0.5, 1.5, 2.5, 3.5, 4.5], 5),
    })
    _, warnings = profile_table(frame)
    text = "\n".join(warnings)
    assert "'row_id' looks like an identifier" in text
    assert "'code' looks like an identifier" in text
    assert "'code' looks like free text" in text and "will not be used as features" in text
    assert "'const' is constant" in text
    assert "'x'" not in text


def test_short_tables_are_not_flagged_as_ids() -> None:
    _, warnings = profile_table(pd.DataFrame({"row_id": np.arange(10)}))
    assert not any("identifier" in w for w in warnings)

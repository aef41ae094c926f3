"""pyarrow is the one CSV parser. Where its reading of a cell differs from pandas'
``read_csv`` (C engine), the difference is one we document (DEVELOPERS.md, "Reading CSV
files"); everywhere else it must give exactly what pandas gives."""

from __future__ import annotations

import math

import numpy as np
import pandas as pd
import pytest

from tuner import profile_table, read_table
from tuner.io.csvcheck import check_csv
from tuner.io.read import _normalise_column
from tuner.profile import _distinct_floats
from tuner.tablechecks import count_duplicate_rows

CELLS = ["1", "-3", "+1", "1.5", "", "NA", "nan", "NAN", "x", "True", "false", "TrUe",
         "2024-01-01", "2024-01-01 10:00", "10:00", "0x10", " 1", "1 ", "inf",
         "99999999999999999999", "18446744073709551615", "1e+5", "None", "caf\u00e9", "  ",
         "007", "#N/A", "<NA>", "Infinity"]

# The documented differences: cell -> (dtype of a column of that cell, its value).
DIFFERENCES = {
    "+1": ("float64", 1.0),  # pandas: int64 1
    "NAN": ("float64", math.nan),  # any case of "nan" is missing; pandas keeps "NAN" as text
    "TrUe": ("str", "TrUe"),  # mixed case stays text; pandas reads it as True
    "18446744073709551615": ("float64", 1.8446744073709552e19),  # pandas: uint64
}


def _pandas_reference(path) -> pd.DataFrame:
    # Reference: pandas.read_csv (C engine), the reader most users prepared files with.
    check_csv(path)
    frame = pd.read_csv(path, engine="c", encoding="utf-8-sig", low_memory=False)
    return pd.DataFrame({n: _normalise_column(n, frame[n]) for n in frame.columns})


def _write(tmp_path, cell: str):
    rows = [f"{cell},{i},{c}" for i, c in enumerate([cell, "", cell, "2", cell])]
    path = tmp_path / "t.csv"
    path.write_text("a,b,c\n" + "\n".join(rows) + "\n", encoding="utf-8")
    return path


@pytest.mark.parametrize("cell", [c for c in CELLS if c not in DIFFERENCES])
def test_parse_matches_pandas(tmp_path, cell: str) -> None:
    path = _write(tmp_path, cell)
    ours, reference = read_table(path, "csv"), _pandas_reference(path)
    pd.testing.assert_frame_equal(ours, reference)
    assert profile_table(ours) == profile_table(reference)


@pytest.mark.parametrize("cell", sorted(DIFFERENCES))
def test_documented_differences(tmp_path, cell: str) -> None:
    path = _write(tmp_path, cell)
    ours, reference = read_table(path, "csv"), _pandas_reference(path)
    dtype, value = DIFFERENCES[cell]
    assert str(ours["a"].dtype) == dtype
    first = ours["a"].iloc[0]
    assert (math.isnan(first) and math.isnan(value)) if isinstance(value, float) and \
        math.isnan(value) else first == value
    # It is a real difference: pandas reads the column otherwise.
    assert str(reference["a"].dtype) != dtype or not reference["a"].equals(ours["a"])
    pd.testing.assert_series_equal(ours["b"], reference["b"])  # the other columns agree


def test_hex_codes_stay_text_even_across_a_read_chunk(tmp_path) -> None:
    # Rows of digits, then a "0x1F" code whose "0" ends the scanner's first 16 MiB chunk.
    path = tmp_path / "t.csv"
    head = "a,b\n" + "1,2\n" * (((16 << 20) - 100) // 4)
    pad = (16 << 20) - len(head) - 1
    path.write_text(head + "7" * pad + "0x1F,3\n")
    frame = read_table(path, "csv")
    assert frame["a"].dtype == "str" and frame["a"].iloc[-1] == "7" * pad + "0x1F"
    assert frame["b"].dtype == "int64"


def test_padded_numbers_are_numbers(tmp_path) -> None:
    path = tmp_path / "t.csv"
    path.write_text("a,b,c\n1, 2, 2.5\n3, 4,x\n")
    frame = read_table(path, "csv")
    assert frame["b"].tolist() == [2, 4] and frame["b"].dtype == "int64"
    assert frame["c"].dtype == "str" and frame["c"].tolist() == [" 2.5", "x"]


def test_type_change_far_down_the_file(tmp_path) -> None:
    # Integers for many blocks, then text: inference must look at the whole file.
    path = tmp_path / "t.csv"
    path.write_text("a,b\n" + "1,2.5\n" * 300_000 + "x,NA\n")
    ours = read_table(path, "csv")
    pd.testing.assert_frame_equal(ours, _pandas_reference(path))
    assert ours["a"].dtype == "str" and ours["b"].isna().sum() == 1


SAMPLE_ROWS = 300_000  # past the first MiB, whose types the parse asks for (arrowcsv)


@pytest.mark.parametrize("first", ["1", "2.5", "true", "2024-01-01", "x"])
@pytest.mark.parametrize("cell", [c for c in CELLS if c not in DIFFERENCES])
def test_a_cell_after_the_sampled_head_is_read_as_pandas_reads_it(tmp_path, first: str,
                                                                  cell: str) -> None:
    # The first MiB says one type; a single later cell may need another (or be missing).
    path = tmp_path / "t.csv"
    path.write_text("a,b\n" + f"{first},1\n" * SAMPLE_ROWS + f"{cell},2\n", encoding="utf-8")
    assert path.stat().st_size > 1 << 20
    ours = read_table(path, "csv")
    pd.testing.assert_frame_equal(ours, _pandas_reference(path))


def test_ragged_row_keeps_its_line_number(tmp_path) -> None:
    path = tmp_path / "t.csv"
    path.write_text("a,b\n" + "1,2\n" * 100_000 + "3\n")
    with pytest.raises(ValueError) as info:
        read_table(path, "csv")
    assert info.value.errors[0]["field"] == "line 100002"  # type: ignore[attr-defined]


def test_duplicate_count_matches_pandas() -> None:
    rng = np.random.default_rng(0)
    for _ in range(200):
        n = int(rng.integers(1, 60))
        frame = pd.DataFrame({
            "f": rng.choice([0.0, -0.0, np.nan, 1.5], n),
            "i": rng.integers(0, 3, n),
            "s": pd.Series(rng.choice(["a", "b", None], n), dtype="str"),
            "c": pd.Categorical(rng.choice(["x", "y"], n)),
            "b": rng.random(n) < 0.5,
            "o": pd.Series(rng.choice(np.array([1, "1", None, 2.0], dtype=object), n),
                           dtype=object),
        })
        cols = list(rng.choice(frame.columns, int(rng.integers(1, 7)), replace=False))
        assert count_duplicate_rows(frame[cols]) == int(frame[cols].duplicated().sum())


def test_distinct_floats_matches_nunique() -> None:
    rng = np.random.default_rng(1)
    for _ in range(500):
        values = rng.choice([0.0, -0.0, np.nan, np.inf, -np.inf, 1.5, 1e-300],
                            int(rng.integers(0, 12)))
        assert _distinct_floats(values) == pd.Series(values, dtype="float64").nunique()


def test_a_big_table_is_profiled_in_threads_with_the_same_result() -> None:
    # Past tuner.profile._THREADED_ROWS the columns are profiled in threads; the counts
    # must be what pandas counts (nunique, isna) column by column.
    rng = np.random.default_rng(3)
    n = 120_000
    values = rng.normal(size=n).round(3)
    values[rng.random(n) < 0.05] = np.nan
    frame = pd.DataFrame({"x": values, "k": rng.integers(0, 40, n),
                          "c": pd.Series(rng.choice(["kiln_a", "kiln_b", None], n), dtype="str"),
                          "flag": rng.random(n) < 0.3})
    profiles, _ = profile_table(frame)
    assert [p.name for p in profiles] == ["x", "k", "c", "flag"]
    for p in profiles:
        assert p.missing == int(frame[p.name].isna().sum())
        assert p.distinct == int(frame[p.name].nunique(dropna=True))
    assert [p.kind for p in profiles] == ["numeric", "numeric", "categorical", "boolean"]

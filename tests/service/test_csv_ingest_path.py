"""A CSV upload never becomes a whole pandas frame in the API process: it is profiled a
column at a time from Arrow and written to Parquet from Arrow. Both must give what the
frame path gives: the same profiles, warnings and duplicate count, and a stored file that
``pandas.read_parquet`` (what the worker reads with) reads back as ``read_table`` reads the
CSV. The two paths are our own; pandas' ``duplicated`` is the outside reference for the
duplicate count."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from service.api.ingest import Received, parse_and_store, profile, write_parquet
from tuner import read_table
from tuner.io.read import read_csv_columns

CELLS = ["1", "-3", "1.5", "", "NA", "NAN", "x", "True", "false", "2024-01-01",
         "2024-01-01 10:00", "0x10", " 1", "inf", "99999999999999999999", "-0.0", "0.0",
         "caf\u00e9", "007", "#N/A"]


def _table(tmp_path, cell: str):
    rows = [f"{cell},{i % 3},{c},{c}" for i, c in enumerate([cell, "", cell, "2", cell] * 3)]
    path = tmp_path / "t.csv"
    path.write_text("a,b,c,d\n" + "\n".join(rows) + "\n", encoding="utf-8")
    return path


def _stored(tmp_path, path, kinds=None):
    received = Received(path=path, size=path.stat().st_size, sha256="", fmt="csv",
                        name="t", kinds=kinds or {})
    dest = tmp_path / "stored.parquet"
    return parse_and_store(received, dest), dest


@pytest.mark.parametrize("cell", CELLS)
def test_column_path_matches_the_frame_path(tmp_path, cell: str) -> None:
    path = _table(tmp_path, cell)
    frame = read_table(path, "csv")
    columns = read_csv_columns(path)
    pd.testing.assert_frame_equal(columns.frame(), frame)
    for index, name in enumerate(columns.names):
        pd.testing.assert_series_equal(columns.series(index), frame[name])

    parsed, dest = _stored(tmp_path, path)
    assert (parsed.rows, parsed.n_columns) == frame.shape
    assert (parsed.profiles, parsed.warnings) == profile(frame)
    # The worker reads the stored table with pandas.read_parquet: the same frame again,
    # as the file the frame path writes gives.
    pd.testing.assert_frame_equal(pd.read_parquet(dest), frame)
    write_parquet(frame, tmp_path / "from_frame.parquet")
    pd.testing.assert_frame_equal(pd.read_parquet(dest),
                                  pd.read_parquet(tmp_path / "from_frame.parquet"))


def test_duplicates_counted_as_pandas_counts_them(tmp_path) -> None:
    rng = np.random.default_rng(5)
    n = 3000
    table = pd.DataFrame({
        "x": rng.choice([0.5, -0.0, 0.0, np.nan, 2.25], n),
        "k": rng.integers(0, 3, n),
        "s": rng.choice(["raku", "stoneware", ""], n),
        "flag": rng.choice(["true", "false", ""], n),
    })
    path = tmp_path / "dups.csv"
    table.to_csv(path, index=False)
    frame = read_table(path, "csv")
    expected = int(frame.duplicated().sum())  # reference: pandas' own duplicated()
    assert expected > 0
    parsed, _ = _stored(tmp_path, path)
    assert any(w.startswith(f"{expected} row(s) are exact duplicates") for w in parsed.warnings)


def test_declared_text_kept_as_written(tmp_path) -> None:
    path = tmp_path / "codes.csv"
    path.write_text("store_id,units\n0042,3\n0007,5\n0042,1\n", encoding="utf-8")
    parsed, dest = _stored(tmp_path, path, kinds={"store_id": "categorical"})
    kinds = {p.name: (p.kind, p.declared) for p in parsed.profiles}
    assert kinds["store_id"] == ("categorical", "categorical")
    assert pd.read_parquet(dest)["store_id"].tolist() == ["0042", "0007", "0042"]


def test_a_big_table_shares_the_pool_with_the_write(tmp_path) -> None:
    """Past 100,000 rows the columns are profiled on the pool the Parquet write runs on."""
    rng = np.random.default_rng(11)
    n = 120_000
    table = pd.DataFrame({"x": rng.normal(size=n).round(2), "k": rng.integers(0, 40, n),
                          "s": rng.choice(["kiln_a", "kiln_b", "kiln_c"], n),
                          "y": rng.integers(0, 2, n)})
    table.loc[rng.random(n) < 0.05, "x"] = np.nan
    path = tmp_path / "big.csv"
    table.to_csv(path, index=False)
    frame = read_table(path, "csv")
    parsed, dest = _stored(tmp_path, path)
    assert (parsed.profiles, parsed.warnings) == profile(frame)
    assert any(str(int(frame.duplicated().sum())) in w for w in parsed.warnings)
    pd.testing.assert_frame_equal(pd.read_parquet(dest), frame)

"""Upload-time warnings that need only the table: exact duplicate rows, too few rows.

Kept apart from ``tuner.datachecks`` (the job-time checks) so that an upload loads NumPy
and pandas only, not scikit-learn.
"""

from __future__ import annotations

from collections.abc import Callable

import numpy as np
import pandas as pd

__all__ = ["ROWS_PER_COLUMN", "column_key", "count_duplicate_rows", "duplicates_among",
           "mix_key", "row_keys", "shape_warnings", "size_message", "table_warnings"]

#: Common practice: many more rows than columns, at least ten per column (a rule of thumb
#: like the "ten events per variable" rule for regression models; Peduzzi et al., 1996,
#: from memory). With rows comparable to columns, trees cannot choose between variables.
ROWS_PER_COLUMN = 10
_MIX = np.uint64(0x9E3779B97F4A7C15)  # an odd 64-bit constant (the golden ratio's bits)


def table_warnings(frame: pd.DataFrame) -> list[str]:
    """Upload-time warnings that need no target: duplicate rows, too few rows per column."""
    rows, cols = frame.shape
    return shape_warnings(rows, cols, count_duplicate_rows(frame) if rows and cols else 0)


def shape_warnings(rows: int, cols: int, duplicates: int) -> list[str]:
    """:func:`table_warnings` from the table's size and its count of duplicate rows."""
    out: list[str] = []
    if duplicates:
        out.append(f"{duplicates} row(s) are exact duplicates of earlier rows; duplicates that "
                   "land on both sides of a validation split make scores look better")
    if cols > 1 and rows < ROWS_PER_COLUMN * (cols - 1):
        out.append(size_message(rows, cols - 1, "rows"))
    return out


def count_duplicate_rows(frame: pd.DataFrame) -> int:
    """``int(frame.duplicated().sum())``, without factorising every column of a big table.

    Each row gets a 64-bit key mixed from its columns' values (:func:`row_keys`); rows
    that are equal get equal keys. Only rows whose key occurs more than once are compared
    exactly, by ``duplicated`` itself, so a key collision costs time, never a wrong count.
    """
    return duplicates_among(row_keys(frame), lambda rows: frame[rows])


def row_keys(frame: pd.DataFrame) -> np.ndarray:
    """A uint64 per row, mixed from its columns' values in column order."""
    key = np.zeros(len(frame), dtype=np.uint64)
    for name in frame.columns:
        mix_key(key, column_key(frame[name]))
    return key


def mix_key(key: np.ndarray, column: np.ndarray) -> None:
    """Mix one column's :func:`column_key` into the row keys ``key``, in place."""
    key *= _MIX
    key += column


def duplicates_among(key: np.ndarray, rows_of: Callable[[np.ndarray], pd.DataFrame]) -> int:
    """How many rows repeat an earlier row, given every row's key; ``rows_of(mask)`` is the
    table's rows where ``mask`` holds, compared exactly."""
    candidates = pd.Series(key).duplicated(keep=False).to_numpy()
    if not candidates.any():
        return 0
    return int(rows_of(candidates).duplicated().sum())


def column_key(s: pd.Series) -> np.ndarray:
    """uint64 per row (numbers by their bits, anything else by its factorised code), equal
    for values ``duplicated`` treats as equal."""
    dtype = s.dtype
    if isinstance(dtype, np.dtype) and dtype.kind == "f":
        # -0.0 == 0.0, and every NaN is one missing value: give each a single bit pattern.
        v = s.to_numpy(dtype="float64") + 0.0  # a new array, so the NaNs can be set in it
        gaps = np.isnan(v)
        if gaps.any():
            v[gaps] = np.nan
        return v.view(np.uint64)
    if isinstance(dtype, np.dtype) and dtype.kind in "iub":
        return s.to_numpy().astype(np.uint64)
    codes, _ = pd.factorize(s, use_na_sentinel=True)
    return codes.astype(np.uint64)


def size_message(rows: int, columns: int, what: str) -> str:
    return (f"only {rows} {what} for {columns} feature column(s): common practice asks for at "
            f"least {ROWS_PER_COLUMN} rows per column; with fewer, the trees cannot reliably "
            "tell useful columns from lucky ones")

"""Profiling a table's columns: kind, missing and distinct counts, doubtful columns."""

from __future__ import annotations

import contextlib
import os
from collections.abc import Mapping
from concurrent.futures import Executor, ThreadPoolExecutor
from dataclasses import asdict, dataclass, replace
from typing import Any, Protocol

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from tuner.columns import (
    as_level_strings,
    infer_kind,
    kind_of_levels,
    string_levels,
    to_bool_float,
    to_float,
)
from tuner.tablechecks import column_key, mix_key

#: Tables with at least this many rows are profiled a column per thread, in _THREADS threads.
_THREADED_ROWS = 100_000
_THREADS = 2
# Rows needed before "every value is distinct" suggests an identifier rather than chance.
_ID_MIN_ROWS = 20
#: Distinct values a numeric column may have for the profile to list them (a target with
#: at most this many may be classes: ``tuner.dataset.infer_task``).
FEW_VALUES = 10


@dataclass(frozen=True)
class ColumnProfile:
    """What the profiler found out about one column."""

    name: str
    kind: str
    missing: int
    distinct: int
    dtype: str
    #: The kind the user declared for the column (``kind`` then follows it), else None.
    declared: str | None = None
    #: Numeric columns: how many values are infinite.
    infinite: int = 0
    #: Numeric columns with at most :data:`FEW_VALUES` distinct values: the finite ones,
    #: sorted. With ``infinite`` they let a job's target be judged from the profile alone
    #: (``tuner.profiled``), without reading the table again.
    values: list[float] | None = None

    def to_dict(self) -> dict[str, Any]:
        """Return the profile as a JSON-ready dict."""
        return asdict(self)


def profile_column(s: pd.Series) -> ColumnProfile:
    """Profile one column (see :func:`profile_table` for the rules)."""
    missing = int(s.isna().sum())
    if isinstance(s.dtype, pd.StringDtype):
        # Text read from a file: kind and count from the distinct values alone.
        levels = string_levels(s)
        kind = kind_of_levels(levels, len(s) - missing)
        if kind != "boolean":
            return ColumnProfile(name=str(s.name), kind=kind, missing=missing,
                                 distinct=len(levels), dtype=str(s.dtype))
    else:
        kind = infer_kind(s)
    if kind == "boolean":
        # "TRUE" and "true" are one value once converted; count what the model sees.
        distinct = len(set(to_bool_float(s)[0][~s.isna().to_numpy()]))
    elif kind in ("categorical", "text") or ptypes.is_object_dtype(s.dtype):
        distinct = int(as_level_strings(s).nunique(dropna=True))
    elif s.dtype == np.float64:
        distinct = _distinct_floats(s.to_numpy())
    else:
        distinct = int(s.nunique(dropna=True))
    if kind != "numeric":
        return ColumnProfile(name=str(s.name), kind=kind, missing=missing, distinct=distinct,
                             dtype=str(s.dtype))
    if ptypes.is_integer_dtype(s.dtype):
        infinite = 0
    else:  # a float column is read in place; anything else converted once
        numbers = s.to_numpy() if s.dtype == np.float64 else to_float(s)[0]
        infinite = int(np.isinf(numbers).sum())
    values = None
    if distinct <= FEW_VALUES:
        numbers = to_float(s)[0]
        # Finite ones only (``infinite`` counts the others): the profile is stored as JSON.
        values = sorted({float(v) for v in np.unique(numbers[np.isfinite(numbers)])})
    return ColumnProfile(name=str(s.name), kind=kind, missing=missing, distinct=distinct,
                         dtype=str(s.dtype), infinite=infinite, values=values)


def _distinct_floats(values: np.ndarray) -> int:
    """``nunique(dropna=True)`` of a float64 column, by sorting (measured a third faster
    than pandas' hash table on a million floats); -0.0 and 0.0 count once, as there."""
    ordered = values[~np.isnan(values)]  # a copy already: sorted in place
    ordered.sort()
    return int(np.count_nonzero(ordered[1:] != ordered[:-1])) + int(len(ordered) > 0)


class Columns(Protocol):
    """A table read one column at a time, each as a pandas Series
    (``tuner.io.read.CsvColumns``: an Arrow table converted a column at a time)."""

    names: list[str]
    rows: int

    def series(self, index: int) -> pd.Series: ...


class _FrameColumns:
    def __init__(self, frame: pd.DataFrame) -> None:
        self.frame = frame
        self.names = [str(c) for c in frame.columns]
        self.rows = len(frame)

    def series(self, index: int) -> pd.Series:
        return self.frame.iloc[:, index]


def profile_table(df: pd.DataFrame | Columns, kinds: Mapping[str, str] | None = None, *,
                  row_key: np.ndarray | None = None, pool: Executor | None = None
                  ) -> tuple[list[ColumnProfile], list[str]]:
    """Infer each column's kind and collect warnings about doubtful columns.

    Kinds: ``boolean`` for bool columns and strings that are all ``true``/``false`` (any
    case); ``numeric`` for numbers; ``datetime`` for datetimes and strings that all parse
    as ISO-8601 dates or times; other strings are ``categorical`` when they have at most
    ``max(2, min(1000, 0.5 * non_missing))`` distinct values, else ``text``.

    Args:
        df: A table from :func:`read_table`, or one read a column at a time (:class:`Columns`).
        kinds: Kinds the user declared (``vocabulary.DECLARED_KINDS``), checked already;
            they replace the inferred ones (``ignore`` keeps the inferred kind).
        row_key: A zeroed uint64 array, one per row: each column's values are mixed into
            it in column order while the column is at hand, as
            ``tuner.tablechecks.row_keys`` would (one pass over the table for both).
        pool: Threads to profile a big table's columns on, shared with other work (by
            default two threads of its own, or none on one core).

    Returns:
        The profiles in column order, and warnings naming constant columns, ID-like columns
        (integers or strings, all distinct, at least 20 rows) and text columns, which are
        not used as features.
    """
    source = _FrameColumns(df) if isinstance(df, pd.DataFrame) else df

    def one(index: int) -> tuple[ColumnProfile, bool, np.ndarray | None]:
        s = source.series(index)
        key = column_key(s) if row_key is not None else None
        return profile_column(s), ptypes.is_integer_dtype(s.dtype), key

    indices = range(len(source.names))
    big = source.rows >= _THREADED_ROWS and len(indices) > 1
    threads = min(_THREADS, os.cpu_count() or 1)
    with contextlib.ExitStack() as stack:
        if big and pool is None and threads > 1:
            # The distinct counts sort each column in NumPy, which lets go of the GIL: on
            # a big table, two threads profile about twice as fast as one.
            pool = stack.enter_context(ThreadPoolExecutor(threads, "gk-profile"))
        found = pool.map(one, indices) if big and pool is not None else map(one, indices)
        profiles, integers = [], set()
        for profile, integer, key in found:  # in column order; each key mixed, then freed
            if key is not None and row_key is not None:
                mix_key(row_key, key)
            profiles.append(declare(profile, (kinds or {}).get(profile.name)))
            if integer:
                integers.add(profile.name)
    return profiles, column_warnings(profiles, source.rows, integers)


def declare(profile: ColumnProfile, kind: str | None) -> ColumnProfile:
    """``profile`` with a declared kind recorded (and taken, unless it is ``ignore``)."""
    if kind is None:
        return profile
    return replace(profile, declared=kind, kind=profile.kind if kind == "ignore" else kind)


def column_warnings(profiles: list[ColumnProfile], rows: int,
                    integer_columns: set[str]) -> list[str]:
    """Warnings about constant, ID-like and free-text columns among ``profiles`` (of a
    table of ``rows`` rows, whose integer-typed columns are ``integer_columns``)."""
    warnings: list[str] = []
    for p in profiles:
        if p.distinct <= 1:
            warnings.append(f"column '{p.name}' is constant ({p.distinct} distinct value)")
        id_typed = p.kind in ("categorical", "text") or p.name in integer_columns
        if id_typed and p.distinct == rows and rows >= _ID_MIN_ROWS:
            warnings.append(
                f"column '{p.name}' looks like an identifier (every value is distinct)"
            )
        if p.kind == "text" and p.declared is None:
            warnings.append(
                f"column '{p.name}' looks like free text ({p.distinct} distinct values) "
                "and will not be used as features"
            )
    return warnings


def kinds_of(profiles: list[ColumnProfile]) -> dict[str, str]:
    """Map column name to kind."""
    return {p.name: p.kind for p in profiles}


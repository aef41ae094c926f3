"""Column-level kind inference and conversion, shared by training and prediction.

Training (:func:`tuner.dataset.prepare`) and prediction (:class:`tuner.schema.FeatureSchema`)
go through the same converters here, so a value becomes the same number or category
code in both places. Each converter returns the converted values and a mask of
non-missing values it could not convert; callers decide how to report them.
"""

from __future__ import annotations

import re
from typing import Any

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

_BOOL_WORDS = {"true": 1.0, "false": 0.0}

# A date, optionally followed by a time and a UTC offset: the ISO-8601 shapes people write.
# pandas' "ISO8601" parser alone also accepts bare years ("2020"), which would turn
# ordinary integer-like codes into dates.
_ISO_RE = re.compile(
    r"^\d{4}-\d{2}-\d{2}"
    r"(?:[T ]\d{2}:\d{2}(?::\d{2}(?:[.,]\d+)?)?\s?(?:Z|[+-]\d{2}(?::?\d{2})?)?)?$"
)
_EPOCH = pd.Timestamp(0, tz="UTC")
_DATETIME_SAMPLE = 100


def level_str(value: Any) -> str:
    """Spell a categorical value the way training spelled it.

    Integer-valued floats lose their ``.0`` so that a level ``"3"`` read from a table is
    matched by ``3`` or ``3.0`` sent in JSON.
    """
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def as_level_strings(s: pd.Series) -> pd.Series:
    """Return ``s`` as an object Series of strings, with NaN where values are missing."""
    if isinstance(s.dtype, pd.CategoricalDtype):
        # Map the (few) categories rather than every row.
        mapped = np.array([level_str(c) for c in s.cat.categories] + [np.nan], dtype=object)
        return pd.Series(mapped[s.cat.codes.to_numpy()], index=s.index, dtype=object)
    if ptypes.is_string_dtype(s.dtype) and s.dtype != object:
        return s.astype(object)
    values = s.astype(object).to_numpy(copy=True)
    missing = pd.isna(values)
    values[~missing] = [level_str(v) for v in values[~missing]]
    values[missing] = np.nan
    return pd.Series(values, index=s.index, dtype=object)


def _all_bool_words(uniques: np.ndarray) -> bool:
    return len(uniques) > 0 and all(u.strip().lower() in _BOOL_WORDS for u in uniques)


def _all_iso_datetimes(uniques: np.ndarray) -> bool:
    if len(uniques) == 0:
        return False
    # Reject early on a sample: most string columns fail on their first values.
    for chunk in (uniques[:_DATETIME_SAMPLE], uniques[_DATETIME_SAMPLE:]):
        if len(chunk) == 0:
            continue
        if not all(_ISO_RE.match(u.strip()) for u in chunk):
            return False
        parsed = pd.to_datetime(pd.Series(chunk), format="ISO8601", utc=True, errors="coerce")
        if parsed.isna().any():
            return False
    return True


def infer_kind(s: pd.Series) -> str:
    """Infer one of :data:`tuner.io.read.KINDS` for a column (rules in ``profile_table``)."""
    dtype = s.dtype
    if ptypes.is_bool_dtype(dtype):
        return "boolean"
    if (
        isinstance(dtype, pd.CategoricalDtype)
        or ptypes.is_string_dtype(dtype)
        or ptypes.is_object_dtype(dtype)
    ):
        values = as_level_strings(s).dropna()
        return kind_of_levels(pd.unique(values.to_numpy()), len(values))
    if ptypes.is_numeric_dtype(dtype):
        return "numeric"
    if ptypes.is_datetime64_any_dtype(dtype):
        return "datetime"
    # Durations, intervals, nested values: nothing LightGBM can use directly.
    return "text"


def kind_of_levels(uniques: np.ndarray, n_values: int) -> str:
    """The kind of a text column from its distinct strings and its count of non-missing values."""
    if _all_bool_words(uniques):
        return "boolean"
    if _all_iso_datetimes(uniques):
        return "datetime"
    limit = max(2, min(1000, 0.5 * n_values))
    return "categorical" if len(uniques) <= limit else "text"


def string_levels(s: pd.Series) -> np.ndarray:
    """Distinct non-missing values of a ``str`` column, in order of appearance.

    The same as ``pd.unique(as_level_strings(s).dropna())`` without turning every row into
    a Python string first (for Arrow-backed strings the work stays in Arrow).
    """
    uniques = s.unique()
    return np.asarray(uniques[~pd.isna(uniques)], dtype=object)


def to_float(s: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Convert to float64; strings must spell numbers, booleans are rejected."""
    if ptypes.is_bool_dtype(s.dtype):
        return np.full(len(s), np.nan), s.notna().to_numpy()
    if ptypes.is_numeric_dtype(s.dtype):
        return s.astype("float64").to_numpy(copy=True), np.zeros(len(s), dtype=bool)
    values = s.astype(object)
    missing = values.isna().to_numpy()
    is_bool = np.array([isinstance(v, (bool, np.bool_)) for v in values], dtype=bool)
    numbers = pd.to_numeric(values.where(~is_bool), errors="coerce").astype("float64")
    out = numbers.to_numpy(copy=True)
    return out, ~missing & np.isnan(out)


def to_bool_float(s: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Convert to 0.0/1.0; accepts booleans, ``true``/``false`` in any case, and 0/1."""
    if ptypes.is_bool_dtype(s.dtype):
        return s.astype("float64").to_numpy(copy=True), np.zeros(len(s), dtype=bool)
    if ptypes.is_numeric_dtype(s.dtype):
        out = s.astype("float64").to_numpy(copy=True)
        bad = ~np.isnan(out) & ~np.isin(out, (0.0, 1.0))
        out[bad] = np.nan
        return out, bad
    values = s.astype(object).to_numpy()
    out = np.full(len(values), np.nan)
    bad = np.zeros(len(values), dtype=bool)
    for i, v in enumerate(values):
        if v is None or (isinstance(v, float) and np.isnan(v)) or v is pd.NA:
            continue
        if isinstance(v, (bool, np.bool_)):
            out[i] = float(v)
        elif isinstance(v, str) and v.strip().lower() in _BOOL_WORDS:
            out[i] = _BOOL_WORDS[v.strip().lower()]
        elif isinstance(v, (int, float, np.number)) and v in (0, 1):
            out[i] = float(v)
        else:
            bad[i] = True
    return out, bad


def to_utc_stamps(s: pd.Series) -> tuple[pd.Series, np.ndarray]:
    """Convert to UTC timestamps; naive times are taken as UTC. Returns the mask of bad
    values (present but not an ISO-8601 date or date-time)."""
    if ptypes.is_datetime64_any_dtype(s.dtype):
        stamps = s.dt.tz_convert("UTC") if s.dt.tz is not None else s.dt.tz_localize("UTC")
        return stamps, np.zeros(len(s), dtype=bool)
    values = s.astype(object)
    missing = values.isna().to_numpy()
    text = values.where(missing, values.map(lambda v: v if isinstance(v, str) else str(v)))
    ok = text.map(lambda v: isinstance(v, str) and bool(_ISO_RE.match(v.strip())))
    stamps = pd.to_datetime(
        text.where(ok).str.strip(), format="ISO8601", utc=True, errors="coerce"
    )
    return stamps, ~missing & stamps.isna().to_numpy()


def to_epoch_seconds(s: pd.Series) -> tuple[np.ndarray, np.ndarray]:
    """Convert to float seconds since 1970-01-01 UTC; naive times are taken as UTC."""
    stamps, bad = to_utc_stamps(s)
    seconds = (stamps - _EPOCH).dt.total_seconds().to_numpy(dtype="float64", copy=True)
    return seconds, bad


#: Calendar parts a date column contributes as features, in this order: day of the week
#: (Monday 0), day of the month, month, hour (only when the column has times of day) and
#: days elapsed since 1970-01-01, all in UTC (naive times are taken as UTC).
DATE_PARTS = ("weekday", "day", "month", "hour", "elapsed_days")
# The pandas accessor behind each part (``.dt.weekday`` is deprecated for ``day_of_week``).
_DT_ACCESSORS = {"weekday": "day_of_week", "day": "day", "month": "month", "hour": "hour"}


def date_parts_of(s: pd.Series) -> tuple[str, ...]:
    """The parts a date column contributes: :data:`DATE_PARTS`, less ``hour`` when every
    value is a bare date (midnight)."""
    stamps, _ = to_utc_stamps(s)
    timed = bool((stamps.dropna() != stamps.dropna().dt.normalize()).any())
    return tuple(p for p in DATE_PARTS if p != "hour" or timed)


def date_part_name(column: str, part: str) -> str:
    """The feature name of one calendar part, e.g. ``order_date.weekday``."""
    return f"{column}.{part}"


def to_date_parts(s: pd.Series, parts: tuple[str, ...]
                  ) -> tuple[dict[str, np.ndarray], np.ndarray]:
    """Calendar parts of a date column as float arrays (NaN where missing or bad).

    The one conversion training and prediction share; the values are pandas' own ``.dt``
    accessors (``day_of_week``, ``day``, ``month``, ``hour``) of the UTC timestamps, and
    elapsed days are epoch seconds / 86400.
    """
    stamps, bad = to_utc_stamps(s)
    out: dict[str, np.ndarray] = {}
    for part in parts:
        if part == "elapsed_days":
            seconds = (stamps - _EPOCH).dt.total_seconds()
            values = seconds.to_numpy(dtype="float64", copy=True) / 86400.0
        elif part in _DT_ACCESSORS:
            accessor = getattr(stamps.dt, _DT_ACCESSORS[part])
            values = accessor.to_numpy(dtype="float64", na_value=np.nan)
        else:
            raise ValueError(f"unknown date part '{part}'")
        out[part] = values
    return out, bad


def to_codes(s: pd.Series, levels: tuple[str, ...]) -> tuple[pd.Categorical, np.ndarray]:
    """Encode against fixed ``levels``; returns the Categorical and the unseen-value mask.

    Unseen values become missing in the returned Categorical; the caller decides whether
    that is acceptable. Codes come from the level order, never from the input's own order,
    so the same value always gets the same code.
    """
    index = pd.Index(list(levels), dtype=object)
    if isinstance(s.dtype, pd.StringDtype):
        # Text as read from a CSV: look up each distinct value once, not every row.
        found, uniques = pd.factorize(s, use_na_sentinel=True)
        lookup = np.append(index.get_indexer(pd.Index(np.asarray(uniques, dtype=object))), -1)
        codes = lookup[found]  # the missing sentinel -1 picks the appended -1
        unseen = (codes < 0) & (found >= 0)
        return pd.Categorical.from_codes(codes, categories=index), unseen
    strings = as_level_strings(s)
    codes = index.get_indexer(pd.Index(strings.to_numpy()))
    unseen = (codes < 0) & strings.notna().to_numpy()
    return pd.Categorical.from_codes(codes, categories=index), unseen


def levels_of(s: pd.Series) -> tuple[str, ...]:
    """Sorted distinct non-missing level strings of a column."""
    if isinstance(s.dtype, pd.StringDtype):
        # The same strings, without a Python string per row first (a million rows of
        # Arrow text would take about 50 MB of them).
        return tuple(sorted(string_levels(s)))
    return tuple(sorted(pd.unique(as_level_strings(s).dropna().to_numpy())))


#: Distinct values a column declared categorical may have. More levels than this mostly
#: fit noise (each level needs its own rows) and bloat every split's search; such a
#: column is refused with a 422 suggesting ``text`` (kept out) or ``ignore``.
MAX_DECLARED_LEVELS = 1000


def declared_problem(s: pd.Series, kind: str) -> str | None:
    """Why column ``s`` cannot be the declared ``kind`` (``None`` when it can).

    ``numeric`` needs every non-missing value to spell a number, ``datetime`` an ISO-8601
    date or date-time, ``categorical`` at most :data:`MAX_DECLARED_LEVELS` distinct values.
    """
    if kind in ("numeric", "datetime"):
        _, bad = to_float(s) if kind == "numeric" else to_epoch_seconds(s)
        if bad.any():
            shown = ", ".join(repr(level_str(v)) for v in pd.unique(s[bad].to_numpy())[:3])
            what = "numbers" if kind == "numeric" else "ISO-8601 dates"
            return f"{int(bad.sum())} value(s) are not {what}, e.g. {shown}"
    if kind == "categorical":
        distinct = int(as_level_strings(s).nunique(dropna=True))
        if distinct > MAX_DECLARED_LEVELS:
            return (f"{distinct} distinct values; a categorical may have at most "
                    f"{MAX_DECLARED_LEVELS} (declare it 'text' or 'ignore' to keep it out)")
    return None


def as_declared(s: pd.Series, kind: str) -> pd.Series:
    """A column as its declared kind stores it: categorical and text become strings."""
    if kind in ("categorical", "text") and not ptypes.is_string_dtype(s.dtype):
        return as_level_strings(s).astype("str")
    return s

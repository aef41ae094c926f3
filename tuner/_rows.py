"""A fast path from JSON rows straight to LightGBM's float matrix.

Building a pandas frame and letting LightGBM convert it costs milliseconds per request,
far more than scoring one row. Rows whose every value is plainly valid (numbers for
numeric features, known levels for categoricals, booleans, nulls) are encoded here
directly; anything else returns ``None`` and goes through the schema's full validation,
so errors are reported exactly as before.
"""

from __future__ import annotations

import math
import re
from datetime import UTC, datetime, timedelta
from typing import Any

import lightgbm as lgb
import numpy as np

from tuner.schema import FeatureSchema

_FAST_KINDS = ("numeric", "categorical", "boolean", "datetime")
# Only the plainest ISO-8601 shapes; anything else is left to pandas in the full path.
_PLAIN_ISO = re.compile(
    r"^\d{4}-\d{2}-\d{2}([T ]\d{2}:\d{2}:\d{2}(\.\d{1,6})?(Z|[+-]\d{2}:\d{2})?)?$")
_EPOCH = datetime(1970, 1, 1, tzinfo=UTC)


class RowEncoder:
    """Encodes rows for one model; usable only when the model's levels are the schema's."""

    def __init__(self, schema: FeatureSchema, booster: lgb.Booster) -> None:
        self.names = list(schema.columns)
        self.known = set(self.names)
        self.width = len(schema.names)
        self.kinds = [f.kind for f in schema.features]
        self.parts = [f.parts for f in schema.features]
        self.codes: list[dict[str, float] | None] = [
            {level: float(i) for i, level in enumerate(f.levels or ())}
            if f.kind == "categorical" else None
            for f in schema.features
        ]
        trained = [list(levels) for levels in (booster.pandas_categorical or [])]
        mine = [list(f.levels or ()) for f in schema.features if f.kind == "categorical"]
        self.enabled = trained == mine and all(k in _FAST_KINDS for k in self.kinds)

    def encode(self, rows: list[Any]) -> tuple[np.ndarray, list[str]] | None:
        """``(matrix, ignored keys)``, or ``None`` when a row needs full validation."""
        if not self.enabled or not isinstance(rows, list) or not rows:
            return None
        out = np.empty((len(rows), self.width), dtype=np.float64)
        ignored: set[str] = set()
        for i, row in enumerate(rows):
            if not isinstance(row, dict):
                return None
            if len(row) != len(self.names) or not self.known.issuperset(row):
                ignored.update(str(k) for k in row if k not in self.known)
            col = 0
            for j, name in enumerate(self.names):
                if name not in row:
                    return None
                value = _encode(row[name], self.kinds[j], self.codes[j])
                if value is None:
                    return None
                parts = self.parts[j]
                if parts:
                    for part in parts:
                        out[i, col] = _date_part(value, part)
                        col += 1
                else:
                    out[i, col] = value
                    col += 1
        return out, sorted(ignored)


def _date_part(seconds: float, part: str) -> float:
    """One calendar part from epoch seconds, as ``tuner.columns.to_date_parts`` gives it
    (Python's weekday() counts from Monday 0, as pandas' does)."""
    if math.isnan(seconds):
        return math.nan
    if part == "elapsed_days":
        return seconds / 86400.0
    stamp = _EPOCH + timedelta(seconds=seconds)
    return float({"weekday": stamp.weekday(), "day": stamp.day, "month": stamp.month,
                  "hour": stamp.hour}[part])


def _encode(value: Any, kind: str, codes: dict[str, float] | None) -> float | None:
    if value is None:
        return math.nan
    if kind == "numeric":
        if isinstance(value, bool) or not isinstance(value, int | float):
            return None
        number = float(value)
        return None if math.isinf(number) else number
    if kind == "categorical":
        return codes.get(value) if isinstance(value, str) and codes is not None else None
    if kind == "boolean":
        return float(value) if isinstance(value, bool) else None
    if not isinstance(value, str) or not _PLAIN_ISO.match(value):
        return None
    try:
        stamp = datetime.fromisoformat(value.replace("Z", "+00:00"))
    except ValueError:
        return None
    if stamp.tzinfo is None:
        stamp = stamp.replace(tzinfo=UTC)  # naive times are UTC, as in training
    return (stamp - _EPOCH).total_seconds()

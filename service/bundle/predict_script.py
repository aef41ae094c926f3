"""Predict a CSV file with a Grovekeeper model bundle, using lightgbm and pandas only.

Shipped as ``predict.py`` in every bundle (GET /v1/models/{id}/bundle). Run it from the
unpacked bundle folder:

    python predict.py new_rows.csv > predictions.csv

It turns each column the way the service does before LightGBM sees it (numbers as
floats, true/false and 0/1 as 1.0/0.0, ISO-8601 dates as their calendar parts in UTC
(weekday, day, month, hour, days since 1970; older models: seconds since 1970),
categories as codes over the training levels in ``schema.json``) and writes the same CSV
the service's prediction endpoint answers: ``prediction`` and, for classification, one
``probability_<class>`` column per class. Unlike the service it does not reject bad
values: anything it cannot read becomes missing.

This file must not import anything from Grovekeeper.
"""

from __future__ import annotations

import json
import sys
from pathlib import Path
from typing import Any

import lightgbm as lgb
import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
EPOCH = pd.Timestamp(0, tz="UTC")
BOOL_WORDS = {"true": 1.0, "false": 0.0}


def level_text(value: object) -> object:
    """Spell a category as training did: 3.0 and 3 both become "3"; missing stays NaN."""
    if value is None or (isinstance(value, float) and np.isnan(value)) or value is pd.NA:
        return np.nan
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and value.is_integer():
        return str(int(value))
    return str(value)


def respelled(level: str) -> bool:
    """Whether a number reader would spell this level otherwise ("0042" -> 42)."""
    try:
        return level_text(float(level)) != level
    except ValueError:
        return False


def boolean(value: object) -> float:
    if isinstance(value, bool | np.bool_):
        return float(value)
    if isinstance(value, str):
        return BOOL_WORDS.get(value.strip().lower(), np.nan)
    if isinstance(value, int | float | np.number) and value in (0, 1):
        return float(value)
    return np.nan


def column(raw: pd.Series, feature: dict[str, Any]) -> pd.Series:
    kind = feature["kind"]
    if kind == "numeric":
        if pd.api.types.is_bool_dtype(raw.dtype):
            return pd.Series(np.nan, index=raw.index)
        return pd.to_numeric(raw, errors="coerce").astype("float64")
    if kind == "boolean":
        return raw.astype(object).map(boolean).astype("float64")
    if kind == "datetime":
        text = raw.astype(object).map(lambda v: v.strip() if isinstance(v, str) else v)
        stamps = pd.to_datetime(text, format="ISO8601", utc=True, errors="coerce")
        return (stamps - EPOCH).dt.total_seconds().astype("float64")
    if kind == "categorical":
        levels = list(feature["levels"] or [])
        codes = pd.Index(levels, dtype=object).get_indexer(raw.astype(object).map(level_text))
        # pandas takes any list-like as categories; pandas-stubs ask for an Index.
        cats = pd.Categorical.from_codes(codes, categories=levels)  # type: ignore[call-overload]
        return pd.Series(cats, index=raw.index)
    raise ValueError(f"unknown feature kind {kind!r} for column {feature['name']!r}")


def date_parts(raw: pd.Series, parts: list[str]) -> list[pd.Series]:
    text = raw.astype(object).map(lambda v: v.strip() if isinstance(v, str) else v)
    stamps = pd.to_datetime(text, format="ISO8601", utc=True, errors="coerce")
    out = []
    for part in parts:
        if part == "elapsed_days":
            out.append((stamps - EPOCH).dt.total_seconds().astype("float64") / 86400.0)
        else:
            accessor = {"weekday": "day_of_week"}.get(part, part)
            out.append(getattr(stamps.dt, accessor).astype("float64"))
    return out


def features(table: pd.DataFrame, schema: dict[str, Any], booster: lgb.Booster) -> pd.DataFrame:
    missing = [f["name"] for f in schema["features"] if f["name"] not in table.columns]
    if missing:
        raise SystemExit(f"predict.py: columns missing from the input: {', '.join(missing)}")
    columns: list[pd.Series] = []
    for f in schema["features"]:
        raw = table[f["name"]].reset_index(drop=True)
        if f["kind"] == "datetime" and f.get("parts"):
            columns += date_parts(raw, f["parts"])
        else:
            columns.append(column(raw, f))
    frame = pd.DataFrame({i: c for i, c in enumerate(columns)})
    # LightGBM stores sanitised feature names; the order is what matters.
    frame.columns = booster.feature_name()
    return frame


def predict(table: pd.DataFrame, folder: Path = HERE) -> pd.DataFrame:
    schema = json.loads((folder / "schema.json").read_text())
    booster = lgb.Booster(model_file=str(folder / "model.txt"))
    raw = np.asarray(booster.predict(features(table, schema, booster)), dtype="float64")
    if schema["task"] == "regression":
        return pd.DataFrame({"prediction": raw})
    probs = np.column_stack([1.0 - raw, raw]) if raw.ndim == 1 else raw
    classes = schema["classes"] or list(range(probs.shape[1]))
    # On an exact tie the first class wins, as in the service.
    out = pd.DataFrame({"prediction": [classes[k] for k in np.argmax(probs, axis=1)]})
    for k, label in enumerate(classes):
        out[f"probability_{label}"] = probs[:, k]
    return out


def main(argv: list[str]) -> int:
    if len(argv) not in (1, 2):
        print("usage: python predict.py INPUT.csv [OUTPUT.csv]", file=sys.stderr)
        return 2
    schema = json.loads((HERE / "schema.json").read_text())
    # Categories such as "0042" are matched by their text as written, never as numbers.
    text = {f["name"]: "str" for f in schema["features"] if f["kind"] == "categorical"
            and any(respelled(level) for level in f["levels"] or [])}
    table = pd.read_csv(argv[0], encoding="utf-8-sig", dtype=text or None)
    result = predict(table)
    if len(argv) == 2:
        result.to_csv(argv[1], index=False)
    else:
        result.to_csv(sys.stdout, index=False)
    return 0


if __name__ == "__main__":
    sys.exit(main(sys.argv[1:]))

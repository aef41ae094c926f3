"""The feature schema a model was trained with, and prediction input checked against it."""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd

from tuner.columns import (
    date_part_name,
    level_str,
    to_bool_float,
    to_codes,
    to_date_parts,
    to_epoch_seconds,
    to_float,
)
from tuner.errors import MAX_ERRORS, ConfigError, PredictionInputError, summarise
from vocabulary import UNSEEN_POLICIES

_EXPECTED = {
    "numeric": "expected a number",
    "boolean": "expected true or false",
    "datetime": "expected an ISO-8601 date or date-time",
    "categorical": "expected a string",
}
_SHOW_VALUES = 5


@dataclass(frozen=True)
class FeatureSpec:
    """One model input: its column name, kind and, for categoricals, the training levels."""

    name: str
    kind: str
    levels: tuple[str, ...] | None = None
    #: Calendar parts (``tuner.columns.DATE_PARTS``) a date column becomes; ``None`` for
    #: other kinds, and for models saved before parts existed (one column, epoch seconds).
    parts: tuple[str, ...] | None = None

    @property
    def model_names(self) -> list[str]:
        """The model columns this input column becomes (``order_date.weekday``, ...)."""
        if self.parts:
            return [date_part_name(self.name, p) for p in self.parts]
        return [self.name]


def _respelled(level: str) -> bool:
    try:
        number = float(level)
    except ValueError:
        return False
    return level_str(number) != level


def _short(value: Any) -> str:
    text = repr(value)
    return text if len(text) <= 40 else text[:37] + "..."


def _scalar_mask(s: pd.Series) -> np.ndarray:
    if s.dtype != object:
        return np.ones(len(s), dtype=bool)
    return np.array([not isinstance(v, (dict, list, tuple, set)) for v in s], dtype=bool)


def convert_column(spec: FeatureSpec, s: pd.Series) -> tuple[Any, np.ndarray, np.ndarray]:
    """Convert a raw column to its training-time representation.

    Args:
        spec: The feature to produce.
        s: Raw values (any dtype).

    Returns:
        ``(values, bad, unseen)``: float64 values or a Categorical over ``spec.levels``,
        the mask of values that could not be converted, and the mask of categorical values
        outside the training levels (already missing in ``values``).
    """
    none = np.zeros(len(s), dtype=bool)
    if spec.kind == "numeric":
        values, bad = to_float(s)
        return values, bad, none
    if spec.kind == "boolean":
        values, bad = to_bool_float(s)
        return values, bad, none
    if spec.kind == "datetime":
        values, bad = to_epoch_seconds(s)
        return values, bad, none
    if spec.kind == "categorical":
        codes, unseen = to_codes(s, spec.levels or ())
        return codes, none, unseen
    raise ConfigError(
        f"unknown feature kind '{spec.kind}'",
        [{"field": spec.name, "message": f"unknown feature kind '{spec.kind}'"}],
    )


def convert_feature(spec: FeatureSpec, s: pd.Series
                    ) -> tuple[dict[str, Any], np.ndarray, np.ndarray]:
    """Like :func:`convert_column`, as ``{model column: values}``: a date column with
    calendar parts becomes one column per part."""
    if spec.kind == "datetime" and spec.parts:
        parts, bad = to_date_parts(s, spec.parts)
        names = spec.model_names
        return (dict(zip(names, (parts[p] for p in spec.parts), strict=True)), bad,
                np.zeros(len(s), dtype=bool))
    values, bad, unseen = convert_column(spec, s)
    return {spec.name: values}, bad, unseen


@dataclass(frozen=True)
class FeatureSchema:
    """The ordered features of a model; builds prediction frames identical to training."""

    features: tuple[FeatureSpec, ...]

    @property
    def names(self) -> list[str]:
        """Model column names in model order (a date's calendar parts each count)."""
        return [n for f in self.features for n in f.model_names]

    @property
    def columns(self) -> list[str]:
        """The input columns predictions need, in model order."""
        return [f.name for f in self.features]

    def text_columns(self) -> list[str]:
        """Categorical features whose levels a CSV reader must keep as written.

        Levels such as ``"007"`` or ``"1.50"`` would come back as other spellings once a
        reader took them for numbers (``7``, ``1.5``), and then match no level.
        """
        return [f.name for f in self.features
                if f.kind == "categorical" and any(_respelled(v) for v in f.levels or ())]

    def to_dict(self) -> dict[str, Any]:
        """Return a JSON-ready dict (``{"features": [{"name", "kind", "levels"}]}``)."""
        return {
            "features": [
                {"name": f.name, "kind": f.kind,
                 "levels": list(f.levels) if f.levels is not None else None,
                 **({"parts": list(f.parts), "model_columns": f.model_names}
                    if f.parts else {})}
                for f in self.features
            ]
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> FeatureSchema:
        """Rebuild a schema saved with :meth:`to_dict`."""
        return cls(
            tuple(
                FeatureSpec(
                    name=f["name"], kind=f["kind"],
                    levels=tuple(f["levels"]) if f.get("levels") is not None else None,
                    parts=tuple(f["parts"]) if f.get("parts") else None,
                )
                for f in d["features"]
            )
        )

    def frame_from_rows(
        self, rows: list[dict[str, Any]], unseen: str = "error"
    ) -> tuple[pd.DataFrame, list[str]]:
        """Build the model input frame from JSON-like rows.

        Args:
            rows: One dict per row, keyed by feature name. ``None`` means missing (allowed);
                a key that is absent is an error. Keys outside the schema are ignored.
            unseen: ``"error"`` rejects categorical values not seen in training;
                ``"missing"`` treats them as missing values.

        Returns:
            The frame (columns in model order, categoricals coded as in training) and the
            sorted names of the ignored keys.

        Raises:
            PredictionInputError: Listing up to 50 problems, with fields such as
                ``"rows[3].clay_body"``.
        """
        _check_policy(unseen)
        if not isinstance(rows, list) or not rows:
            raise _input_error([{"field": "rows", "message": "expected a non-empty list"}])
        errors: list[dict[str, Any]] = []
        ignored: set[str] = set()
        known = set(self.columns)
        for i, row in enumerate(rows):
            if not isinstance(row, dict):
                errors.append({"field": f"rows[{i}]", "message": "expected an object"})
            else:
                ignored.update(str(k) for k in row if k not in known)
        if errors:
            raise _input_error(errors)
        columns: dict[str, pd.Series] = {}
        for spec in self.features:
            values = np.empty(len(rows), dtype=object)
            for i, row in enumerate(rows):
                if spec.name in row:
                    values[i] = row[spec.name]
                elif len(errors) < MAX_ERRORS:
                    errors.append({"field": f"rows[{i}].{spec.name}",
                                   "message": "missing key (send null for an unknown value)"})
            columns[spec.name] = pd.Series(values, dtype=object)

        def where(i: int, name: str) -> str:
            return f"rows[{i}].{name}"

        frame = self._build(columns, unseen, errors, where, per_row=True)
        return frame, sorted(ignored)

    def frame_from_table(
        self, df: pd.DataFrame, unseen: str = "error"
    ) -> tuple[pd.DataFrame, list[str]]:
        """Build the model input frame from a table (for example a CSV read by ``read_table``).

        Args:
            df: The input table; columns outside the schema are ignored.
            unseen: As in :meth:`frame_from_rows`.

        Returns:
            The frame and the names of the ignored columns, in table order.

        Raises:
            PredictionInputError: Naming each column at fault; messages give row numbers
                (0-based) and CSV line numbers (counting the header as line 1).
        """
        _check_policy(unseen)
        errors = [
            {"field": name, "message": "column missing from the input"}
            for name in self.columns
            if name not in df.columns
        ]
        if errors:
            raise _input_error(errors)
        columns = {name: df[name].reset_index(drop=True) for name in self.columns}

        def where(i: int, name: str) -> str:
            return f"row {i} (line {i + 2})"

        frame = self._build(columns, unseen, errors, where, per_row=False)
        known = set(self.columns)
        return frame, [str(c) for c in df.columns if c not in known]

    def _build(
        self,
        columns: dict[str, pd.Series],
        unseen: str,
        errors: list[dict[str, Any]],
        where: Callable[[int, str], str],
        *,
        per_row: bool,
    ) -> pd.DataFrame:
        out: dict[str, Any] = {}
        for spec in self.features:
            raw = columns[spec.name]
            # Lists and objects would break the vectorised converters; report them as bad.
            scalar = _scalar_mask(raw)
            values, bad, new = convert_feature(
                spec, raw if scalar.all() else raw.where(scalar, None)
            )
            bad = bad | ~scalar
            if bad.any():
                _report_bad(spec, raw, np.flatnonzero(bad), errors, where, per_row)
            if new.any() and unseen == "error":
                _report_unseen(spec, raw, np.flatnonzero(new), errors, where)
            out.update(values)
        if errors:
            raise _input_error(errors)
        return pd.DataFrame(out)


def _report_bad(spec: FeatureSpec, raw: pd.Series, idx: np.ndarray,
                errors: list[dict[str, Any]], where: Callable[[int, str], str],
                per_row: bool) -> None:
    expected = _EXPECTED[spec.kind]
    if per_row:
        for i in idx[: max(0, MAX_ERRORS - len(errors))]:
            errors.append({"field": where(int(i), spec.name),
                           "message": f"{expected}, got {_short(raw.iloc[i])}"})
        return
    shown = ", ".join(f"{_short(raw.iloc[i])} at {where(int(i), spec.name)}"
                      for i in idx[:_SHOW_VALUES])
    more = f" and {len(idx) - _SHOW_VALUES} more" if len(idx) > _SHOW_VALUES else ""
    errors.append({"field": spec.name,
                   "message": f"{len(idx)} invalid value(s), {expected}: {shown}{more}"})


def _report_unseen(spec: FeatureSpec, raw: pd.Series, idx: np.ndarray,
                   errors: list[dict[str, Any]], where: Callable[[int, str], str]) -> None:
    values = list(dict.fromkeys(str(raw.iloc[i]) for i in idx))
    shown = ", ".join(repr(v) for v in values[:_SHOW_VALUES])
    more = f" and {len(values) - _SHOW_VALUES} more" if len(values) > _SHOW_VALUES else ""
    levels = spec.levels or ()
    known = ", ".join(repr(v) for v in levels[:10]) + (", ..." if len(levels) > 10 else "")
    errors.append({
        "field": spec.name,
        "message": f"values not seen in training: {shown}{more} (first at "
                   f"{where(int(idx[0]), spec.name)}); known levels: {known or 'none'}",
    })


def _check_policy(unseen: str) -> None:
    if unseen not in UNSEEN_POLICIES:
        message = f"unseen must be one of {', '.join(UNSEEN_POLICIES)}, got '{unseen}'"
        raise ConfigError(message, [{"field": "unseen", "message": message}])


def _input_error(errors: list[dict[str, Any]]) -> PredictionInputError:
    return PredictionInputError(summarise("invalid prediction input", errors), errors)

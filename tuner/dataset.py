"""Turning an uploaded table into model-ready features, target and side columns.

This module also re-exports the table reader and the feature schema, so callers can
import everything about data from one place.
"""

from __future__ import annotations

import dataclasses
from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

import numpy as np
import pandas as pd
from pandas.api import types as ptypes

from tuner.columns import (
    as_level_strings,
    date_parts_of,
    declared_problem,
    infer_kind,
    levels_of,
    to_bool_float,
    to_epoch_seconds,
    to_float,
)
from tuner.errors import DatasetError, summarise
from tuner.io.read import read_table
from tuner.profile import (
    ColumnProfile,
    column_warnings,
    declare,
    profile_column,
    profile_table,
)
from tuner.profiled import check_names
from tuner.schema import FeatureSchema, FeatureSpec, convert_feature
from vocabulary import COLUMN_KINDS as KINDS
from vocabulary import DECLARED_KINDS, TASKS

__all__ = [
    "KINDS", "TASKS", "MAX_CLASSES", "ColumnProfile", "FeatureSchema", "FeatureSpec",
    "PreparedData", "infer_task", "prepare", "profile_table", "read_table",
]

#: More classes than this is almost always an identifier or a continuous value by mistake.
MAX_CLASSES = 100


@dataclass(frozen=True)
class PreparedData:
    """Features, encoded target and side columns, row-aligned (positions 0..n-1).

    ``classes[k]`` is the original label encoded as ``k`` (``None`` for regression).
    ``weight``, ``groups`` (integer group codes) and ``times`` (float seconds or numbers)
    are ``None`` when the matching column was not given.
    """

    X: pd.DataFrame
    y: np.ndarray
    task: str
    classes: list[Any] | None
    schema: FeatureSchema
    weight: np.ndarray | None
    groups: np.ndarray | None
    times: np.ndarray | None
    warnings: tuple[str, ...]
    target: str
    #: Raw values of the columns metrics are reported by (``segments``), row-aligned;
    #: they need not be features.
    segments: dict[str, np.ndarray] = dataclasses.field(default_factory=dict)

    @property
    def n_rows(self) -> int:
        """Number of rows."""
        return len(self.y)


def infer_task(y: pd.Series) -> str:
    """Guess the learning task from the target values (missing values are ignored).

    Booleans and strings with two distinct values give ``"binary"``, other strings
    ``"multiclass"``. Numbers with exactly two distinct values give ``"binary"``; integers
    with 3 to 10 distinct values that are exactly ``0..k-1`` give ``"multiclass"``;
    anything else is ``"regression"``. Small counts (0, 1, 2, 3 ...) therefore look like
    classes: pass ``task="regression"`` explicitly for count targets.

    Args:
        y: The target column.

    Returns:
        One of ``"binary"``, ``"multiclass"``, ``"regression"``.
    """
    y = y.dropna()
    kind = infer_kind(y)
    if kind == "boolean":
        return "binary"
    if kind in ("categorical", "text"):
        return "binary" if as_level_strings(y).nunique() <= 2 else "multiclass"
    if kind != "numeric":
        return "regression"
    values = np.unique(y.astype("float64").to_numpy())
    if len(values) == 2:
        return "binary"
    k = len(values)
    if 3 <= k <= 10 and np.array_equal(values, np.arange(k, dtype="float64")):
        return "multiclass"
    return "regression"


def _error(field: str, message: str) -> dict[str, str]:
    return {"field": field, "message": message}


def _raise(errors: list[dict[str, str]]) -> None:
    if errors:
        raise DatasetError(summarise("cannot prepare the dataset", errors), errors)


def _labels(y: pd.Series, kind: str) -> tuple[np.ndarray, list[Any]]:
    """Return encoded labels 0..K-1 and the sorted original labels as python scalars."""
    if kind == "boolean":
        values, _ = to_bool_float(y)
        raw: list[Any] = [bool(v) for v in values]
    elif kind == "numeric":
        values, _ = to_float(y)
        integral = bool(np.all(np.mod(values, 1) == 0))
        raw = [int(v) if integral else float(v) for v in values]
    else:
        raw = list(as_level_strings(y))
    classes = sorted(set(raw))
    index = {label: code for code, label in enumerate(classes)}
    return np.array([index[v] for v in raw], dtype="int64"), classes


def _target(y: pd.Series, target: str,
            task: str | None) -> tuple[str, np.ndarray, list[Any] | None]:
    kind = infer_kind(y)
    if task is not None and task not in TASKS:
        _raise([_error("task", f"unknown task '{task}'; use one of {', '.join(TASKS)}")])
    if kind == "datetime":
        _raise([_error("target", f"target '{target}' holds dates; it cannot be learned")])
    task = task or infer_task(y)
    if kind == "numeric" and np.isinf(to_float(y)[0]).any():
        _raise([_error("target", f"target '{target}' contains infinite values")])
    if task == "regression":
        if kind not in ("numeric", "boolean"):
            _raise([_error("task", f"regression needs a numeric target; '{target}' holds "
                                   f"{kind} values")])
        values = (to_float(y) if kind == "numeric" else to_bool_float(y))[0]
        if np.unique(values).size < 2:
            _raise([_error("target", f"target '{target}' is constant")])
        return task, values, None
    codes, classes = _labels(y, kind)
    if len(classes) < 2:
        _raise([_error("target", f"target '{target}' has a single class {classes[0]!r}")])
    if task == "binary" and len(classes) != 2:
        _raise([_error("task", f"binary needs exactly 2 classes; '{target}' has "
                               f"{len(classes)}")])
    if len(classes) > MAX_CLASSES:
        _raise([_error("target", f"target '{target}' has {len(classes)} classes; at most "
                                 f"{MAX_CLASSES} are supported (use task=regression?)")])
    return task, codes, classes


def _side_columns(frame: pd.DataFrame, weight_column: str | None, group_column: str | None,
                  time_column: str | None) -> tuple[np.ndarray | None, ...]:
    errors = []
    weight = groups = times = None
    if weight_column is not None:
        s = frame[weight_column]
        if infer_kind(s) != "numeric":
            errors.append(_error("weight_column", f"'{weight_column}' is not numeric"))
        else:
            weight = to_float(s)[0]
            if np.isnan(weight).any():
                errors.append(_error("weight_column", f"'{weight_column}' has missing values"))
            elif not np.isfinite(weight).all() or (weight < 0).any() or weight.sum() <= 0:
                errors.append(_error("weight_column", f"'{weight_column}' must be finite, "
                                     "non-negative and not all zero"))
    if group_column is not None:
        s = frame[group_column]
        if s.isna().any():
            errors.append(_error("group_column", f"'{group_column}' has missing values"))
        groups = pd.factorize(as_level_strings(s))[0].astype("int64")
    if time_column is not None:
        s = frame[time_column]
        kind = infer_kind(s)
        if kind not in ("datetime", "numeric"):
            errors.append(_error("time_column", f"'{time_column}' is neither dates nor numbers"))
        else:
            times, bad = (to_epoch_seconds(s) if kind == "datetime" else to_float(s))
            if np.isnan(times).any() or bad.any():
                errors.append(_error("time_column", f"'{time_column}' has missing values"))
    _raise(errors)
    return weight, groups, times


def _check_kinds(df: pd.DataFrame, target: str, features: Sequence[str] | None,
                 kinds: dict[str, str]) -> dict[str, str]:
    errors = []
    for name, kind in kinds.items():
        field = f"column_kinds.{name}"
        if name not in df.columns:
            errors.append(_error(field, f"column '{name}' not found"))
        elif kind not in DECLARED_KINDS:
            errors.append(_error(field, f"unknown kind '{kind}'; use one of "
                                        f"{', '.join(DECLARED_KINDS)}"))
        elif name == target:
            errors.append(_error(field, "the target's kind follows from the task"))
        elif kind == "ignore" and name in (features or ()):
            errors.append(_error(field, f"'{name}' is both ignored and listed in features"))
        else:
            problem = declared_problem(df[name], kind)
            if problem:
                errors.append(_error(field, problem))
    _raise(errors)
    return kinds


def prepare(
    df: pd.DataFrame,
    *,
    target: str,
    task: str | None = None,
    features: Sequence[str] | None = None,
    exclude: Sequence[str] | None = None,
    weight_column: str | None = None,
    group_column: str | None = None,
    time_column: str | None = None,
    column_kinds: Mapping[str, str] | None = None,
    segments: Sequence[str] | None = None,
) -> PreparedData:
    """Validate the column choices and convert the table into model-ready arrays.

    Rows with a missing target are dropped (with a warning). By default every column except
    the target, weight, group and time columns is a feature, minus ``exclude`` and minus
    free-text columns. Numeric features become float64, booleans 0/1 floats, datetimes
    their calendar parts (``tuner.columns.DATE_PARTS``: ``order_date.weekday``, ...) and
    categoricals pandas Categoricals over their
    sorted string levels. Class labels are encoded 0..K-1 in sorted label order.

    Args:
        df: The table, e.g. from :func:`read_table`.
        target: Column to predict.
        task: ``"binary"``, ``"multiclass"`` or ``"regression"``; inferred when ``None``.
        features: Explicit feature columns (a free-text column named here is used as a
            categorical).
        exclude: Columns never used as features.
        weight_column: Non-negative sample weights.
        group_column: Groups kept whole by the ``group`` validation strategy.
        time_column: Dates or numbers ordering rows for the ``time`` strategy.
        column_kinds: ``{column: kind}`` the user declared (``vocabulary.DECLARED_KINDS``):
            the feature takes that kind instead of the inferred one; ``text`` keeps it out
            unless ``features`` names it, ``ignore`` always keeps it out.
        segments: Columns to report hold-out metrics by (kept as raw values).

    Returns:
        The prepared data.

    Raises:
        DatasetError: With ``errors`` fields ``target``, ``task``, ``features``,
            ``exclude``, ``weight_column``, ``group_column``, ``time_column`` or
            ``column_kinds.<column>``.

    Example:
        >>> data = prepare(frame, target="fired_ok")  # doctest: +SKIP
    """
    if not all(isinstance(c, str) for c in df.columns):
        df = df.rename(columns=str)
    if features is not None:
        features = list(dict.fromkeys(features))
    roles = {"weight_column": weight_column, "group_column": group_column,
             "time_column": time_column}
    check_names([str(c) for c in df.columns], target, features, exclude, roles)
    declared = _check_kinds(df, target, features, dict(column_kinds or {}))
    unknown = [s for s in segments or () if s not in df.columns or s == target]
    if unknown:
        _raise([_error("segments", f"not columns of the table (or the target): "
                                   f"{', '.join(map(repr, unknown))}")])
    exclude = [*(exclude or ()), *(n for n, k in declared.items() if k == "ignore")]
    warnings: list[str] = []
    keep = df[target].notna().to_numpy()
    if not keep.all():
        warnings.append(f"dropped {int((~keep).sum())} row(s) with a missing target '{target}'")
    if not keep.any():
        _raise([_error("target", f"target '{target}' has no values")])
    # A copy of the table only when rows are dropped (most tables have every target).
    frame = (df if keep.all() else df.loc[keep]).reset_index(drop=True)
    task, y, classes = _target(frame[target], target, task)
    weight, groups, times = _side_columns(frame, weight_column, group_column, time_column)

    taken = {target, *(n for n in roles.values() if n is not None)}
    explicit = features is not None
    candidates = (list(features or ()) if explicit
                  else [str(c) for c in frame.columns if c not in taken])
    candidates = [c for c in candidates if c not in set(exclude or ())]
    profiles = [declare(profile_column(frame[c]), declared.get(c)) for c in candidates]
    for p in profiles:
        if explicit and p.kind == "text":
            warnings.append(f"column '{p.name}' looks like free text; used as a categorical "
                            "feature because it was requested")
    integers = {c for c in candidates if ptypes.is_integer_dtype(frame[c].dtype)}
    warnings += [w for w in column_warnings(profiles, len(frame), integers)
                 if not (explicit and w.endswith("will not be used as features"))]
    specs = []
    for p in profiles:
        if p.kind == "text" and not explicit:
            continue
        kind = "categorical" if p.kind == "text" else p.kind
        levels = levels_of(frame[p.name]) if kind == "categorical" else None
        # A date becomes its calendar parts: trees can then split on the weekday or the
        # month, which seconds since 1970 hide from them.
        parts = date_parts_of(frame[p.name]) if kind == "datetime" else None
        specs.append(FeatureSpec(name=p.name, kind=kind, levels=levels, parts=parts))
    if not specs:
        _raise([_error("features", "no usable feature columns left")])
    schema = FeatureSchema(tuple(specs))
    clashes = sorted({n for n in schema.names if schema.names.count(n) > 1})
    if clashes:
        _raise([_error("features", f"feature names clash after dates became calendar parts: "
                                   f"{', '.join(map(repr, clashes))}; rename or exclude one")])
    columns = {}
    for spec in specs:
        values, bad, _ = convert_feature(spec, frame[spec.name])
        if bad.any():  # kinds were inferred from these very values, so this is a bug guard
            _raise([_error(spec.name, f"{int(bad.sum())} value(s) cannot be read as {spec.kind}")])
        columns.update(values)
    return PreparedData(
        # The converted columns are this frame's own (copy=False): no second copy of every
        # feature to consolidate them into one block while the first still exists.
        X=pd.DataFrame(columns, copy=False), y=y, task=task, classes=classes, schema=schema,
        weight=weight, groups=groups, times=times, warnings=tuple(warnings), target=target,
        segments={name: frame[name].to_numpy(dtype=object) for name in segments or ()},
    )

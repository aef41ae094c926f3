"""Reading uploaded tables (CSV or Parquet) into pandas, with the checks that keep
the parse honest; profiling the columns is :mod:`tuner.profile`."""

from __future__ import annotations

import os
import re
from collections.abc import Collection

import pandas as pd
from pandas.api import types as ptypes

from tuner.columns import (
    as_level_strings,
)
from tuner.errors import DatasetError
from tuner.io.arrowcsv import read_plain_csv
from tuner.io.csvcheck import MAX_COLUMNS, MAX_NAME_LENGTH, check_csv, plain_header, scan_bytes

_LINE_RE = re.compile(r"line (\d+)")


def _fail(field: str, message: str) -> DatasetError:
    return DatasetError(message, [{"field": field, "message": message}])


def _read_csv(path: str | os.PathLike[str], max_columns: int,
              text_columns: Collection[str] = ()) -> pd.DataFrame:
    scan = scan_bytes(path)
    # Columns declared text keep their characters ("007" stays "007"): pandas reads them
    # as strings; the fast path infers types for every column, so it steps aside.
    if not scan.quoted and not scan.hex_prefix and not text_columns:
        # A plain file: pyarrow's parser refuses ragged rows itself and uses both cores;
        # whatever it cannot read exactly as pandas would goes down the checked path.
        header = plain_header(path, max_columns)
        if header is not None and len(header) > 1:  # one column: blank-line rules differ
            frame = read_plain_csv(path, header, plus_signs=scan.plus)
            if frame is not None:
                return frame
    check_csv(path, max_columns=max_columns, scan=scan)  # what pandas would silently repair
    try:
        # low_memory=False: chunked type inference would emit DtypeWarning on mixed columns.
        return pd.read_csv(path, engine="c", encoding="utf-8-sig", low_memory=False,
                           dtype=dict.fromkeys(text_columns, "str") or None)
    except pd.errors.EmptyDataError:
        raise _fail("file", "the file is empty") from None
    except pd.errors.ParserError as exc:
        found = _LINE_RE.search(str(exc))
        where = f"line {found.group(1)}" if found else "file"
        detail = str(exc).replace("Error tokenizing data. C error: ", "").strip()
        raise _fail(where, f"cannot parse the CSV file: {detail}") from None


def _read_parquet(path: str | os.PathLike[str], max_columns: int) -> pd.DataFrame:
    import pyarrow as pa  # local: only Parquet uploads need it loaded
    import pyarrow.parquet as pq

    try:
        schema = pq.read_schema(path)  # the footer only: cheap even for a huge file
        if len(schema.names) > max_columns:
            raise _fail("file", f"the file has {len(schema.names)} columns; at most "
                                f"{max_columns} are supported")
        _check_parquet_names([str(n) for n in schema.names])
        nested = [f.name for f in schema if pa.types.is_nested(f.type)
                  or pa.types.is_binary(f.type) or pa.types.is_large_binary(f.type)
                  or pa.types.is_fixed_size_binary(f.type)]
        if nested:
            raise DatasetError(
                f"columns holding lists, structs, maps or raw bytes cannot be used: "
                f"{', '.join(map(repr, nested[:10]))}",
                [{"field": n, "message": "nested or binary column; flatten it or send text"}
                 for n in nested])
        frame = pd.read_parquet(path, engine="pyarrow")
    except (pa.ArrowException, OSError, ValueError) as exc:
        if isinstance(exc, DatasetError):
            raise
        # The message may name our temporary file; the client only needs the reason.
        reason = str(exc).replace(str(path), "<upload>")
        raise _fail("file", f"cannot read the Parquet file: {reason}") from None
    frame.columns = [str(c) for c in frame.columns]
    return frame


def _check_parquet_names(names: list[str]) -> None:
    dupes = sorted({n for n in names if names.count(n) > 1})
    errors = [{"field": n, "message": f"duplicate column name '{n}'"} for n in dupes]
    errors += [
        {"field": f"column {i + 1}", "message": f"column {i + 1} has no name"}
        for i, n in enumerate(names)
        if not n.strip()
    ]
    errors += [
        {"field": f"column {i + 1}",
         "message": f"the name of column {i + 1} is longer than {MAX_NAME_LENGTH} characters"}
        for i, n in enumerate(names)
        if len(n) > MAX_NAME_LENGTH
    ]
    if errors:
        raise DatasetError(f"invalid column names: {errors[0]['message']}", errors)


def _normalise_column(name: str, s: pd.Series) -> pd.Series:
    """Bring pyarrow-backed and nullable dtypes back to numpy/pandas defaults.

    LightGBM rejects pyarrow-backed dtypes, and keeping one representation per kind keeps
    the converters in ``_columns`` simple.
    """
    dtype = s.dtype
    if isinstance(dtype, pd.ArrowDtype):
        import pyarrow as pa

        kind = dtype.pyarrow_dtype
        if pa.types.is_string(kind) or pa.types.is_large_string(kind):
            return s.astype("str")
        if pa.types.is_dictionary(kind):
            return s.astype(object).astype("category")
        if pa.types.is_boolean(kind):
            return s.astype("boolean") if s.isna().any() else s.astype(bool)
        if pa.types.is_integer(kind) and not s.isna().any():
            return s.astype("int64")
        if pa.types.is_integer(kind) or pa.types.is_floating(kind) or pa.types.is_decimal(kind):
            return s.astype("float64")
        if pa.types.is_timestamp(kind) and kind.tz is not None:
            return s.astype(pd.DatetimeTZDtype("us", kind.tz))
        if pa.types.is_timestamp(kind) or pa.types.is_date(kind):
            return s.astype("datetime64[us]")
        return s.astype(object)
    if ptypes.is_extension_array_dtype(dtype) and not isinstance(
        dtype, (pd.CategoricalDtype, pd.StringDtype, pd.DatetimeTZDtype)
    ):
        if ptypes.is_bool_dtype(dtype):
            return s if s.isna().any() else s.astype(bool)
        if ptypes.is_integer_dtype(dtype) and not s.isna().any():
            return s.astype("int64")
        if ptypes.is_numeric_dtype(dtype):
            return s.astype("float64")
    if isinstance(dtype, pd.StringDtype) and dtype != "str":
        return s.astype("str")
    if ptypes.is_object_dtype(dtype) and _all_ints(s):
        # pandas keeps integers beyond 64 bits as Python ints, which Parquet cannot store;
        # as float64 they keep their magnitude (the last digits are lost, as in any float).
        return s.astype("float64")
    if isinstance(dtype, pd.CategoricalDtype) and not ptypes.is_string_dtype(
        dtype.categories.dtype
    ):
        return as_level_strings(s).astype("category")
    return s


def _all_ints(s: pd.Series) -> bool:
    values = s.dropna()
    return len(values) > 0 and all(isinstance(v, int) and not isinstance(v, bool)
                                   for v in values)


def read_table(
    path: str | os.PathLike[str], fmt: str, *, max_columns: int = MAX_COLUMNS,
    text_columns: Collection[str] = (),
) -> pd.DataFrame:
    """Read an uploaded CSV or Parquet file into a DataFrame with default dtypes.

    Args:
        path: Location of the file.
        fmt: ``"csv"`` (UTF-8, comma-separated, a byte-order mark is tolerated) or
            ``"parquet"``.
        max_columns: Wider tables are refused (default ``MAX_COLUMNS``, 2000).
        text_columns: CSV columns read as text exactly as written (leading zeros kept),
            whatever they look like; names the file lacks are ignored.

    Returns:
        The table; text columns use pandas' ``str`` dtype, never pyarrow-backed dtypes.

    Raises:
        DatasetError: The file is empty, has only a header, has duplicate, empty or overlong
            (> 256 characters) column names, too many columns, rows with a different number
            of fields than the header (the line number is given), a different delimiter,
            bad quoting, NUL bytes, text that is not UTF-8, or (Parquet) nested or binary
            columns. Integers too large for 64 bits are read as float64.

    Example:
        >>> frame = read_table("upload.csv", "csv")  # doctest: +SKIP
    """
    if fmt == "csv":
        frame = _read_csv(path, max_columns, text_columns)
    elif fmt == "parquet":
        frame = _read_parquet(path, max_columns)
    else:
        raise _fail("format", f"unsupported format '{fmt}'; use 'csv' or 'parquet'")
    if frame.shape[1] == 0:
        raise _fail("file", "the file has no columns")
    if len(frame) == 0:
        raise _fail("file", "the file has a header but no data rows")
    columns, changed = {}, False
    for name in frame.columns:
        column = frame[name]
        columns[name] = _normalise_column(name, column)
        changed = changed or columns[name] is not column
    # Nothing to convert (the usual case for CSV): keep the frame rather than copy it.
    return pd.DataFrame(columns) if changed else frame

"""Reading uploaded tables (CSV or Parquet) into pandas, with the checks that keep
the parse honest; profiling the columns is :mod:`tuner.profile`."""

from __future__ import annotations

import os
from collections.abc import Callable, Collection
from typing import Any

import pandas as pd
from pandas.api import types as ptypes

from tuner.columns import (
    as_level_strings,
)
from tuner.errors import DatasetError
from tuner.io.arrowcsv import (
    ArrowParseError,
    column_to_pandas,
    read_csv,
    read_csv_table,
    to_frame,
)
from tuner.io.csvcheck import (
    MAX_COLUMNS,
    MAX_NAME_LENGTH,
    ByteScan,
    check_csv,
    plain_header,
    scan_bytes,
)


def _fail(field: str, message: str) -> DatasetError:
    return DatasetError(message, [{"field": field, "message": message}])


def _read_csv(path: str | os.PathLike[str], max_columns: int,
              text_columns: Collection[str] = (), scan: ByteScan | None = None,
              parse: Callable[..., Any] = read_csv) -> Any:
    """The checks, then ``parse`` (a frame from ``read_csv``, or an Arrow table from
    ``read_csv_table``)."""
    if scan is None:  # binary data, UTF-16, text that is not UTF-8: refused here
        scan = scan_bytes(path)
    header = None if scan.quoted else plain_header(path, max_columns)
    if header is None:
        # Quotes, or blank lines above the header: the csv module checks quoting and row
        # lengths first, since pyarrow accepts stray text after a closing quote and reports
        # faults without a line number.
        header = check_csv(path, max_columns=max_columns, scan=scan)
    try:
        return parse(path, header, skip_rows=_header_line(path, scan.quoted),
                     quoted=scan.quoted, hex_prefix=scan.hex_prefix,
                     text_columns=text_columns)
    except ArrowParseError as exc:
        # A ragged row or the like: find it again with the line number to report.
        check_csv(path, max_columns=max_columns, scan=scan)
        reason = str(exc).replace(str(path), "<upload>")
        raise _fail("file", f"cannot parse the CSV file: {reason}") from None


def _header_line(path: str | os.PathLike[str], quoted: bool) -> int:
    """Lines up to and including the header: blank lines and lines of empty fields above
    it are skipped, as the header check does."""
    with open(path, encoding="utf-8-sig", newline="") as handle:
        for number, line in enumerate(handle, start=1):
            if line.strip() and any(f.strip() for f in line.rstrip("\r\n").split(",")):
                return number
    return 0


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
    if isinstance(dtype, pd.StringDtype) and str(dtype) != "str":
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
    text_columns: Collection[str] = (), scan: ByteScan | None = None,
) -> pd.DataFrame:
    """Read an uploaded CSV or Parquet file into a DataFrame with default dtypes.

    Args:
        path: Location of the file.
        fmt: ``"csv"`` (UTF-8, comma-separated, a byte-order mark is tolerated) or
            ``"parquet"``.
        max_columns: Wider tables are refused (default ``MAX_COLUMNS``, 2000).
        text_columns: CSV columns read as text exactly as written (leading zeros kept),
            whatever they look like; names the file lacks are ignored.
        scan: What :class:`~tuner.io.csvcheck.ByteScanner` found while the file was
            received (its ``result``); a CSV file is scanned here when it is left out.

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
        frame = _read_csv(path, max_columns, text_columns, scan)
    elif fmt == "parquet":
        frame = _read_parquet(path, max_columns)
    else:
        raise _fail("format", f"unsupported format '{fmt}'; use 'csv' or 'parquet'")
    _check_size(frame.shape[1], len(frame))
    columns, changed = {}, False
    for name in frame.columns:
        column = frame[name]
        columns[name] = _normalise_column(name, column)
        changed = changed or columns[name] is not column
    # Nothing to convert (the usual case for CSV): keep the frame rather than copy it.
    return pd.DataFrame(columns) if changed else frame


def _check_size(columns: int, rows: int) -> None:
    if columns == 0:
        raise _fail("file", "the file has no columns")
    if rows == 0:
        raise _fail("file", "the file has a header but no data rows")


class CsvColumns:
    """A CSV file parsed into Arrow and handed out one column at a time.

    Each column becomes a pandas Series only while it is looked at, exactly as
    :func:`read_table` would have it in the frame, so a big upload can be profiled and
    stored without a pandas copy of the whole table beside the Arrow one.
    """

    def __init__(self, table: Any) -> None:
        self.table = table
        self.names: list[str] = list(table.column_names)
        self.rows: int = table.num_rows

    @property
    def columns(self) -> list[str]:
        return self.names

    def series(self, index: int) -> pd.Series:
        name = self.names[index]
        return _normalise_column(name, column_to_pandas(name, self.table.column(index)))

    def __getitem__(self, name: str) -> pd.Series:
        """The column ``name``, as a frame's ``frame[name]`` would give it."""
        return self.series(self.names.index(name))

    def frame(self, rows: Any = None) -> pd.DataFrame:
        """The rows where the boolean mask ``rows`` holds (all if None), as a frame."""
        part = self.table if rows is None else self.table.filter(rows)
        frame = to_frame(part)
        return pd.DataFrame({n: _normalise_column(n, frame[n]) for n in frame.columns})


def read_csv_columns(
    path: str | os.PathLike[str], *, max_columns: int = MAX_COLUMNS,
    text_columns: Collection[str] = (), scan: ByteScan | None = None,
) -> CsvColumns:
    """Read a CSV file as :func:`read_table` does, checks and errors included, into Arrow.

    The result hands out columns as pandas Series one at a time (:class:`CsvColumns`);
    ``CsvColumns.frame()`` is the frame :func:`read_table` returns.
    """
    columns = CsvColumns(_read_csv(path, max_columns, text_columns, scan,
                                   parse=read_csv_table))
    _check_size(len(columns.names), columns.rows)
    return columns

"""The CSV parse: pyarrow's multithreaded reader, for every CSV upload.

pyarrow is the one parser. Its type rules are ours, with one addition (numbers padded with
spaces are numbers), and differ from pandas' ``read_csv`` in a few documented corners
(DEVELOPERS.md, "Reading CSV files"): ``+1`` is a float, ``NAN`` in any case is missing,
integers past 64 bits are floats, and mixed-case ``TrUe`` stays text. Dates, times and
hex-looking codes stay text here; the profile decides whether a column holds datetimes.
"""

from __future__ import annotations

import os
from collections.abc import Collection
from typing import Any

import numpy as np
import pandas as pd

#: Spellings read as missing values (the same set pandas uses by default, so files that
#: pandas users prepared mean what they meant).
NA_VALUES = sorted({"", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan",
                    "1.#IND", "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a",
                    "nan", "null"})


# A decimal number with optional spaces around it (no hex, no inf or nan words).
_DECIMAL = r"^\s*[-+]?([0-9]+\.?[0-9]*|\.[0-9]+)([eE][-+]?[0-9]+)?\s*$"


class ArrowParseError(Exception):
    """pyarrow refused the file; the caller finds and names the fault."""


def read_csv(path: str | os.PathLike[str], header: list[str], *, skip_rows: int,
             quoted: bool, hex_prefix: bool = False,
             text_columns: Collection[str] = ()) -> pd.DataFrame:
    """Parse a CSV file whose header (already checked) is ``header`` into a frame: the
    table of :func:`read_csv_table`, converted by :func:`to_frame`."""
    return to_frame(read_csv_table(path, header, skip_rows=skip_rows, quoted=quoted,
                                   hex_prefix=hex_prefix, text_columns=text_columns,
                                   memory_pool=_pool()), release=True)


def read_csv_table(path: str | os.PathLike[str], header: list[str], *, skip_rows: int,
                   quoted: bool, hex_prefix: bool = False,
                   text_columns: Collection[str] = (), memory_pool: Any = None) -> Any:
    """Parse a CSV file whose header (already checked) is ``header`` into an Arrow table.

    ``skip_rows`` lines come before the data (the header line and any blank ones above
    it); ``quoted`` allows line breaks inside quoted fields; ``hex_prefix`` says the file
    holds "0x" somewhere (pyarrow reads ``0x10`` as 16; such columns stay text, since
    codes like ``0x1F`` are rarely meant as numbers). ``text_columns`` are read as text
    exactly as written ("0042" stays "0042"). Column types are int64, float64, bool or
    string; :func:`to_frame` and :func:`column_to_pandas` turn them into pandas' (numpy
    dtypes, ``str`` for text). ``memory_pool``: where Arrow allocates (its default if None).
    """
    import pyarrow as pa

    convert = {"strings_can_be_null": True, "null_values": NA_VALUES,
               "true_values": ["True", "TRUE", "true"],
               "false_values": ["False", "FALSE", "false"]}
    declared = {n: pa.string() for n in text_columns if n in header}
    sampled = _sample_types(path, header, skip_rows, quoted, convert)
    # Dates and times stay text (below): ask for text at once where the sample saw them.
    known = {**sampled, **{n: pa.string() for n, t in sampled.items() if _is_temporal(pa, t)},
             **declared}
    try:
        table = _parse(path, header, skip_rows, quoted, {**convert, "column_types": known},
                       memory_pool)
    except ArrowParseError:
        if not sampled:
            raise
        # A later row disagrees with the first MiB's types (or the file is faulty): let
        # pyarrow infer from the whole file, as it would without a sample.
        known = dict(declared)
        table = _parse(path, header, skip_rows, quoted, {**convert, "column_types": known},
                       memory_pool)
    as_text = [f.name for f in table.schema if _is_temporal(pa, f.type)
               or (hex_prefix and pa.types.is_integer(f.type))]
    if as_text:  # dates, times (and maybe hex) stay text: parse again with them as text
        integers = {f.name for f in table.schema if pa.types.is_integer(f.type)} & set(as_text)
        del table
        table = _parse(path, header, skip_rows, quoted,
                       {**convert, "column_types": {**known,
                                                    **{n: pa.string() for n in as_text}}},
                       memory_pool)
        table = _integers_back(pa, table, integers)
    # Declared text stays as written: no padded-number conversion for those columns.
    columns = [column if field.name in declared else _column(pa, field.type, column)
               for field, column in zip(table.schema, table.columns, strict=True)]
    return pa.Table.from_arrays(columns, names=header)


def to_frame(table: Any, *, release: bool = False) -> pd.DataFrame:
    """An Arrow table from :func:`read_csv_table` as a pandas frame.

    ``release``: free each Arrow column as it is converted (the table is unusable after),
    so the table is never held twice.
    """
    import pyarrow as pa

    gappy_flags = [f.name for f, c in zip(table.schema, table.columns, strict=True)
                   if pa.types.is_boolean(f.type) and c.null_count]
    # One block per column, so the Arrow buffers can be released as they are converted.
    frame: pd.DataFrame = table.to_pandas(split_blocks=True, self_destruct=release,
                                          use_threads=False, memory_pool=_pool(),
                                          types_mapper=_text_as_str)
    for name in gappy_flags:
        frame[name] = _gaps_as_nan(frame[name])
    return frame


def column_to_pandas(name: str, column: Any) -> pd.Series:
    """One column of a :func:`read_csv_table` table as :func:`to_frame` would give it."""
    import pyarrow as pa

    series: pd.Series = column.to_pandas(types_mapper=_text_as_str)
    series.name = name
    if pa.types.is_boolean(column.type) and column.null_count:
        series = _gaps_as_nan(series)
    return series


def _gaps_as_nan(flags: pd.Series) -> pd.Series:
    """True/False with gaps: objects, the gaps NaN (as pandas' reader has them)."""
    return flags.where(flags.notna(), np.nan)


#: Bytes at the head of a file whose inferred column types are asked for in the whole parse.
_SAMPLE_BYTES = 1 << 20


def _sample_types(path: str | os.PathLike[str], header: list[str], skip_rows: int,
                  quoted: bool, convert: dict[str, Any]) -> dict[str, Any]:
    """The column types pyarrow infers from the file's first MiB of whole lines (columns
    missing throughout it left out); empty for a small or quoted file.

    Given every column's type, pyarrow converts each block and lets its text go; left to
    infer, it keeps every block's text to the end, in case a later block changes a
    column's type (measured: the parse's peak fell from 2.2 to 1.0 times the table).
    A file whose later rows disagree with the sample fails that parse and is parsed
    again with inference, so the types are still the whole file's.
    """
    import io

    import pyarrow as pa
    import pyarrow.csv as pacsv

    if quoted:  # a quoted line break could be cut in two at the sample's end
        return {}
    with open(path, "rb") as handle:
        head = handle.read(_SAMPLE_BYTES)
        if not handle.read(1):
            return {}  # the whole file is one sample's size: nothing to gain
    head = head[:head.rfind(b"\n") + 1]
    try:
        table = pacsv.read_csv(
            io.BytesIO(head), read_options=pacsv.ReadOptions(column_names=header,
                                                             skip_rows=skip_rows),
            convert_options=pacsv.ConvertOptions(**convert))
    except (pa.ArrowException, OSError):
        return {}
    return {f.name: f.type for f in table.schema if not pa.types.is_null(f.type)}


def _integers_back(pa: Any, table: Any, integers: set[str]) -> Any:
    """Integer columns read again as text (because of a "0x" in the file) go back to
    integers unless one of their values is written in hex."""
    import pyarrow.compute as pc

    for i, name in enumerate(table.column_names):
        if name in integers and not pc.any(
                pc.match_substring_regex(table.column(i), r"^\s*[-+]?0[xX]")).as_py():
            table = table.set_column(i, name, pc.cast(table.column(i), pa.int64()))
    return table


def _text_as_str(kind: Any) -> Any:
    import pyarrow as pa

    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return pd.StringDtype(na_value=float("nan"))  # pandas' default ``str`` dtype
    return None


def _parse(path: str | os.PathLike[str], header: list[str], skip_rows: int, quoted: bool,
           convert: dict[str, Any], memory_pool: Any = None) -> Any:
    """The file as an Arrow table; :class:`ArrowParseError` when pyarrow refuses it.

    ``read_csv`` parses blocks on every core and infers types from the whole file. Its
    streaming reader held half the peak memory but took about twice as long (one
    thread), so the whole-file reader is used, with a pool that returns memory at once.
    """
    import pyarrow as pa
    import pyarrow.csv as pacsv

    try:
        return pacsv.read_csv(
            path,
            read_options=pacsv.ReadOptions(column_names=header, skip_rows=skip_rows),
            parse_options=pacsv.ParseOptions(newlines_in_values=quoted),
            convert_options=pacsv.ConvertOptions(**convert),
            memory_pool=memory_pool)
    except (pa.ArrowException, OSError) as exc:
        raise ArrowParseError(str(exc)) from None


def _column(pa: Any, kind: Any, column: Any) -> Any:
    if pa.types.is_null(kind):
        return column.cast(pa.float64())  # an all-missing column: float NaN
    if pa.types.is_string(kind) or pa.types.is_large_string(kind):
        return _padded_numbers(pa, column)
    return column


def _padded_numbers(pa: Any, column: Any) -> Any:
    """A text column whose values are all numbers once spaces are trimmed, as numbers.

    pyarrow reads ``" 1"`` as text; a file written with ``", "`` between fields is common
    enough that such columns should be numbers.
    """
    import pyarrow.compute as pc

    if column.null_count == len(column):
        return column
    values = column.drop_null()
    if not pc.all(pc.match_substring_regex(values.slice(0, 1000), _DECIMAL)).as_py():
        return column  # surely text: skip the whole-column check
    if not pc.all(pc.match_substring_regex(values, _DECIMAL)).as_py():
        return column
    trimmed = pc.utf8_trim_whitespace(column)
    for target in (pa.int64(), pa.float64()):
        try:
            return pc.cast(trimmed, target)
        except (pa.ArrowInvalid, pa.ArrowNotImplementedError):
            continue
    return column


def _pool() -> Any:
    """jemalloc told to hand freed pages back at once, when pyarrow has it.

    pyarrow's default pool keeps freed memory for reuse, so the parse buffers and the
    Arrow columns already converted stayed resident beside the frame (measured: about
    70 MB more peak memory on a million rows).
    """
    import pyarrow as pa

    try:
        pool = pa.jemalloc_memory_pool()
    except NotImplementedError:
        return pa.default_memory_pool()
    pa.jemalloc_set_decay_ms(0)
    return pool


def _is_temporal(pa: Any, kind: Any) -> bool:
    t = pa.types
    return bool(t.is_date(kind) or t.is_time(kind) or t.is_timestamp(kind))

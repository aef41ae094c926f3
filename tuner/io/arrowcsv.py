"""The fast CSV parse: pyarrow's multithreaded reader, for files pandas would read the same.

pyarrow refuses rows with the wrong number of fields by itself, so a plain file needs no
separate row-length pass. Its type inference differs from pandas' C engine in a few
corners, though: it reads ISO dates and times as dates, ``+1`` as a float, ``0x10`` as
an integer, ``NAN`` as NaN, integers beyond 2**63 as floats, and it leaves mixed-case
``TrUe`` and padded numbers as text. Uploads must get the same columns whichever parser
ran, so :func:`read_plain_csv` answers ``None`` (use pandas) whenever one of those corners
may be present, and any pyarrow error also sends the file to the checked pandas path,
which names the line at fault.
"""

from __future__ import annotations

import os
from typing import Any

import pandas as pd

#: pandas' default missing-value spellings (``pandas.read_csv`` ``na_values``), so both
#: parsers turn the same fields into missing values.
NA_VALUES = sorted({"", "#N/A", "#N/A N/A", "#NA", "-1.#IND", "-1.#QNAN", "-NaN", "-nan",
                    "1.#IND", "1.#QNAN", "<NA>", "N/A", "NA", "NULL", "NaN", "None", "n/a",
                    "nan", "null"})
_BOOL_WORDS = {"true", "false"}
_SAMPLE = 1000  # text values looked at to rule out a column pandas would read as numbers
_INT64_LIMIT = 2.0**63
_HUGE_INTEGER = r"^\s*[+-]?[0-9]{19,}\s*$"


def read_plain_csv(path: str | os.PathLike[str], header: list[str], *,
                   plus_signs: bool) -> pd.DataFrame | None:
    """Parse a quote-free CSV whose first line is ``header``; ``None`` means use pandas.

    The frame has the dtypes pandas' C engine would give (int64, float64, bool, ``str``).
    ``plus_signs`` says whether the file holds a "+" anywhere.
    """
    import pyarrow as pa

    convert = {"strings_can_be_null": True, "null_values": NA_VALUES,
               "true_values": ["True", "TRUE", "true"],
               "false_values": ["False", "FALSE", "false"]}
    table = _parse(path, convert)
    if table is None:
        return None
    dated = [f.name for f in table.schema if _is_temporal(pa, f.type)]
    if dated:  # pandas keeps dates as text: parse again with those columns as text
        del table
        table = _parse(path, {**convert, "column_types": {n: pa.string() for n in dated}})
        if table is None:
            return None
    if table.column_names != header:
        return None
    columns = []
    for field, column in zip(table.schema, table.columns, strict=True):
        kind = field.type
        if pa.types.is_null(kind):
            column = column.cast(pa.float64())  # an all-missing column: float NaN in pandas
        elif not _same_as_pandas(pa, kind, column, plus_signs):
            return None
        columns.append(column)
    table = pa.Table.from_arrays(columns, names=header)
    del columns, column
    # One block per column and the Arrow buffers released as they are converted, so the
    # table is never held twice.
    return table.to_pandas(split_blocks=True, self_destruct=True, use_threads=False,
                           memory_pool=_pool())


def _parse(path: str | os.PathLike[str], convert: dict[str, Any]) -> Any:
    """The file as an Arrow table, or ``None`` when pyarrow refuses it.

    ``read_csv`` parses blocks on every core and infers types from the whole file. Its
    streaming reader held half the peak memory but took about twice as long (one
    thread), so the whole-file reader is used, with a pool that returns memory at once.
    """
    import pyarrow as pa
    import pyarrow.csv as pacsv

    try:
        return pacsv.read_csv(path, convert_options=pacsv.ConvertOptions(**convert),
                              memory_pool=_pool())
    except (pa.ArrowException, OSError):
        return None  # a ragged row, a cell pyarrow cannot convert, ...: the checked path


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


def _is_temporal(pa: object, kind: object) -> bool:
    t = pa.types  # type: ignore[attr-defined]
    return bool(t.is_date(kind) or t.is_time(kind) or t.is_timestamp(kind))


def _same_as_pandas(pa: object, kind: object, column: object, plus_signs: bool) -> bool:
    """Whether pandas' C engine would have read ``column`` with the matching dtype."""
    import pyarrow.compute as pc

    t = pa.types  # type: ignore[attr-defined]
    if t.is_int64(kind):
        return True
    if t.is_float64(kind):
        if column.null_count == len(column):  # type: ignore[attr-defined]
            return True
        if pc.any(pc.is_nan(column)).as_py():
            return False  # "NAN" or the like: text to pandas
        huge = pc.and_(pc.greater_equal(pc.abs(column), _INT64_LIMIT), pc.is_finite(column))
        if pc.any(huge).as_py():
            return False  # integers past 64 bits: pandas reads uint64 or Python integers
        if plus_signs and column.null_count == 0:  # type: ignore[attr-defined]
            # "+1" is a float to pyarrow but an integer to pandas: whole numbers throughout
            # may have been integers in the text.
            return not pc.all(pc.equal(pc.floor(column), column)).as_py()
        return True
    if t.is_boolean(kind):
        return column.null_count == 0  # type: ignore[attr-defined]  # else pandas: object
    if t.is_string(kind) or t.is_large_string(kind):
        # An integer past 64 bits changes how pandas reads the whole column (it then keeps
        # "NA" and the like as text), so such columns are left to pandas.
        distinct = pc.unique(column)
        return _surely_text(column) and not pc.any(
            pc.match_substring_regex(distinct, _HUGE_INTEGER)).as_py()
    return False


def _surely_text(column: object) -> bool:
    """Whether some value rules out pandas reading the column as numbers or booleans."""
    sample = column.slice(0, _SAMPLE).drop_null().to_pylist()  # type: ignore[attr-defined]
    for value in sample:
        word = value.strip()
        if not word or word.lower() in _BOOL_WORDS:
            continue
        try:
            float(word)
        except ValueError:
            return True
    # Every sampled value could be a number or a boolean to pandas: let pandas decide.
    return False

"""Checks on CSV text that pandas would otherwise repair silently.

pandas pads short rows with missing values, renames duplicate columns to ``a.1``, reads a
semicolon-separated file as one column and accepts stray text after a closing quote. Each
of those is a guess about what the sender meant, so they are refused here instead, with the
line number, before pandas parses the file. One pass of the standard ``csv`` module (C
code) costs far less than the pandas parse that follows.
"""

from __future__ import annotations

import csv
import os
from typing import Any

from tuner.errors import DatasetError

#: Most columns a table may have. Wider tables are almost always a transposed export or a
#: wrong delimiter, and every trial's cost grows with the column count.
MAX_COLUMNS = 2000
#: Longest column name, in characters.
MAX_NAME_LENGTH = 256
_DELIMITERS = {";": "semicolons", "\t": "tabs", "|": "pipes"}
_CHUNK = 1 << 20


def _fail(field: str, message: str, **extra: Any) -> DatasetError:
    return DatasetError(message, [{"field": field, "message": message, **extra}])


def _byte_checks(path: str | os.PathLike[str]) -> None:
    """Refuse NUL bytes (binary data) and text that is not UTF-8, naming the line."""
    line = 1
    newline = b"\n"
    with open(path, "rb") as handle:
        pending = b""
        while chunk := handle.read(_CHUNK):
            if line == 1 and not pending and chunk[:2] in (b"\xff\xfe", b"\xfe\xff"):
                raise _fail("file", "the file is UTF-16 text; re-save it as UTF-8")
            nul = chunk.find(b"\x00")
            if nul >= 0:
                where = f"line {line + pending.count(newline) + chunk.count(newline, 0, nul)}"
                raise _fail(where, f"the file holds binary data (a NUL byte on {where}), "
                                   "not CSV text")
            data = pending + chunk
            # Decode whole lines only, so a multi-byte character split by the chunk border
            # is not mistaken for bad UTF-8; look line by line only once a chunk fails.
            cut = data.rfind(newline) + 1
            _decode(data[:cut], line)
            line += data[:cut].count(newline)
            pending = data[cut:]
        _decode(pending, line)


def _decode(block: bytes, first_line: int) -> None:
    try:
        block.decode("utf-8")
    except UnicodeDecodeError:
        for number, raw in enumerate(block.split(b"\n"), start=first_line):
            try:
                raw.decode("utf-8")
            except UnicodeDecodeError:
                _not_utf8(number, raw)


def _not_utf8(number: int, raw: bytes) -> None:
    where = f"line {number}"
    hint = ""
    try:
        raw.decode("cp1252")
        hint = "; it looks like Latin-1/Windows-1252: re-save it as UTF-8"
    except UnicodeDecodeError:
        pass
    raise _fail(where, f"the file is not valid UTF-8 text ({where}){hint}")


def _check_header(header: list[str], line: int, max_columns: int) -> None:
    if len(header) == 1:
        for sep, name in _DELIMITERS.items():
            if sep in header[0]:
                raise _fail(f"line {line}", f"the header row is one column separated by {name} "
                            f"({header[0][:60]!r}); Grovekeeper reads comma-separated files")
    if len(header) > max_columns:
        raise _fail("file", f"the file has {len(header)} columns; at most {max_columns} are "
                            "supported")
    errors = []
    seen: dict[str, int] = {}
    for i, name in enumerate(header):
        if not name.strip():
            errors.append({"field": f"column {i + 1}",
                           "message": f"column {i + 1} of the header has no name"})
        elif len(name) > MAX_NAME_LENGTH:
            errors.append({"field": f"column {i + 1}", "message": f"the name of column {i + 1} "
                           f"is {len(name)} characters long; at most {MAX_NAME_LENGTH}"})
        elif name in seen:
            errors.append({"field": name, "message": f"duplicate column name '{name}' "
                           f"(columns {seen[name] + 1} and {i + 1})"})
        seen.setdefault(name, i)
    if errors:
        summary = "; ".join(e["message"] for e in errors[:3])
        raise DatasetError(f"invalid header row: {summary}", errors)


def _ragged(row: list[str], line: int, expected: int) -> DatasetError:
    where = f"line {line}"
    message = (f"{where} has {len(row)} field(s) but the header has {expected}; every row "
               "needs one value per column (leave a field empty for a missing value)")
    joined = ",".join(row)
    for sep, name in _DELIMITERS.items():
        if len(row) < expected and sep in joined:
            message += f"; this line seems to be separated by {name}, the header by commas"
            break
    return _fail(where, message)


def check_csv(path: str | os.PathLike[str], *, max_columns: int = MAX_COLUMNS) -> list[str]:
    """Validate a CSV file's structure; return its header.

    Raises:
        DatasetError: Binary data, text that is not UTF-8, no header, too many columns,
            empty, long or duplicate column names, rows with the wrong number of fields,
            a different delimiter, or bad quoting; ``field`` is ``"line N"`` when known.
    """
    _byte_checks(path)
    header: list[str] | None = None
    start = 1
    with open(path, encoding="utf-8-sig", newline="") as handle:
        reader = csv.reader(handle, strict=True)
        try:
            for row in reader:
                line, start = start, reader.line_num + 1
                if not row:
                    continue  # a blank line; pandas skips them too
                if header is None:
                    if all(not name.strip() for name in row):
                        continue  # a line of empty fields is no header; look further
                    _check_header(row, line, max_columns)
                    header = row
                elif len(row) != len(header):
                    raise _ragged(row, line, len(header))
        except csv.Error as exc:
            where = f"line {start}"
            if "unexpected end of data" in str(exc):
                message = f"a quoted field starting on {where} is never closed"
            else:
                message = f"bad quoting on {where}: {exc}"
            raise _fail(where, message) from None
    if header is None:
        raise _fail("file", "the file is empty: no header row found")
    return header

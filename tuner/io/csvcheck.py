"""Checks on CSV text that a parser would otherwise repair silently or report vaguely.

Parsers pad short rows with missing values, rename duplicate columns to ``a.1``, read a
semicolon-separated file as one column and accept stray text after a closing quote. Each
of those is a guess about what the sender meant, so they are refused here instead, with the
line number. Quote-free files are checked with numpy byte counts; files with quotes take
one pass of the standard ``csv`` module (C code) before pyarrow parses them.
"""

from __future__ import annotations

import csv
import os
from dataclasses import dataclass
from typing import Any

import numpy as np

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


@dataclass(frozen=True)
class ByteScan:
    """What one pass over the raw bytes found, besides the faults it refuses."""

    quoted: bool  # a double quote anywhere (else the numpy row check applies)
    hex_prefix: bool  # "0x" or "0X" anywhere (pyarrow reads "0x10" as 16; see arrowcsv)


class ByteScanner:
    """The checks of :func:`scan_bytes`, fed the file's bytes in order as they arrive.

    An upload is scanned while it is received, so the parse need not read the file an
    extra time. The first fault is remembered (nothing after it is looked at) and raised
    by :meth:`result`, which reads the file again only to name the fault's line.
    Blocks are tested with C-level scans (``in``, ``isascii``); only a block with
    non-ASCII bytes is decoded.
    """

    def __init__(self) -> None:
        self.quoted = self.hex_prefix = False
        self._done = 0  # bytes of the file before ``_pending``
        self._pending = b""  # the tail of the last non-ASCII block after its last line end
        self._last = b""  # the previous block's last byte, so a "0x" across a border is seen
        self._start = b""  # the file's first two bytes
        self._fault: tuple[str, int, int] | None = None  # (kind, offset, length)

    @property
    def failed(self) -> bool:
        """A fault was seen: :meth:`result` will raise it, and later bytes are ignored."""
        return self._fault is not None

    def feed(self, block: bytes | bytearray | memoryview) -> None:
        if self._fault is not None or not len(block):
            return
        if not isinstance(block, (bytes, bytearray)):
            block = bytes(block)
        if len(self._start) < 2:  # the byte-order mark, however the first bytes came
            self._start += bytes(block[:2 - len(self._start)])
            if self._start in (b"\xff\xfe", b"\xfe\xff"):
                self._fault = ("utf16", 0, 0)
                return
        self.quoted = self.quoted or b'"' in block
        # memchr for the letter first: a two-byte search is slow in digit-heavy text.
        self.hex_prefix = self.hex_prefix or (b"x" in block and b"0x" in block) or (
            b"X" in block and b"0X" in block) or (
            self._last == b"0" and bytes(block[:1]) in (b"x", b"X"))
        self._last = bytes(block[-1:])
        nul = block.find(b"\x00")
        if nul >= 0:
            self._fault = ("nul", self._done + len(self._pending) + nul, 0)
            return
        if not self._pending and block.isascii():
            self._done += len(block)
            return
        data = self._pending + bytes(block)
        # Decode whole lines only, so a multi-byte character split by the block border
        # is not mistaken for bad UTF-8.
        cut = data.rfind(b"\n") + 1
        self._check_utf8(data[:cut])
        self._done += cut
        self._pending = data[cut:]

    def _check_utf8(self, data: bytes) -> None:
        try:
            data.decode("utf-8")
        except UnicodeDecodeError:
            self._fault = ("utf8", self._done, len(data))

    def result(self, path: str | os.PathLike[str]) -> ByteScan:
        """What the scan found; raises :class:`DatasetError` for the first fault.

        ``path`` is the file that was fed (only a fault reads it, for the line number).
        """
        if self._fault is None and self._pending:
            self._check_utf8(self._pending)
        if self._fault is not None:
            kind, offset, length = self._fault
            if kind == "utf16":
                raise _fail("file", "the file is UTF-16 text; re-save it as UTF-8")
            if kind == "nul":
                where = f"line {_line_at(path, offset)}"
                raise _fail(where, f"the file holds binary data (a NUL byte on {where}), "
                                   "not CSV text")
            with open(path, "rb") as handle:
                handle.seek(offset)
                _decode(handle.read(length), path, offset)
        return ByteScan(quoted=self.quoted, hex_prefix=self.hex_prefix)


def scan_bytes(path: str | os.PathLike[str]) -> ByteScan:
    """Refuse NUL bytes (binary data) and text that is not UTF-8, naming the line.

    Chunks are read into one reused buffer; lines are counted only to name the line of
    a fault, so a plain ASCII file costs a few fast passes.
    """
    scanner = ByteScanner()
    buffer = bytearray(16 * _CHUNK)
    view = memoryview(buffer)
    with open(path, "rb") as handle:
        while size := handle.readinto(buffer):
            scanner.feed(buffer if size == len(buffer) else view[:size])
            if scanner.failed:
                break
    return scanner.result(path)


def _line_at(path: str | os.PathLike[str], offset: int) -> int:
    """The 1-based line number of byte ``offset`` (read again: only errors need it)."""
    with open(path, "rb") as handle:
        return handle.read(offset).count(b"\n") + 1


def plain_header(path: str | os.PathLike[str], max_columns: int) -> list[str] | None:
    """The checked header of a quote-free file, read from its first line.

    Returns ``None`` (use the csv-module path) when the first line is blank or holds only
    empty fields, since then the header is further down.
    """
    with open(path, "rb") as handle:
        first = handle.readline()
    text = first.decode("utf-8-sig").rstrip("\r\n")
    if not text.strip() or all(not name.strip() for name in text.split(",")):
        return None  # blank or empty-field lines before the header: slow path
    header = next(csv.reader([text], strict=True))
    _check_header(header, 1, max_columns)
    return header


def _check_unquoted(path: str | os.PathLike[str], max_columns: int) -> list[str] | None:
    """The row-length check for a file without any quote, counted with numpy.

    Without quotes a comma always separates fields, so each line's field count is its
    comma count plus one: counting bytes in bulk replaces a Python-level pass over
    every row (seconds for a million rows). The first offending line is parsed again
    with the ``csv`` module so the error reads exactly as on the slow path. Returns
    ``None`` (use the slow path) when the header is not on the first line.
    """
    header = plain_header(path, max_columns)
    if header is None:
        return None
    with open(path, "rb") as handle:
        handle.readline()
        expected = len(header) - 1
        line, pending = 2, b""
        while chunk := handle.read(16 * _CHUNK):
            data = pending + chunk
            cut = data.rfind(b"\n") + 1
            whole, pending = data[:cut], data[cut:]
            bad = _first_ragged(whole, expected)
            if bad is not None:
                raise _ragged_line(whole, bad, line, len(header))
            line += whole.count(b"\n")
        if pending and _first_ragged(pending + b"\n", expected) is not None:
            raise _ragged_line(pending + b"\n", 0, line, len(header))
    return header


def _first_ragged(block: bytes, commas: int) -> int | None:
    """Index (within ``block``) of the first non-blank line without ``commas`` commas."""
    arr = np.frombuffer(block, dtype=np.uint8)
    ends = np.flatnonzero(arr == 10)
    if len(ends) == 0:
        return None
    # Commas before each line end; searchsorted on their positions beats a cumulative
    # sum over every byte.
    count = np.searchsorted(np.flatnonzero(arr == 44), ends)
    per_line = np.diff(count, prepend=0)
    starts = np.concatenate(([0], ends[:-1] + 1))
    length = ends - starts - (arr[np.maximum(ends - 1, 0)] == 13)  # without "\r"
    wrong = np.flatnonzero((per_line != commas) & (length > 0))
    return int(wrong[0]) if len(wrong) else None


def _ragged_line(block: bytes, index: int, first_line: int, expected: int) -> DatasetError:
    raw = block.split(b"\n")[index].rstrip(b"\r").decode("utf-8")
    return _ragged(next(csv.reader([raw])), first_line + index, expected)


def _decode(block: bytes, path: str | os.PathLike[str], offset: int) -> None:
    """Refuse ``block`` (file bytes from ``offset``, whole lines) unless it is UTF-8."""
    try:
        block.decode("utf-8")
    except UnicodeDecodeError:
        first_line = _line_at(path, offset)
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


def check_csv(path: str | os.PathLike[str], *, max_columns: int = MAX_COLUMNS,
              scan: ByteScan | None = None) -> list[str]:
    """Validate a CSV file's structure; return its header.

    Raises:
        DatasetError: Binary data, text that is not UTF-8, no header, too many columns,
            empty, long or duplicate column names, rows with the wrong number of fields,
            a different delimiter, or bad quoting; ``field`` is ``"line N"`` when known.

    ``scan`` is the result of :func:`scan_bytes` when the caller has already run it.
    """
    if scan is None:
        scan = scan_bytes(path)
    if not scan.quoted:
        fast = _check_unquoted(path, max_columns)
        if fast is not None:
            return fast
    header: list[str] | None = None
    start = 1
    with open(path, encoding="utf-8-sig", newline="") as handle:
        reader = csv.reader(handle, strict=True)
        try:
            for row in reader:
                line, start = start, reader.line_num + 1
                if not row:
                    continue  # a blank line; the parser skips them too
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

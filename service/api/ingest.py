"""Uploads: stream the body to disk, sniff it, parse, profile, store as Parquet.

The body is never held whole in memory: it is copied in chunks to a temporary
file while its size and sha256 are counted, and the upload is refused (413) the
moment it passes the limit. Nothing reaches the dataset folder or the database
until the table has parsed; a failure at any step removes what was written.
"""

from __future__ import annotations

import json
import os
import re
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

from fastapi import Request

import tuner
from service.api.multipart import read_form
from service.api.spool import Spool
from service.errors import PayloadTooLarge, Unprocessable, UnsupportedMediaType
from service.storage import sha256_file
from vocabulary import DECLARED_KINDS

# Not text/plain: a browser page may send that cross-site without asking (a "simple"
# request), and a table has a proper type of its own.
CSV_TYPES = {"text/csv", "application/csv"}
PARQUET_TYPES = {"application/vnd.apache.parquet", "application/x-parquet", "application/parquet"}
CHUNK = 1 << 20
#: Rows converted to Arrow at a time when writing the stored Parquet file: the table is
#: never held twice, and each chunk becomes one row group.
ROW_GROUP = 1 << 17
NAME_RE = re.compile(r"^[\w .()\-]{1,200}$")

_MAGIC = {
    b"PK\x03\x04": "a ZIP archive (or a spreadsheet); upload CSV or Parquet",
    b"\x1f\x8b": "a gzip file; decompress it first",
    b"\x89PNG": "a PNG image",
    b"\xff\xd8\xff": "a JPEG image",
    b"GIF8": "a GIF image",
    b"%PDF": "a PDF document",
}


@dataclass
class Received:
    path: Path
    size: int
    sha256: str
    fmt: str
    name: str
    #: Column kinds declared with the upload (``?kinds=`` or the multipart field).
    kinds: dict[str, str] = field(default_factory=dict)
    #: The ``ByteScanner`` the bytes went through as they arrived (None: not scanned).
    scanner: Any = None


def _media_type(value: str | None) -> str:
    return (value or "").split(";")[0].strip().lower()


def clean_name(name: str | None, fallback: str = "dataset") -> str:
    name = (name or "").strip()
    if not name:
        return fallback
    if not NAME_RE.match(name):
        raise Unprocessable(
            "name may hold letters, digits, spaces and . _ - ( ), at most 200 characters",
            errors=[{"field": "name", "message": "invalid characters or length"}],
        )
    return name


async def _copy(chunks: Any, dest: Path, limit: int, scanner: Any) -> tuple[int, str]:
    with open(dest, "wb") as out, Spool(out, scanner) as spool:
        async for chunk in chunks:
            if spool.size + len(chunk) > limit:
                raise PayloadTooLarge(f"upload exceeds the limit of {limit // (1 << 20)} MB")
            await spool.write(chunk)
        digest = await spool.finish()
    return spool.size, digest


def sniff(path: Path, declared: str) -> str:
    """The format the bytes really have; refuse what is neither CSV nor Parquet."""
    with open(path, "rb") as fh:
        head = fh.read(1 << 16)
    if head[:2] in (b"\xff\xfe", b"\xfe\xff"):
        raise Unprocessable("the file is UTF-16 text; re-save it as UTF-8",
                            errors=[{"field": "file", "message": "UTF-16, not UTF-8"}],
                            code="not_utf8")
    if not head:
        raise Unprocessable("the uploaded file is empty", errors=[{"field": "file",
                            "message": "empty"}], code="empty_file")
    if head.startswith(b"PAR1"):
        if declared == "csv":
            raise UnsupportedMediaType(
                "the body is a Parquet file but was sent as CSV; "
                "use Content-Type: application/vnd.apache.parquet"
            )
        return "parquet"
    for magic, what in _MAGIC.items():
        if head.startswith(magic):
            raise UnsupportedMediaType(f"the body looks like {what}")
    if declared == "parquet":
        raise UnsupportedMediaType("the body is not a Parquet file (no PAR1 magic bytes)")
    if b"\x00" in head:
        raise UnsupportedMediaType("the body holds binary data (NUL bytes), not CSV text")
    return "csv"


def parse_kinds(text: str | None) -> dict[str, str]:
    """``"store_id:categorical,note:ignore"`` (or a JSON object) -> ``{column: kind}``."""
    if text is None or not text.strip():
        return {}
    if text.lstrip().startswith("{"):
        try:
            kinds = json.loads(text)
        except ValueError as exc:
            raise Unprocessable(f"kinds is not valid JSON: {exc}",
                                errors=[{"field": "kinds", "message": "invalid JSON"}]) from None
        if not isinstance(kinds, dict) or not all(isinstance(v, str) for v in kinds.values()):
            raise Unprocessable("kinds must map column names to kinds",
                                errors=[{"field": "kinds", "message": "expected an object"}])
        pairs = [(str(k), v) for k, v in kinds.items()]
    else:
        pairs = []
        for item in text.split(","):
            column, sep, kind = item.rpartition(":")
            if not sep or not column.strip():
                raise Unprocessable(
                    f"kinds entry {item.strip()!r} is not column:kind",
                    errors=[{"field": "kinds", "message": f"expected column:kind, got "
                                                          f"{item.strip()!r}"}])
            pairs.append((column.strip(), kind.strip()))
    errors = [{"field": f"kinds.{c}", "message": f"unknown kind '{k}'; use one of "
                                                 f"{', '.join(DECLARED_KINDS)}"}
              for c, k in pairs if k not in DECLARED_KINDS]
    if errors:
        raise Unprocessable(errors[0]["message"], errors=errors)
    return dict(pairs)


def check_kinds(frame: Any, kinds: dict[str, str]) -> None:
    """Every declared column exists and its values fit its kind (422 naming each).

    ``frame``: a DataFrame, or a table read a column at a time (``CsvColumns``).
    """
    from tuner.columns import declared_problem  # pandas loads with the first upload

    errors = []
    for column, kind in kinds.items():
        if column not in frame.columns:
            errors.append({"field": f"kinds.{column}", "message": "no such column"})
            continue
        problem = declared_problem(frame[column], kind)
        if problem:
            errors.append({"field": f"kinds.{column}", "message": problem})
    if errors:
        raise Unprocessable(f"{errors[0]['field']}: {errors[0]['message']}",
                            errors=errors)


async def receive(request: Request, tmp: Path, *, limit: int, name: str | None,
                  table_limit: int | None = None, kinds: str | None = None) -> Received:
    """Copy the upload (raw body or multipart field ``file``) into ``tmp``.

    Both forms are streamed with a running count and refused (413) the moment they pass
    ``limit``; nothing beyond it is ever written. A Parquet file is then checked against
    ``table_limit`` from its footer alone (``check_parquet_footer``), before any page of
    it is decompressed.
    """
    declared_kinds = parse_kinds(kinds)
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit + (1 << 16):
        raise PayloadTooLarge(f"upload exceeds the limit of {limit // (1 << 20)} MB")
    media = _media_type(request.headers.get("content-type"))
    from tuner.io.csvcheck import ByteScanner  # NumPy loads with the first upload

    scanner = None if media in PARQUET_TYPES else ByteScanner()
    if media == "multipart/form-data":
        form = await read_form(request, tmp, limit=limit, scanner=scanner)
        if not form.has_file:
            raise Unprocessable("multipart upload needs a file field named 'file'",
                                errors=[{"field": "file", "message": "missing"}])
        default = Path(form.filename or "dataset").stem[:200]
        name = clean_name(form.fields.get("name", name), fallback=_safe(default))
        part = _media_type(form.content_type)
        is_parquet = part in PARQUET_TYPES or (form.filename or "").endswith(".parquet")
        fmt = "parquet" if is_parquet else "any"
        size, digest = form.size, form.sha256
        form_kinds = form.fields.get("kinds")
        if isinstance(form_kinds, str):
            declared_kinds = {**declared_kinds, **parse_kinds(form_kinds)}
    elif media in CSV_TYPES or media in PARQUET_TYPES:
        fmt = "csv" if media in CSV_TYPES else "parquet"
        name = clean_name(name)
        size, digest = await _copy(request.stream(), tmp, limit, scanner)
    else:
        raise UnsupportedMediaType(
            f"Content-Type {media or '(none)'} is not accepted; send text/csv, "
            "application/vnd.apache.parquet or multipart/form-data with a 'file' field"
        )
    fmt = sniff(tmp, fmt)
    if fmt == "parquet" and table_limit is not None:
        check_parquet_footer(tmp, table_limit)
    return Received(path=tmp, size=size, sha256=digest, fmt=fmt, name=name,
                    kinds=declared_kinds, scanner=scanner)


def check_parquet_footer(path: Path, limit: int) -> None:
    """Refuse a Parquet file whose table would unpack past ``limit`` bytes.

    Parquet compresses runs of equal values to almost nothing: a file under a megabyte
    can hold a hundred million rows. The footer states the row and column counts and
    the uncompressed size of every column chunk, so the table's size in memory (at
    least 8 bytes a cell once parsed) is known before a single page is read.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    try:
        meta = pq.ParquetFile(path).metadata
    except (pa.ArrowException, OSError) as exc:
        raise Unprocessable(f"cannot read the Parquet file: {exc}",
                            errors=[{"field": "file", "message": "unreadable Parquet footer"}],
                            ) from None
    uncompressed = sum(meta.row_group(i).total_byte_size for i in range(meta.num_row_groups))
    cells = meta.num_rows * max(meta.num_columns, 1)
    estimate = max(cells * 8, uncompressed)
    if estimate > limit:
        raise PayloadTooLarge(
            f"the Parquet file unpacks to about {estimate >> 20} MB ({meta.num_rows} rows x "
            f"{meta.num_columns} columns), over the table limit of {limit >> 20} MB "
            "(GROVEKEEPER_MAX_TABLE_MB)")


async def read_body(request: Request, *, limit: int) -> bytes:
    """The whole body of a small request (predictions), refused (413) past ``limit`` bytes."""
    declared = request.headers.get("content-length")
    if declared is not None and declared.isdigit() and int(declared) > limit:
        raise PayloadTooLarge(f"the body exceeds the limit of {limit // (1 << 20)} MB")
    parts, size = [], 0
    async for chunk in request.stream():
        size += len(chunk)
        if size > limit:
            raise PayloadTooLarge(f"the body exceeds the limit of {limit // (1 << 20)} MB")
        parts.append(chunk)
    return b"".join(parts)


def _safe(stem: str) -> str:
    cleaned = re.sub(r"[^\w .()\-]", "_", stem).strip()
    return cleaned or "dataset"


def profile(frame: Any, kinds: dict[str, str] | None = None
            ) -> tuple[list[tuner.ColumnProfile], list[str]]:
    """Column profiles, and the column and table warnings, of a parsed table."""
    from tuner.tablechecks import table_warnings  # NumPy loads with the first upload

    profiles, warnings = tuner.profile_table(frame, kinds)
    return profiles, warnings + table_warnings(frame)


@dataclass
class Parsed:
    """What an upload turned out to hold, once stored as Parquet."""

    rows: int
    n_columns: int
    profiles: list[tuner.ColumnProfile]
    warnings: list[str]
    #: sha256 of the written Parquet file.
    file_sha256: str


def parse_and_store(received: Received, dest: Path) -> Parsed:
    """Parse the upload, then write it to ``dest`` as Parquet while it is profiled.

    The Parquet write (Arrow code, which releases the GIL) runs on another thread beside
    the profile, so the two overlap on a machine with a core to spare. Bad tables raise
    tuner.DatasetError (422) before anything is written. What the upload freed goes back
    to the system at the end, whatever the outcome.
    """
    try:
        return _parse_csv(received, dest) if received.fmt == "csv" else _parse_parquet(
            received, dest)
    finally:
        release_memory()


def _parse_parquet(received: Received, dest: Path) -> Parsed:
    """A Parquet upload is read into a pandas frame (``tuner.read_table``), as a job reads it."""
    from tuner.columns import as_declared  # pandas loads with the first upload

    text = [c for c, k in received.kinds.items() if k in ("categorical", "text")]
    frame = tuner.read_table(received.path, received.fmt, text_columns=text)
    if received.kinds:
        check_kinds(frame, received.kinds)
        for column in text:  # Parquet numbers declared categorical: stored as their text
            frame[column] = as_declared(frame[column], received.kinds[column])
    with ThreadPoolExecutor(max_workers=1, thread_name_prefix="gk-parquet") as pool:
        written = pool.submit(write_parquet, frame, dest)
        profiles, warnings = profile(frame, received.kinds)
        digest = written.result()
    return Parsed(len(frame), frame.shape[1], profiles, warnings, digest)


def _parse_csv(received: Received, dest: Path) -> Parsed:
    """A CSV upload stays an Arrow table: it is written to Parquet from Arrow while its
    columns are profiled one at a time (each a pandas Series only while it is looked at,
    its values mixed into the duplicate-row keys in the same pass).

    Measured on a million rows by 20 columns, against converting the whole table to
    pandas first: the conversion and its copy of the table go, and the Parquet write
    no longer converts back (docs/measured-facts.md §9).
    """
    import numpy as np

    from tuner.io.read import read_csv_columns
    from tuner.tablechecks import duplicates_among, shape_warnings

    # Declared categorical or text columns are read as text, exactly as written.
    text = [c for c, k in received.kinds.items() if k in ("categorical", "text")]
    scan = received.scanner.result(received.path) if received.scanner is not None else None
    columns = read_csv_columns(received.path, text_columns=text, scan=scan)
    release_memory()  # the parse's own buffers, before the profile's temporaries
    if received.kinds:
        check_kinds(columns, received.kinds)
    # One pool for the Parquet write and the profile: the write is queued first, and the
    # thread that finishes it goes on to profile columns. A profiling thread of its own
    # beside the write on two cores was slower and held twice the temporaries (measured).
    workers = max(2, min(3, os.cpu_count() or 1))
    with ThreadPoolExecutor(max_workers=workers, thread_name_prefix="gk-ingest") as pool:
        written = pool.submit(write_arrow_parquet, columns.table, dest)
        key = np.zeros(columns.rows, dtype=np.uint64)
        profiles, warnings = tuner.profile_table(columns, received.kinds, row_key=key,
                                                 pool=pool)
        duplicates = duplicates_among(key, columns.frame)
        digest = written.result()
    warnings += shape_warnings(columns.rows, len(columns.names), duplicates)
    return Parsed(columns.rows, len(columns.names), profiles, warnings, digest)


def release_memory() -> None:
    """Hand what an upload freed back to the system: Arrow's pool keeps freed blocks for
    reuse, and glibc keeps its heap's free pages, so an idle API held the last upload's
    size again (measured)."""
    import pyarrow as pa

    from service import memory

    pa.default_memory_pool().release_unused()
    memory.trim()


def _parquet_options(schema: Any) -> dict[str, Any]:
    """Dictionary encoding, snappy and min/max statistics for columns other than floats.

    Measured floats rarely repeat enough for a dictionary, snappy shrank a million random
    floats by 6% for a third of the whole write's time, and nothing reads the statistics
    (docs/measured-facts.md §9).
    """
    import pyarrow as pa

    floats = {f.name for f in schema if pa.types.is_floating(f.type)}
    others = [n for n in schema.names if n not in floats]
    return {"use_dictionary": others or False, "write_statistics": others or False,
            "compression": {n: "none" if n in floats else "snappy" for n in schema.names}}


def write_parquet(frame: Any, dest: Path) -> str:
    """Write ``frame`` as Parquet (what ``to_parquet(index=False)`` reads back).

    Converted to Arrow one row group at a time, so the table is never held twice.
    Returns the file's sha256.
    """
    import pyarrow as pa
    import pyarrow.parquet as pq

    schema = pa.Schema.from_pandas(frame, preserve_index=False)
    with pq.ParquetWriter(dest, schema, **_parquet_options(schema)) as writer:
        for start in range(0, max(len(frame), 1), ROW_GROUP):
            part = frame.iloc[start:start + ROW_GROUP]
            writer.write_table(pa.Table.from_pandas(part, schema=schema, preserve_index=False))
    return _hash_and_sync(dest)


def write_arrow_parquet(table: Any, dest: Path) -> str:
    """Write an Arrow table from a CSV upload as Parquet, in row groups of ``ROW_GROUP``
    rows; ``pandas.read_parquet`` reads it back as ``tuner.read_table`` reads the CSV.
    Returns the file's sha256."""
    import pyarrow.parquet as pq

    pq.write_table(table, dest, row_group_size=ROW_GROUP, **_parquet_options(table.schema))
    return _hash_and_sync(dest)


def _hash_and_sync(path: Path) -> str:
    """The written file's sha256, after it is flushed to disk.

    ``ArtifactStore.put`` syncs the file again when it moves it in; done here, on the
    writer's thread while the profile still runs, that second sync finds nothing to
    write (a 110 MB file took 0.05-0.07 s to sync, on the request's path before).
    """
    digest = sha256_file(path)
    with open(path, "rb") as handle:
        os.fsync(handle.fileno())
    return digest

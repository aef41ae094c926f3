"""The corpus: malformed or hostile requests, each with the answer it must get.

Every case is ``Case(id, method, path, build, status, mention)``: ``build(s)`` returns the
httpx keyword arguments for the seeded service ``s``, ``mention`` is text the problem
document must contain (in ``detail`` or an ``errors`` entry, case-insensitive) and
``field``, when set, must be one of the ``errors`` fields.
"""

from __future__ import annotations

import io
from collections.abc import Callable
from dataclasses import dataclass
from typing import Any

import pyarrow as pa
import pyarrow.parquet as pq

CSV = {"Content-Type": "text/csv"}
PARQUET = {"Content-Type": "application/vnd.apache.parquet"}


@dataclass(frozen=True)
class Case:
    id: str
    method: str
    path: str  # formatted with the seeded ids: {ds}, {job}, {model}
    build: Callable[[Any], dict[str, Any]]
    status: int
    mention: str
    field: str | None = None


def csv_body(body: bytes) -> Callable[[Any], dict[str, Any]]:
    return lambda s: {"content": body, "headers": CSV}


def raw(body: bytes, ctype: str | None) -> Callable[[Any], dict[str, Any]]:
    return lambda s: {"content": body, "headers": {"Content-Type": ctype} if ctype else {}}


def parquet(table: pa.Table) -> bytes:
    buffer = io.BytesIO()
    pq.write_table(table, buffer)
    return buffer.getvalue()


def job(**fields: Any) -> Callable[[Any], dict[str, Any]]:
    """A job request on the seeded kilns dataset (or ``dataset=`` one of the extras)."""
    def build(s: Any) -> dict[str, Any]:
        body = dict(fields)
        which = body.pop("dataset", None)
        body.setdefault("dataset_id", s.extra[which] if which else s.dataset_id)
        body.setdefault("target", "defect")
        if callable(body.get("exclude")):
            body["exclude"] = body["exclude"](s)
        return {"json": body}
    return build


def rows(edit: Callable[[dict[str, Any]], Any], n: int = 1) -> Callable[[Any], dict[str, Any]]:
    """``n`` copies of the seeded valid row, passed through ``edit`` (returns the row)."""
    return lambda s: {"json": {"rows": [edit(dict(s.row)) for _ in range(n)]}}


def pred_csv(make: Callable[[Any], bytes]) -> Callable[[Any], dict[str, Any]]:
    return lambda s: {"content": make(s), "headers": CSV}


def _header_and_row(s: Any, *, drop: str | None = None, dup: bool = False,
                    short: bool = False) -> bytes:
    names = [n for n in s.row if n != drop]
    values = ["" if s.row[n] is None else str(s.row[n]) for n in names]
    if dup:
        names, values = [*names, names[0]], [*values, values[0]]
    lines = [",".join(names), ",".join(values), ",".join(values[:-1] if short else values)]
    return ("\n".join(lines) + "\n").encode()


def _set(key: str, value: Any) -> Callable[[dict[str, Any]], dict[str, Any]]:
    return lambda row: {**row, key: value}


def _drop(key: str) -> Callable[[dict[str, Any]], dict[str, Any]]:
    return lambda row: {k: v for k, v in row.items() if k != key}


WIDE = (",".join(f"c{i}" for i in range(2001)) + "\n" + ",".join("1" * 2001) + "\n").encode()
BIG = b"a,b\n" + b"1234567,7654321\n" * 80_000  # about 1.3 MB, over the 1 MB limit


def _chunked(s: Any) -> dict[str, Any]:
    def chunks():  # no Content-Length: the limit must hold while streaming
        for i in range(0, len(BIG), 65536):
            yield BIG[i:i + 65536]
    return {"content": chunks(), "headers": CSV}


UPLOADS = "/v1/datasets"
JOBS = "/v1/jobs"
PREDICT = "/v1/models/{model}/predictions"

CASES = [
    # -- uploads: CSV structure ------------------------------------------------------
    Case("csv-empty", "POST", UPLOADS, csv_body(b""), 422, "empty", "file"),
    Case("csv-blank-lines-only", "POST", UPLOADS, csv_body(b"\n\n\n"), 422, "empty"),
    Case("csv-header-only", "POST", UPLOADS, csv_body(b"a,b,c\n"), 422, "no data rows"),
    Case("csv-short-row", "POST", UPLOADS, csv_body(b"a,b,c\n1,2,3\n4,5\n"), 422,
         "has 2 field(s) but the header has 3", "line 3"),
    Case("csv-long-row", "POST", UPLOADS, csv_body(b"a,b\n1,2,3\n4,5\n"), 422,
         "has 3 field(s)", "line 2"),
    Case("csv-unclosed-quote", "POST", UPLOADS, csv_body(b'a,b\n1,2\n3,"four\n5,6\n'), 422,
         "never closed", "line 3"),
    Case("csv-text-after-quote", "POST", UPLOADS, csv_body(b'a,b\n"x"y,1\n'), 422,
         "bad quoting", "line 2"),
    Case("csv-mixed-delimiters", "POST", UPLOADS, csv_body(b"a,b,c\n1,2,3\n4;5;6\n"), 422,
         "semicolons", "line 3"),
    Case("csv-semicolon-file", "POST", UPLOADS, csv_body(b"a;b;c\n1;2;3\n"), 422,
         "comma-separated", "line 1"),
    Case("csv-tab-file", "POST", UPLOADS, csv_body(b"a\tb\n1\t2\n"), 422, "tabs"),
    Case("csv-latin-1", "POST", UPLOADS, csv_body("a,b\nx,1\ncaf\xe9,2\n".encode("latin-1")),
         422, "not valid UTF-8", "line 3"),
    Case("csv-utf-16", "POST", UPLOADS, csv_body("a,b\n1,2\n".encode("utf-16")), 422,
         "UTF-16"),
    Case("csv-duplicate-names", "POST", UPLOADS, csv_body(b"a,b,a\n1,2,3\n"), 422,
         "duplicate column name 'a'", "a"),
    Case("csv-empty-name", "POST", UPLOADS, csv_body(b"a,,c\n1,2,3\n"), 422, "no name",
         "column 2"),
    Case("csv-trailing-comma", "POST", UPLOADS, csv_body(b"a,b,\n1,2,\n"), 422, "no name",
         "column 3"),
    Case("csv-too-many-columns", "POST", UPLOADS, csv_body(WIDE), 422,
         "2001 columns; at most 2000"),
    Case("csv-overlong-name", "POST", UPLOADS, csv_body(b"a," + b"n" * 300 + b"\n1,2\n"), 422,
         "at most 256", "column 2"),
    Case("csv-nul-after-sniff-window", "POST", UPLOADS,
         csv_body(b"a,b\n" + b"1,2\n" * 20_000 + b"3,\x00\n"), 422, "NUL byte on line 20002"),
    # -- uploads: not a table at all -------------------------------------------------
    Case("binary-noise", "POST", UPLOADS, csv_body(b"\x00\x01\x02\xfe" * 64), 415, "binary"),
    Case("zip-as-csv", "POST", UPLOADS, csv_body(b"PK\x03\x04" + b"\x00" * 40), 415, "ZIP"),
    Case("png-as-csv", "POST", UPLOADS, csv_body(b"\x89PNG\r\n\x1a\n" + b"\x00" * 40), 415,
         "PNG"),
    Case("gzip-as-csv", "POST", UPLOADS, csv_body(b"\x1f\x8b\x08" + b"\x00" * 40), 415,
         "gzip"),
    Case("pdf-as-csv", "POST", UPLOADS, csv_body(b"%PDF-1.7\n..."), 415, "PDF"),
    Case("parquet-as-csv", "POST", UPLOADS,
         csv_body(parquet(pa.table({"a": [1, 2]}))), 415, "Parquet"),
    Case("csv-as-parquet", "POST", UPLOADS, raw(b"a,b\n1,2\n", PARQUET["Content-Type"]), 415,
         "PAR1"),
    Case("parquet-truncated", "POST", UPLOADS, raw(b"PAR1" + b"\x07" * 64,
                                                   PARQUET["Content-Type"]), 422,
         "cannot read the Parquet file", "file"),
    Case("parquet-list-column", "POST", UPLOADS,
         raw(parquet(pa.table({"tags": [[1, 2], [3]], "y": [0, 1]})), PARQUET["Content-Type"]),
         422, "lists, structs", "tags"),
    Case("parquet-duplicate-names", "POST", UPLOADS,
         raw(parquet(pa.Table.from_arrays([pa.array([1]), pa.array([2])], names=["x", "x"])),
             PARQUET["Content-Type"]), 422, "duplicate"),
    Case("json-content-type", "POST", UPLOADS, raw(b'{"a": 1}', "application/json"), 415,
         "not accepted"),
    Case("no-content-type", "POST", UPLOADS, raw(b"a,b\n1,2\n", None), 415, "not accepted"),
    Case("name-path-traversal", "POST", UPLOADS + "?name=../../etc/passwd",
         csv_body(b"a,b\n1,2\n"), 422, "name may hold", "name"),
    Case("name-too-long", "POST", UPLOADS + "?name=" + "n" * 201, csv_body(b"a,b\n1,2\n"),
         422, "at most 200", "name"),
    Case("upload-over-limit", "POST", UPLOADS, csv_body(BIG), 413, "limit of 1 MB"),
    Case("upload-over-limit-chunked", "POST", UPLOADS, _chunked, 413, "limit of 1 MB"),
    Case("multipart-without-file", "POST", UPLOADS,
         lambda s: {"files": {"name": (None, "kilns")}}, 422, "field named 'file'", "file"),
    Case("multipart-two-files", "POST", UPLOADS,
         lambda s: {"files": [("file", ("a.csv", b"a,b\n1,2\n")),
                              ("file", ("b.csv", b"a,b\n1,2\n"))]}, 400, "files"),
    Case("multipart-broken", "POST", UPLOADS,
         raw(b"--xyz\r\ngarbage", "multipart/form-data; boundary=xyz"), 422,
         "field named 'file'", "file"),
    Case("multipart-without-boundary", "POST", UPLOADS, raw(b"garbage", "multipart/form-data"),
         400, "boundary"),
    Case("multipart-file-is-zip", "POST", UPLOADS,
         lambda s: {"files": {"file": ("../../x.csv", b"PK\x03\x04" + b"\x00" * 40)}}, 415,
         "ZIP"),
    # -- jobs ------------------------------------------------------------------------
    Case("job-unknown-target", "POST", JOBS, job(target="defects"), 422, "peak_temp_c",
         "target"),
    Case("job-single-class", "POST", JOBS, job(dataset="constant", target="y", task="binary"),
         422, "single class", "target"),
    Case("job-constant-target", "POST", JOBS, job(dataset="constant", target="y"), 422,
         "constant", "target"),
    Case("job-infinite-target", "POST", JOBS, job(dataset="infinite", target="y"), 422,
         "infinite", "target"),
    Case("job-zero-budget", "POST", JOBS, job(budget={"trials": 0}), 422, "greater than",
         "budget.trials"),
    Case("job-absurd-budget", "POST", JOBS, job(budget={"trials": 10**9}), 422, "less than",
         "budget.trials"),
    Case("job-absurd-seconds", "POST", JOBS, job(budget={"seconds": 1e12}), 422, "less than",
         "budget.seconds"),
    Case("job-negative-seconds", "POST", JOBS, job(budget={"seconds": -5}), 422,
         "greater than", "budget.seconds"),
    Case("job-fewer-rows-than-folds", "POST", JOBS,
         job(dataset="tiny", target="y", task="binary", holdout_fraction=0.0), 422,
         "too few", "cv.folds"),
    Case("job-all-features-excluded", "POST", JOBS,
         job(exclude=lambda s: [c for c in s.columns if c != "defect"]), 422,
         "no usable feature", "features"),
    Case("job-empty-feature-list", "POST", JOBS, job(features=[]), 422, "no usable feature",
         "features"),
    Case("job-unknown-feature", "POST", JOBS, job(features=["kiln", "colour"]), 422,
         "colour", "features"),
    Case("job-target-as-weight", "POST", JOBS, job(weight_column="defect"), 422,
         "is the target", "weight_column"),
    Case("job-unknown-dataset", "POST", JOBS, job(dataset_id="ds_nope"), 422, "no such",
         "dataset_id"),
    Case("job-unknown-field", "POST", JOBS, job(colour="blue"), 422, "extra", "colour"),
    Case("job-one-fold", "POST", JOBS, job(cv={"folds": 1}), 422, "greater than",
         "cv.folds"),
    Case("job-group-without-column", "POST", JOBS, job(cv={"strategy": "group"}), 422,
         "group column", "cv.group_column"),
    Case("job-unknown-metric", "POST", JOBS, job(metric="accuracy_of_vibes"), 422,
         "accuracy_of_vibes"),
    Case("job-bad-search-space", "POST", JOBS,
         job(search_space={"num_leaves": {"low": 64, "high": 8}}), 422, "num_leaves",
         "search_space.num_leaves"),
    Case("job-broken-json", "POST", JOBS,
         raw(b'{"dataset_id": "ds_x", "target": ', "application/json"), 422, "not valid JSON",
         "body"),
    Case("job-json-array", "POST", JOBS, lambda s: {"json": [1, 2, 3]}, 422, "object"),
    # -- predictions -----------------------------------------------------------------
    Case("predict-empty-batch", "POST", PREDICT, lambda s: {"json": {"rows": []}}, 422,
         "at least 1", "rows"),
    Case("predict-empty-body", "POST", PREDICT, raw(b"", "application/json"), 422, "empty",
         "rows"),
    Case("predict-missing-column", "POST", PREDICT, rows(_drop("kiln")), 422, "missing key",
         "rows[0].kiln"),
    Case("predict-wrong-type", "POST", PREDICT, rows(_set("peak_temp_c", "very hot")), 422,
         "expected a number", "rows[0].peak_temp_c"),
    Case("predict-nested-value", "POST", PREDICT, rows(_set("peak_temp_c", [1, 2])), 422,
         "expected a number", "rows[0].peak_temp_c"),
    Case("predict-unseen-category", "POST", PREDICT, rows(_set("clay_body", "moon-rock")),
         422, "not seen in training", "clay_body"),
    Case("predict-row-not-object", "POST", PREDICT, lambda s: {"json": {"rows": [1]}}, 422,
         "an object", "rows[0]"),
    Case("predict-bad-unseen-policy", "POST", PREDICT + "?unseen=guess", rows(lambda r: r),
         422, "error", "unseen"),
    Case("predict-too-many-rows", "POST", PREDICT, rows(lambda r: r, n=51), 413,
         "at most 50 rows"),
    Case("predict-body-over-limit", "POST", PREDICT, csv_body(BIG), 413, "limit of 1 MB"),
    Case("predict-xml", "POST", PREDICT, raw(b"<rows/>", "application/xml"), 415,
         "application/json or text/csv"),
    Case("predict-csv-empty", "POST", PREDICT, csv_body(b""), 422, "empty", "body"),
    Case("predict-csv-header-only", "POST", PREDICT,
         pred_csv(lambda s: (",".join(s.row) + "\n").encode()), 422, "no data rows"),
    Case("predict-csv-ragged", "POST", PREDICT, pred_csv(lambda s: _header_and_row(
        s, short=True)), 422, "field(s) but the header has", "line 3"),
    Case("predict-csv-missing-column", "POST", PREDICT,
         pred_csv(lambda s: _header_and_row(s, drop="kiln")), 422, "column missing", "kiln"),
    Case("predict-csv-duplicate-column", "POST", PREDICT,
         pred_csv(lambda s: _header_and_row(s, dup=True)), 422, "duplicate column name"),
    Case("predict-unknown-model", "POST", "/v1/models/mdl_nope/predictions",
         rows(lambda r: r), 404, "mdl_nope"),
    # -- everything else -------------------------------------------------------------
    Case("list-limit-zero", "GET", "/v1/datasets?limit=0", lambda s: {}, 422,
         "greater than", "limit"),
    Case("list-unknown-status", "GET", "/v1/jobs?status=sleeping", lambda s: {}, 422,
         "queued", "status"),
    Case("leaderboard-bad-format", "GET", "/v1/jobs/{job}/leaderboard?format=xml",
         lambda s: {}, 422, "pattern", "format"),
    Case("cancel-finished-job", "POST", "/v1/jobs/{job}/cancel", lambda s: {}, 409,
         "already succeeded"),
    Case("unknown-model", "GET", "/v1/models/mdl_nope", lambda s: {}, 404, "mdl_nope"),
    Case("unknown-path", "GET", "/v1/../../etc/passwd", lambda s: {}, 404, "not found"),
    Case("wrong-method", "PUT", "/v1/datasets", lambda s: {}, 405, "method not allowed"),
]

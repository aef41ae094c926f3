"""One prediction request, JSON or CSV, against a loaded model; shared by the model and
channel routes. ``keep`` columns come back beside the predictions exactly as sent."""

from __future__ import annotations

import csv
import io
from typing import TYPE_CHECKING, Annotated, Any
from urllib.parse import quote

from fastapi import Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

import tuner
from service.api import ingest
from service.api.schemas import PredictRequest, PredictResponse
from service.api.tabular import frame_csv
from service.errors import PayloadTooLarge, Unprocessable, UnsupportedMediaType
from service.settings import Settings
from service.storage import LocalStore

if TYPE_CHECKING:  # pandas loads with the first prediction, not with the API
    import pandas as pd

PREDICT_DESCRIPTION = (
    "Missing feature columns and wrong types are a 422 naming row and column. Unseen "
    "categories are a 422 unless `unseen=missing`, which sends them down LightGBM's "
    "missing-value branch. Columns the model does not use are ignored and listed in "
    "`ignored_columns` (CSV: the `X-Ignored-Columns` header, each name percent-encoded as "
    "UTF-8 and the names joined by commas). An empty batch is a 422; "
    "more rows than `GROVEKEEPER_MAX_PREDICTION_ROWS`, or a body over "
    "`GROVEKEEPER_MAX_UPLOAD_MB`, is a 413. "
    "`explain=true` adds per-row TreeSHAP contributions (bias plus one value per "
    "feature, summing to the raw score; CSV: `contribution_<feature>` columns). "
    "`keep=a,b` (or the JSON field `keep`) returns those input columns unchanged beside "
    "each prediction (JSON: `kept`, one object per row; CSV: the first columns, the text "
    "exactly as sent); a column only kept is never checked as a feature. Binary labels "
    "are class 1 when its probability exceeds the model's `decision.threshold` (0.5 "
    "unless the job gave costs); `threshold=` overrides it for this request."
)


ThresholdQuery = Annotated[float | None, Query(
    gt=0, lt=1, description="binary: class 1 above this probability, instead of the "
                            "model's decision threshold")]


def parse_keep(query: str | None) -> list[str]:
    """``?keep=a,b`` as a list, in order, without repeats."""
    if not query:
        return []
    names = [n.strip() for n in query.split(",")]
    if any(not n for n in names):
        raise Unprocessable("keep names columns separated by commas; one name is empty",
                            errors=[{"field": "keep", "message": "empty column name"}])
    return list(dict.fromkeys(names))


def _kept_json(rows: list[dict[str, Any]], keep: list[str]) -> list[dict[str, Any]]:
    kept = []
    for i, row in enumerate(rows):
        absent = [k for k in keep if k not in row]
        if absent:
            message = f"rows[{i}] lacks the kept column(s) {', '.join(absent)}"
            raise Unprocessable(message, errors=[{"field": f"rows[{i}].{absent[0]}",
                                                  "message": "kept column missing"}])
        kept.append({k: row[k] for k in keep})
    return kept


def _kept_csv(body: bytes, keep: list[str], n_rows: int) -> pd.DataFrame:
    """The kept columns read as text straight from the body, so ``007`` stays ``007``
    (the table reader would make it the number 7)."""
    import pandas as pd

    reader = csv.reader(io.StringIO(body.decode("utf-8-sig"), newline=""))
    header = next(reader)
    absent = [k for k in keep if k not in header]
    if absent:
        message = f"the CSV has no column(s) {', '.join(absent)} to keep"
        raise Unprocessable(message, errors=[{"field": "keep", "message": message}])
    index = [header.index(k) for k in keep]
    values: list[list[str]] = [[] for _ in keep]
    for record in reader:
        if not record:  # a blank line, skipped by the table reader too
            continue
        for slot, j in zip(values, index, strict=True):
            slot.append(record[j])
    if len(values[0]) != n_rows:
        raise Unprocessable("the kept columns could not be lined up with the rows read",
                            errors=[{"field": "keep", "message": "row count differs"}])
    return pd.DataFrame({k: pd.Series(v, dtype=object) for k, v in zip(keep, values,
                                                                         strict=True)})


def _read_csv_rows(store: LocalStore, body: bytes, text_columns: list[str]) -> pd.DataFrame:
    # The same reader as uploads, so a ragged row or a duplicate column is refused with its
    # line number here too instead of being repaired by pandas.
    with store.temp_path(".csv") as tmp:
        tmp.write_bytes(body)
        # Categorical levels such as "0042" are matched as written, never as numbers.
        return tuner.read_table(tmp, "csv", text_columns=text_columns)


def _contribution_columns(predictor: tuner.Predictor, features: pd.DataFrame) -> pd.DataFrame:
    import pandas as pd

    rows = predictor.explain_frame(features)["contributions"]
    names = [*predictor.schema.names, "bias"]
    per_row = [[*r["features"].values(), r["bias"]] for r in rows]
    if predictor.task != "multiclass":
        return pd.DataFrame(per_row, columns=[f"contribution_{n}" for n in names])
    classes = predictor.classes or []
    flat = [[row[j][k] for k in range(len(classes)) for j in range(len(names))]
            for row in per_row]
    return pd.DataFrame(flat, columns=[f"contribution_{c}_{n}" for c in classes for n in names])


def _predict_csv(predictor: tuner.Predictor, store: LocalStore, body: bytes, unseen: str,
                 limit: int, explain: bool, keep: list[str],
                 headers: dict[str, str], threshold: float | None) -> Response:
    import pandas as pd

    if not body.strip():
        raise Unprocessable("the CSV body is empty; send a header row and at least one row",
                            errors=[{"field": "body", "message": "empty"}])
    frame = _read_csv_rows(store, body, predictor.schema.text_columns())
    if len(frame) > limit:
        raise PayloadTooLarge(f"at most {limit} rows per request; got {len(frame)}")
    kept = _kept_csv(body, keep, len(frame)) if keep else None
    features, ignored = predictor.schema.frame_from_table(frame, unseen=unseen)
    out = predictor.predict_columns(features, threshold)
    if explain:
        out = pd.concat([out, _contribution_columns(predictor, features)], axis=1)
    if kept is not None:
        clash = [k for k in keep if k in out.columns]
        if clash:
            message = f"kept column(s) {', '.join(clash)} would clash with answer columns"
            raise Unprocessable(message, errors=[{"field": "keep", "message": message}])
        out = pd.concat([kept, out], axis=1)
    ignored = [c for c in ignored if c not in keep]
    if ignored:
        headers = {**headers, "X-Ignored-Columns": ignored_header(ignored)}
    # Kept columns are the caller's own values, echoed exactly; the rest is neutralised
    # against spreadsheet formulas (service/api/tabular.py).
    return Response(frame_csv(out, exact=keep), media_type="text/csv; charset=utf-8",
                    headers=headers)


def ignored_header(names: list[str]) -> str:
    """Column names as one header value: each percent-encoded as UTF-8 (RFC 3986), joined
    by commas. A raw name could hold commas, CR/LF or characters outside Latin-1, which a
    header cannot carry."""
    return ",".join(quote(name, safe="") for name in names)


async def answer(request: Request, predictor: tuner.Predictor, model_id: str, *,
                 settings: Settings, store: LocalStore, unseen: str, explain: bool,
                 keep: str | None, threshold: float | None = None
                 ) -> PredictResponse | Response:
    """Read the body and answer it with ``predictor``; the answer names ``model_id``
    (JSON ``model_id``, header ``X-Model-Id``)."""
    media = (request.headers.get("content-type") or "").split(";")[0].strip().lower()
    limit = settings.max_prediction_rows
    headers = {"X-Model-Id": model_id}
    keep_names = parse_keep(keep)
    if threshold is not None and predictor.task != "binary":
        message = f"threshold applies to binary models; this one is {predictor.task}"
        raise Unprocessable(message, errors=[{"field": "threshold", "message": message}])
    body = await ingest.read_body(request, limit=settings.max_upload_mb * (1 << 20))
    if media == "text/csv":
        return await run_in_threadpool(_predict_csv, predictor, store, body, unseen, limit,
                                       explain, keep_names, headers, threshold)
    if media not in ("application/json", ""):
        raise UnsupportedMediaType(f"send application/json or text/csv, not {media}")
    if not body.strip():
        raise Unprocessable('the body is empty; send {"rows": [{column: value, ...}, ...]}',
                            errors=[{"field": "rows", "message": "missing"}])
    payload = PredictRequest.model_validate_json(body)
    if len(payload.rows) > limit:
        raise PayloadTooLarge(f"at most {limit} rows per request; got {len(payload.rows)}")
    keep_names = list(dict.fromkeys([*keep_names, *(payload.keep or [])]))
    kept = _kept_json(payload.rows, keep_names) if keep_names else None
    if len(payload.rows) <= 64:  # a few rows: cheaper inline than a thread hop
        result = predictor.predict_rows(payload.rows, unseen=unseen, explain=explain,
                                        threshold=threshold)
    else:
        result = await run_in_threadpool(predictor.predict_rows, payload.rows, unseen=unseen,
                                         explain=explain, threshold=threshold)
    answer = PredictResponse(
        model_id=model_id,
        predictions=result["predictions"],
        classes=predictor.classes,
        probabilities=result.get("probabilities"),
        ignored_columns=[c for c in result.get("ignored_columns", []) if c not in keep_names],
        contributions=result.get("contributions"),
        contribution_scale=result.get("contribution_scale"),
        kept=kept,
    )
    return Response(answer.model_dump_json(exclude_none=False), media_type="application/json",
                    headers=headers)

"""Models: metadata, the model file, predictions (JSON or CSV)."""

from __future__ import annotations

from typing import Annotated, Literal
from urllib.parse import quote

import pandas as pd
from fastapi import APIRouter, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import FileResponse, Response

import tuner
from service import repository
from service.api import ingest
from service.api.deps import SessionDep, SettingsDep, StoreDep
from service.api.schemas import ModelOut, PredictRequest, PredictResponse, as_utc
from service.api.tabular import frame_csv
from service.errors import PayloadTooLarge, Unprocessable, UnsupportedMediaType
from service.storage import LocalStore
from service.tables import Model

router = APIRouter(prefix="/v1/models", tags=["models"])
Unseen = Literal["error", "missing"]


def to_out(model: Model) -> ModelOut:
    return ModelOut(
        id=model.id, job_id=model.job_id, task=model.task, metric=model.metric,
        target=model.target, params=model.params, boosting_rounds=model.boosting_rounds,
        trial_number=model.trial_number, cv=model.cv, holdout=model.holdout,
        feature_schema=model.feature_schema, classes=model.classes,
        feature_importance=model.feature_importance, details=model.details,
        sha256=model.sha256, size_bytes=model.size_bytes, created_at=as_utc(model.created_at),
    )


@router.get("/{model_id}", response_model=ModelOut)
def get_model(model_id: str, session: SessionDep) -> ModelOut:
    return to_out(repository.get_model(session, model_id))


@router.get("/{model_id}/file", response_class=FileResponse,
            summary="The LightGBM text model, byte for byte as stored")
def get_model_file(model_id: str, session: SessionDep, store: StoreDep) -> FileResponse:
    model = repository.get_model(session, model_id)
    path = store.local_path(model.file_key, model.sha256)
    return FileResponse(path, media_type="text/plain; charset=utf-8",
                        filename=f"{model_id}.txt", headers={"X-Model-Sha256": model.sha256})


def _read_csv_rows(store: LocalStore, body: bytes) -> pd.DataFrame:
    # The same reader as uploads, so a ragged row or a duplicate column is refused with its
    # line number here too instead of being repaired by pandas.
    with store.temp_path(".csv") as tmp:
        tmp.write_bytes(body)
        return tuner.read_table(tmp, "csv")


def _contribution_columns(predictor: tuner.Predictor, features: pd.DataFrame) -> pd.DataFrame:
    rows = predictor.explain_frame(features)["contributions"]
    names = [*predictor.schema.names, "bias"]
    per_row = [[*r["features"].values(), r["bias"]] for r in rows]
    if predictor.task != "multiclass":
        return pd.DataFrame(per_row, columns=[f"contribution_{n}" for n in names])
    classes = predictor.classes or []
    flat = [[row[j][k] for k in range(len(classes)) for j in range(len(names))]
            for row in per_row]
    return pd.DataFrame(flat, columns=[f"contribution_{c}_{n}" for c in classes for n in names])


def ignored_header(names: list[str]) -> str:
    """Column names as one header value: each percent-encoded as UTF-8 (RFC 3986), joined
    by commas. A raw name could hold commas, CR/LF or characters outside Latin-1, which a
    header cannot carry."""
    return ",".join(quote(name, safe="") for name in names)


def _predict_csv(predictor: tuner.Predictor, store: LocalStore, body: bytes, unseen: str,
                 limit: int, explain: bool = False) -> Response:
    if not body.strip():
        raise Unprocessable("the CSV body is empty; send a header row and at least one row",
                            errors=[{"field": "body", "message": "empty"}])
    frame = _read_csv_rows(store, body)
    if len(frame) > limit:
        raise PayloadTooLarge(f"at most {limit} rows per request; got {len(frame)}")
    features, ignored = predictor.schema.frame_from_table(frame, unseen=unseen)
    out = predictor.predict_columns(features)
    if explain:
        out = pd.concat([out, _contribution_columns(predictor, features)], axis=1)
    headers = {"X-Ignored-Columns": ignored_header(ignored)} if ignored else None
    return Response(frame_csv(out), media_type="text/csv; charset=utf-8", headers=headers)


@router.post(
    "/{model_id}/predictions",
    response_model=PredictResponse,
    summary="Predict new rows (JSON rows, or a CSV body with Content-Type: text/csv)",
    description=(
        "Missing feature columns and wrong types are a 422 naming row and column. Unseen "
        "categories are a 422 unless `unseen=missing`, which sends them down LightGBM's "
        "missing-value branch. Columns the model does not use are ignored and listed in "
        "`ignored_columns` (CSV: the `X-Ignored-Columns` header, each name percent-encoded "
        "as UTF-8 and the names joined by commas). An empty batch is a 422; "
        "more rows than `GROVEKEEPER_MAX_PREDICTION_ROWS`, or a body over "
        "`GROVEKEEPER_MAX_UPLOAD_MB`, is a 413. "
        "`explain=true` adds per-row TreeSHAP contributions (bias plus one value per "
        "feature, summing to the raw score; CSV: `contribution_<feature>` columns)."
    ),
    openapi_extra={"requestBody": {"content": {
        "application/json": {"schema": PredictRequest.model_json_schema()},
        "text/csv": {"schema": {"type": "string"},
                     "example": "peak_temp_c,clay_body\n1240,raku\n"},
    }}},
    responses={200: {"content": {"text/csv": {"schema": {"type": "string"}}}}},
)
async def predict(
    model_id: str,
    request: Request,
    session: SessionDep,
    settings: SettingsDep,
    store: StoreDep,
    unseen: Annotated[Unseen, Query()] = "error",
    explain: Annotated[bool, Query()] = False,
) -> PredictResponse | Response:
    predictors = request.app.state.predictors
    predictor = predictors.cached(model_id)
    if predictor is None:
        model = repository.get_model(session, model_id)
        predictor = await run_in_threadpool(predictors.get, model)
    session.close()
    media = (request.headers.get("content-type") or "").split(";")[0].strip().lower()
    limit = settings.max_prediction_rows
    body = await ingest.read_body(request, limit=settings.max_upload_mb * (1 << 20))
    if media == "text/csv":
        return await run_in_threadpool(_predict_csv, predictor, store, body, unseen, limit,
                                       explain)
    if media not in ("application/json", ""):
        raise UnsupportedMediaType(f"send application/json or text/csv, not {media}")
    if not body.strip():
        raise Unprocessable('the body is empty; send {"rows": [{column: value, ...}, ...]}',
                            errors=[{"field": "rows", "message": "missing"}])
    payload = PredictRequest.model_validate_json(body)
    if len(payload.rows) > limit:
        raise PayloadTooLarge(f"at most {limit} rows per request; got {len(payload.rows)}")
    if len(payload.rows) <= 64:  # a few rows: cheaper inline than a thread hop
        result = predictor.predict_rows(payload.rows, unseen=unseen, explain=explain)
    else:
        result = await run_in_threadpool(predictor.predict_rows, payload.rows, unseen=unseen,
                                         explain=explain)
    return PredictResponse(
        model_id=model_id,
        predictions=result["predictions"],
        classes=predictor.classes,
        probabilities=result.get("probabilities"),
        ignored_columns=result.get("ignored_columns", []),
        contributions=result.get("contributions"),
        contribution_scale=result.get("contribution_scale"),
    )

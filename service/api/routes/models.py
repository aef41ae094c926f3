"""Models: metadata, the model file, predictions (JSON or CSV)."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import FileResponse, Response

from service import repository
from service.api import paging, predicting
from service.api.deps import SessionDep, SettingsDep, StoreDep
from service.api.predicting import PREDICT_DESCRIPTION
from service.api.schemas import (
    ModelList,
    ModelOut,
    ModelSummary,
    PredictRequest,
    PredictResponse,
    Unseen,
    as_utc,
)
from service.api.tabular import csv_response, wants_csv
from service.db import session_scope
from service.errors import Conflict
from service.tables import Model
from vocabulary import DEFAULT_DECISION

router = APIRouter(prefix="/v1/models", tags=["models"])


def holdout_scores(stored: dict[str, Any] | None) -> dict[str, Any]:
    """The stored hold-out without its row count: metric name -> score."""
    return {k: v for k, v in (stored or {}).items() if k != "rows"}


def holdout_rows(stored: dict[str, Any] | None) -> int:
    return int((stored or {}).get("rows") or 0)


def to_out(model: Model) -> ModelOut:
    evaluation = (model.details or {}).get("evaluation") or {}
    return ModelOut(
        id=model.id, job_id=model.job_id, task=model.task, metric=model.metric,
        target=model.target, params=model.params, boosting_rounds=model.boosting_rounds,
        trial_number=model.trial_number, cv=model.cv, holdout=holdout_scores(model.holdout),
        holdout_rows=holdout_rows(model.holdout),
        holdout_intervals=evaluation.get("holdout_intervals") or {},
        feature_schema=model.feature_schema, classes=model.classes,
        feature_importance=model.feature_importance, details=model.details,
        decision=model.decision or (dict(DEFAULT_DECISION) if model.task == "binary" else None),
        sha256=model.sha256, size_bytes=model.size_bytes, created_at=as_utc(model.created_at),
    )


MODEL_CSV_HEADER = ["id", "job_id", "dataset_id", "task", "metric", "target",
                    "boosting_rounds", "trial_number", "holdout", "sha256", "created_at"]


@router.get("", response_model=ModelList,
            summary="List models, newest first (filters: dataset_id, job_id, target)",
            responses={200: {"content": {"text/csv": {"schema": {"type": "string"}}}}})
def list_models(
    request: Request,
    session: SessionDep,
    dataset_id: str | None = None,
    job_id: str | None = None,
    target: str | None = None,
    limit: paging.LimitQuery = paging.DEFAULT_LIMIT,
    cursor: paging.CursorQuery = None,
    format: Annotated[str | None, Query(pattern="^(json|csv)$")] = None,
) -> ModelList | Response:
    """`?cursor=` continues from a page's `next`. `Accept: text/csv` or `?format=csv`
    answers one CSV page."""
    after = paging.decode("models", cursor, (datetime, str)) if cursor else None
    rows, total = repository.list_models(session, dataset_id=dataset_id, job_id=job_id,
                                         target=target, limit=limit + 1, after=after)
    rows, nxt = paging.cut(rows, limit, "models",
                           lambda row: (as_utc(row[0].created_at), row[0].id))
    items = [ModelSummary(
        id=m.id, job_id=m.job_id, dataset_id=ds, task=m.task, metric=m.metric,
        target=m.target, boosting_rounds=m.boosting_rounds, trial_number=m.trial_number,
        cv=m.cv, holdout=holdout_scores(m.holdout), holdout_rows=holdout_rows(m.holdout),
        sha256=m.sha256, created_at=as_utc(m.created_at),
    ) for m, ds in rows]
    if wants_csv(request, format):
        return csv_response(MODEL_CSV_HEADER,
                            ([getattr(m, h) for h in MODEL_CSV_HEADER] for m in items))
    return ModelList(items=items, total=total, next=nxt)


@router.get("/{model_id}", response_model=ModelOut)
def get_model(model_id: str, session: SessionDep) -> ModelOut:
    return to_out(repository.get_model(session, model_id))


@router.delete("/{model_id}", status_code=204,
               summary="Delete a model (409 while a channel points at it)")
def delete_model(model_id: str, session: SessionDep, store: StoreDep,
                 request: Request) -> Response:
    model = repository.delete_model(session, model_id)
    session.commit()
    store.delete(model.file_key)
    request.app.state.predictors.forget(model_id)
    return Response(status_code=204)


@router.get("/{model_id}/drift", summary="Do the rows being scored look like the training rows?")
async def get_drift(
    model_id: str, request: Request, settings: SettingsDep,
    since: Annotated[str | None, Query(pattern=r"^\d{4}-\d{2}-\d{2}$",
                                       description="first day counted, YYYY-MM-DD")] = None,
) -> dict[str, Any]:
    """Per feature: the population stability index of the rows scored (by any API
    process) against the training rows, in the training bins, with its usual reading
    (below 0.1 stable, 0.1-0.25 moderate, above 0.25 significant: common practice), the
    rows counted and the missing-value rate. This process's unflushed counts are added
    first."""
    await run_in_threadpool(request.app.state.drift.flush)
    with session_scope(settings.db_url) as session:
        model = repository.get_model(session, model_id)
        reference = (model.details or {}).get("drift_reference")
        days = [(d.day, d.rows, d.counts)
                for d in repository.drift_counts(session, model_id=model_id, since=since)]
    if not reference:
        raise Conflict(f"model {model_id!r} was stored without training bins; drift is "
                       "reported for models trained since it was added")
    return drift_report(model_id, reference, days)


def drift_report(model_id: str, reference: dict[str, Any],
                 days: list[tuple[str, int, list[list[int]]]]) -> dict[str, Any]:
    from tuner.drift import psi, reading  # NumPy loads with the first drift report

    rows = sum(r for _, r, _ in days)
    features = []
    for j, entry in enumerate(reference["features"]):
        actual = [sum(day[2][j][b] for day in days) for b in range(len(entry["counts"]))]
        item: dict[str, Any] = {"name": entry["name"], "kind": entry["kind"], "rows": rows}
        if rows:
            value = psi(entry["counts"], actual)
            item.update(psi=round(value, 6), reading=reading(value),
                        missing_rate=actual[-1] / rows,
                        training_missing_rate=entry["counts"][-1] / reference["rows"])
        else:
            item.update(psi=None, reading=None, missing_rate=None,
                        training_missing_rate=entry["counts"][-1] / reference["rows"])
        item["bins"] = {"training": entry["counts"], "scored": actual,
                        **({"edges": entry["edges"]} if "edges" in entry else {})}
        features.append(item)
    features.sort(key=lambda f: -(f["psi"] or 0.0))
    return {"model_id": model_id, "rows": rows, "training_rows": reference["rows"],
            "days": [{"day": d, "rows": r} for d, r, _ in days], "features": features}


@router.get("/{model_id}/file", response_class=FileResponse,
            summary="The LightGBM text model, byte for byte as stored")
def get_model_file(model_id: str, session: SessionDep, store: StoreDep) -> FileResponse:
    model = repository.get_model(session, model_id)
    path = store.local_path(model.file_key, model.sha256)
    return FileResponse(path, media_type="text/plain; charset=utf-8",
                        filename=f"{model_id}.txt", headers={"X-Model-Sha256": model.sha256})


@router.post(
    "/{model_id}/predictions",
    response_model=PredictResponse,
    summary="Predict new rows (JSON rows, or a CSV body with Content-Type: text/csv)",
    description=PREDICT_DESCRIPTION,
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
    keep: Annotated[str | None, Query(description="input columns to return, a,b")] = None,
    threshold: predicting.ThresholdQuery = None,
) -> PredictResponse | Response:
    predictors = request.app.state.predictors
    predictor = predictors.cached(model_id)
    if predictor is None:
        model = repository.get_model(session, model_id)
        predictor = await run_in_threadpool(predictors.get, model)
    session.close()
    return await predicting.answer(request, predictor, model_id, settings=settings,
                                   store=store, unseen=unseen, explain=explain, keep=keep,
                                   threshold=threshold)

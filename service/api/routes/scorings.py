"""Batch scoring runs: submit (for a model or through a channel), show, cancel, result."""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path
from typing import Annotated

from fastapi import APIRouter, Query, Request, Response
from fastapi.responses import FileResponse, StreamingResponse

from service import repository
from service.api.deps import SessionDep, SettingsDep, StoreDep
from service.api.schemas import ScoringCreate, ScoringOut, ScoringProgress, as_utc
from service.api.tabular import frame_csv, wants_csv
from service.channels import check_name
from service.db import session_scope
from service.errors import Conflict, NotFound, Unprocessable
from service.settings import Settings
from service.tables import JobStatus, Scoring

router = APIRouter(tags=["scorings"])
PARQUET = "application/vnd.apache.parquet"
CSV_CHUNK_ROWS = 20_000


def to_out(s: Scoring) -> ScoringOut:
    total = int(s.rows_total or 0)
    done = int(s.rows_done or 0)
    return ScoringOut(
        id=s.id, model_id=s.model_id, channel=s.channel, dataset_id=s.dataset_id,
        keep=list(s.keep), unseen=s.unseen, status=s.status,
        progress=ScoringProgress(rows_done=done, rows_total=total,
                                 fraction=round(done / total, 4) if total else 0.0),
        error=s.error,
        result_url=(f"/v1/scorings/{s.id}/result"
                    if s.status == JobStatus.SUCCEEDED.value else None),
        cancel_requested=s.cancel_requested, attempts=s.attempts,
        created_at=as_utc(s.created_at), started_at=as_utc(s.started_at),
        finished_at=as_utc(s.finished_at))


def _submit(settings: Settings, model_id: str, body: ScoringCreate,
            channel: str | None) -> ScoringOut:
    with session_scope(settings.db_url) as session:
        model = repository.get_model(session, model_id)
        try:
            dataset = repository.get_dataset(session, body.dataset_id)
        except NotFound as exc:
            raise Unprocessable(str(exc), errors=[{"field": "dataset_id",
                                                   "message": "no such dataset"}]) from exc
        present = {c["name"] for c in dataset.columns} if dataset.columns else None
        if present is not None:
            errors = [{"field": f"keep[{i}]", "message": f"the dataset has no column '{k}'"}
                      for i, k in enumerate(body.keep) if k not in present]
            needed = [f["name"] for f in model.feature_schema["features"]]
            errors += [{"field": "dataset_id", "column": c,
                        "message": f"the model needs column '{c}', which the dataset lacks"}
                       for c in needed if c not in present]
            if errors:
                raise Unprocessable("the dataset cannot be scored by this model as asked",
                                    errors=errors)
        scoring = repository.add_scoring(
            session, id=repository.new_id("scr"), model_id=model_id, channel=channel,
            dataset_id=dataset.id, keep=list(dict.fromkeys(body.keep)), unseen=body.unseen,
            rows_total=dataset.rows)
        return to_out(scoring)


def _accepted(out: ScoringOut, response: Response) -> ScoringOut:
    response.headers["Location"] = f"/v1/scorings/{out.id}"
    return out


@router.post("/v1/models/{model_id}/scorings", status_code=202, response_model=ScoringOut,
             summary="Queue a batch scoring run of a stored dataset")
def score_with_model(model_id: str, body: ScoringCreate, response: Response,
                     settings: SettingsDep) -> ScoringOut:
    """A worker reads the dataset in chunks (bounded memory at any size), predicts each and
    appends it to one result; `keep` columns come first, as stored."""
    return _accepted(_submit(settings, model_id, body, None), response)


@router.post("/v1/channels/{name}/scorings", status_code=202, response_model=ScoringOut,
             summary="Queue a batch scoring run through a channel (its model fixed now)")
def score_with_channel(name: str, body: ScoringCreate, response: Response,
                       settings: SettingsDep) -> ScoringOut:
    check_name(name)
    with session_scope(settings.db_url) as session:
        model_id = repository.channel_model_id(session, name)
    return _accepted(_submit(settings, model_id, body, name), response)


@router.get("/v1/scorings/{scoring_id}", response_model=ScoringOut)
def get_scoring(scoring_id: str, session: SessionDep) -> ScoringOut:
    return to_out(repository.get_scoring(session, scoring_id))


@router.post("/v1/scorings/{scoring_id}/cancel", status_code=202, response_model=ScoringOut)
def cancel_scoring(scoring_id: str, session: SessionDep) -> ScoringOut:
    scoring = repository.cancel_scoring(session, scoring_id)
    session.commit()
    return to_out(scoring)


def _csv_chunks(path: Path, keep: list[str]) -> Iterator[bytes]:
    # Chunk by chunk, so a result of any size is sent without being held in memory.
    # Kept columns are echoed exactly; the rest is neutralised against spreadsheet
    # formulas (service/api/tabular.py).
    import pyarrow.parquet as pq  # loaded with the first result, not with the API

    parquet = pq.ParquetFile(path)
    first = True
    for batch in parquet.iter_batches(batch_size=CSV_CHUNK_ROWS):
        text = frame_csv(batch.to_pandas(), exact=keep)
        if not first:
            text = text.split("\n", 1)[1]
        first = False
        yield text.encode("utf-8")


@router.get(
    "/v1/scorings/{scoring_id}/result",
    summary="The result: Parquet, or CSV with Accept: text/csv (or ?format=csv)",
    response_class=Response,
    responses={200: {"content": {PARQUET: {"schema": {"type": "string",
                                                       "format": "binary"}},
                                 "text/csv": {"schema": {"type": "string"}}}}},
)
def get_result(
    scoring_id: str, request: Request, session: SessionDep, store: StoreDep,
    format: Annotated[str | None, Query(pattern="^(csv|parquet)$")] = None,
) -> Response:
    scoring = repository.get_scoring(session, scoring_id)
    if scoring.status != JobStatus.SUCCEEDED.value or scoring.result_key is None:
        raise Conflict(f"scoring run {scoring_id!r} is {scoring.status}; its result exists "
                       "once it has succeeded")
    path = store.local_path(scoring.result_key, scoring.result_sha256)
    session.close()
    if format != "parquet" and wants_csv(request, format):
        keep = list(scoring.keep or [])
        return StreamingResponse(_csv_chunks(path, keep), media_type="text/csv; charset=utf-8",
                                 headers={"X-Model-Id": scoring.model_id})
    return FileResponse(path, media_type=PARQUET, filename=f"{scoring_id}.parquet",
                        headers={"X-Model-Id": scoring.model_id})

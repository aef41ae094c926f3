"""Datasets: upload, list, show, delete."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated

from fastapi import APIRouter, Query, Request, Response
from fastapi.concurrency import run_in_threadpool

from service import repository
from service.api import ingest, paging
from service.api.deps import SessionDep, SettingsDep, StoreDep
from service.api.schemas import DatasetList, DatasetOut, as_utc
from service.api.tabular import csv_response, wants_csv
from service.db import session_scope
from service.storage import LocalStore
from service.tables import Dataset

router = APIRouter(prefix="/v1/datasets", tags=["datasets"])


def to_out(dataset: Dataset) -> DatasetOut:
    return DatasetOut(
        id=dataset.id,
        name=dataset.name,
        rows=dataset.rows,
        n_columns=dataset.n_columns,
        size_bytes=dataset.size_bytes,
        sha256=dataset.sha256,
        source_format=dataset.source_format,
        created_at=as_utc(dataset.created_at),
        columns=dataset.columns,
        warnings=dataset.warnings,
    )


def _store_dataset(url: str, store: LocalStore, received: ingest.Received) -> DatasetOut:
    dataset_id = repository.new_id("ds")
    key = f"datasets/{dataset_id}.parquet"
    with store.temp_path(".parquet") as tmp:
        parsed = ingest.parse_and_store(received, tmp)
        store.put(tmp, key)
    try:
        with session_scope(url) as session:
            dataset = repository.add_dataset(
                session,
                id=dataset_id,
                name=received.name,
                rows=parsed.rows,
                n_columns=parsed.n_columns,
                size_bytes=received.size,
                sha256=received.sha256,
                source_format=received.fmt,
                columns=[p.to_dict() for p in parsed.profiles],
                warnings=parsed.warnings,
                file_key=key,
                file_sha256=parsed.file_sha256,
            )
            return to_out(dataset)
    except BaseException:
        store.delete(key)  # the row never landed, so neither may the file
        raise


@router.post(
    "",
    status_code=201,
    response_model=DatasetOut,
    summary="Upload a table (CSV or Parquet)",
    description=(
        "Send the raw body with `Content-Type: text/csv` or `application/vnd.apache.parquet` "
        "(name it with `?name=`), or a multipart form with a `file` field and optional `name`."
    ),
    openapi_extra={
        "requestBody": {
            "content": {
                "text/csv": {"schema": {"type": "string"},
                             "example": "peak_temp_c,clay_body,defect\n1240,raku,0\n"},
                "application/vnd.apache.parquet": {"schema": {"type": "string",
                                                              "format": "binary"}},
                "multipart/form-data": {
                    "schema": {
                        "type": "object",
                        "properties": {"file": {"type": "string", "format": "binary"},
                                       "name": {"type": "string"},
                                       "kinds": {"type": "string"}},
                        "required": ["file"],
                    }
                },
            }
        }
    },
)
async def upload_dataset(
    request: Request,
    response: Response,
    settings: SettingsDep,
    store: StoreDep,
    name: Annotated[str | None, Query(max_length=200)] = None,
    kinds: Annotated[str | None, Query(
        max_length=20_000,
        description="Declared column kinds, `column:kind,...` (numeric, categorical, "
                    "datetime, text, ignore); categorical and text columns keep their "
                    "text exactly, leading zeros included")] = None,
) -> DatasetOut:
    limit = settings.max_upload_mb * (1 << 20)
    with store.temp_path(".upload") as tmp:
        received = await ingest.receive(request, tmp, limit=limit, name=name,
                                        table_limit=settings.table_limit_bytes, kinds=kinds)
        out = await run_in_threadpool(_store_dataset, settings.db_url, store, received)
    response.headers["Location"] = f"/v1/datasets/{out.id}"
    return out


@router.get("", response_model=DatasetList,
            summary="List datasets, newest first; `Accept: text/csv` or `?format=csv` for CSV")
def list_datasets(
    request: Request,
    session: SessionDep,
    limit: paging.LimitQuery = paging.DEFAULT_LIMIT,
    cursor: paging.CursorQuery = None,
    format: Annotated[str | None, Query(pattern="^(json|csv)$")] = None,
) -> DatasetList | Response:
    """`?cursor=` continues from a page's `next`; the CSV form is the same page."""
    after = paging.decode("datasets", cursor, (datetime, str)) if cursor else None
    rows, total = repository.list_datasets(session, limit=limit + 1, after=after)
    rows, nxt = paging.cut(rows, limit, "datasets", lambda d: (as_utc(d.created_at), d.id))
    out = [to_out(d) for d in rows]
    if wants_csv(request, format):
        header = ["id", "name", "rows", "n_columns", "size_bytes", "source_format", "sha256",
                  "created_at", "warnings"]
        return csv_response(header, ([getattr(d, h) for h in header] for d in out))
    return DatasetList(items=out, total=total, next=nxt)


@router.get("/{dataset_id}", response_model=DatasetOut)
def get_dataset(dataset_id: str, session: SessionDep) -> DatasetOut:
    return to_out(repository.get_dataset(session, dataset_id))


@router.delete("/{dataset_id}", status_code=204)
def delete_dataset(dataset_id: str, session: SessionDep, store: StoreDep) -> Response:
    dataset = repository.delete_dataset(session, dataset_id)
    session.commit()
    store.delete(dataset.file_key)
    return Response(status_code=204)

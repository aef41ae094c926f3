"""Channels: set, show, list, roll back, and predict through one."""

from __future__ import annotations

from typing import Annotated

from fastapi import APIRouter, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import Response

from service import channels, repository
from service.api import paging, predicting
from service.api.deps import SessionDep, SettingsDep, StoreDep
from service.api.predicting import PREDICT_DESCRIPTION
from service.api.schemas import (
    ChannelList,
    ChannelMove,
    ChannelOut,
    ChannelPut,
    ChannelSummary,
    PredictRequest,
    PredictResponse,
    Unseen,
    as_utc,
)
from service.auth import hash_key
from service.db import session_scope
from service.settings import Settings

router = APIRouter(prefix="/v1/channels", tags=["channels"])


def key_id(request: Request, settings: Settings) -> str | None:
    """The id of the key that sent the request (None on a server without keys)."""
    authorization = request.headers.get("authorization") or ""
    if not authorization.lower().startswith("bearer "):
        return None
    with session_scope(settings.db_url) as session:
        return repository.key_id_for_hash(session, hash_key(authorization[7:].strip()))


def channel_out(settings: Settings, name: str) -> ChannelOut:
    with session_scope(settings.db_url) as session:
        channel = repository.get_channel(session, name)
        history = repository.channel_history(session, name=name)
        return ChannelOut(
            name=channel.name, model_id=channel.model_id,
            created_at=as_utc(channel.created_at), updated_at=as_utc(channel.updated_at),
            history=[ChannelMove(model_id=e.model_id, previous_model_id=e.previous_model_id,
                                 action=e.action, forced=e.forced, key_id=e.key_id,
                                 job_id=e.job_id, at=as_utc(e.at)) for e in history])


@router.put("/{name}", response_model=ChannelOut,
            summary="Point a channel at a model (created on first use)")
def put_channel(name: str, body: ChannelPut, request: Request,
                settings: SettingsDep) -> ChannelOut:
    """A model whose input columns differ from the current model's (columns callers would
    have to add, a changed kind, another task) is refused with 409 listing them, unless
    `force` is true. Setting the model already there records nothing."""
    channels.switch(settings.db_url, name, body.model_id, force=body.force,
                    key_id=key_id(request, settings))
    return channel_out(settings, name)


@router.get("/{name}", response_model=ChannelOut)
def get_channel(name: str, settings: SettingsDep) -> ChannelOut:
    return channel_out(settings, name)


@router.get("", response_model=ChannelList, summary="List channels by name")
def list_channels(
    session: SessionDep,
    limit: paging.LimitQuery = paging.DEFAULT_LIMIT,
    cursor: paging.CursorQuery = None,
) -> ChannelList:
    """`?cursor=` continues from a page's `next`."""
    after = paging.decode("channels", cursor, (str,))[0] if cursor else None
    rows, total = repository.list_channels(session, limit=limit + 1, after=after)
    rows, nxt = paging.cut(rows, limit, "channels", lambda c: (c.name,))
    items = [ChannelSummary(name=c.name, model_id=c.model_id,
                            updated_at=as_utc(c.updated_at)) for c in rows]
    return ChannelList(items=items, total=total, next=nxt)


@router.post("/{name}/rollback", response_model=ChannelOut,
             summary="Point the channel back at the model it had before its last move")
def rollback_channel(name: str, request: Request, settings: SettingsDep) -> ChannelOut:
    """Recorded as a new move (`action: rollback`); 409 when the channel has had only one
    model."""
    channels.rollback(settings.db_url, name, key_id=key_id(request, settings))
    return channel_out(settings, name)


@router.post(
    "/{name}/predictions",
    response_model=PredictResponse,
    summary="Predict through a channel: the answer names the model (model_id, X-Model-Id)",
    description=PREDICT_DESCRIPTION,
    openapi_extra={"requestBody": {"content": {
        "application/json": {"schema": PredictRequest.model_json_schema()},
        "text/csv": {"schema": {"type": "string"},
                     "example": "peak_temp_c,clay_body\n1240,raku\n"},
    }}},
    responses={200: {"content": {"text/csv": {"schema": {"type": "string"}}}}},
)
async def predict(
    name: str,
    request: Request,
    session: SessionDep,
    settings: SettingsDep,
    store: StoreDep,
    unseen: Annotated[Unseen, Query()] = "error",
    explain: Annotated[bool, Query()] = False,
    keep: Annotated[str | None, Query(description="input columns to return, a,b")] = None,
    threshold: predicting.ThresholdQuery = None,
) -> PredictResponse | Response:
    # The channel is read once, so the whole request is answered by one model even when
    # the channel moves meanwhile.
    model_id = repository.channel_model_id(session, name)
    predictors = request.app.state.predictors
    predictor = predictors.cached(model_id)
    if predictor is None:
        model = repository.get_model(session, model_id)
        predictor = await run_in_threadpool(predictors.get, model)
    session.close()
    return await predicting.answer(request, predictor, model_id, settings=settings,
                                   store=store, unseen=unseen, explain=explain, keep=keep,
                                   threshold=threshold)

"""Live progress of a job as Server-Sent Events, so other systems need not poll.

The API process has no line to the workers: the stream polls the database (our copy
of the trials, and the job row) and turns what changed into events. Reading the status
before the trials means that once a terminal status is seen, every trial the worker
committed before finishing is read in the same pass, so the final event comes last.
"""

from __future__ import annotations

import asyncio
from collections.abc import AsyncIterator
from typing import Annotated, Any

import sqlalchemy as sa
from fastapi import APIRouter, Depends, Query, Request
from fastapi.concurrency import run_in_threadpool
from fastapi.sse import EventSourceResponse, ServerSentEvent

from service import repository
from service.api.deps import SettingsDep
from service.api.routes.jobs import to_out
from service.api.schemas import TrialOut
from service.db import session_scope
from service.tables import JobStatus, Trial

router = APIRouter(prefix="/v1/jobs", tags=["jobs"])

EXAMPLE_STREAM = (
    'event: status\ndata: {"job_id": "job_0123abcd", "status": "running", "final": false, '
    '"progress": {"trials_completed": 0, "trials_budget": 40, "eta_seconds": null}}\n\n'
    'event: trial\nid: 0\ndata: {"job_id": "job_0123abcd", "number": 0, "state": "complete", '
    '"score": 0.861, "duration_seconds": 0.42, "trials_completed": 1, "trials_pruned": 0}\n\n'
    'event: status\ndata: {"job_id": "job_0123abcd", "status": "succeeded", "final": true, '
    '"model_id": "mdl_4567cdef"}\n\n'
)


def _status_payload(job: Any, *, final: bool) -> dict[str, Any]:
    out = to_out(job)
    return {"job_id": out.id, "status": out.status, "final": final,
            "progress": out.progress.model_dump(), "model_id": out.model_id,
            "error": out.error}


def _poll(url: str, job_id: str, floor: int, seen: set[int]) -> tuple[dict[str, Any], list]:
    """The job's status, then its finished trials numbered ``floor`` or more not yet seen."""
    with session_scope(url) as session:
        job = repository.get_job(session, job_id)
        status = {"status": job.status, "payload": _status_payload(job, final=False)}
        trials = session.scalars(
            sa.select(Trial)
            .where(Trial.job_id == job_id, Trial.number >= floor)
            .order_by(Trial.number)
        ).all()
        fresh = [TrialOut.model_validate(t, from_attributes=True)
                 for t in trials if t.number not in seen]
    return status, fresh


async def _stream(
    request: Request, url: str, job_id: str, poll: float
) -> AsyncIterator[ServerSentEvent]:
    seen: set[int] = set()
    floor = 0  # every trial below this number has been sent
    last_status: str | None = None
    completed = pruned = failed = 0
    while True:
        status, fresh = await run_in_threadpool(_poll, url, job_id, floor, seen)
        if status["status"] != last_status and not JobStatus(status["status"]).is_finished():
            last_status = status["status"]
            yield ServerSentEvent(event="status", data=status["payload"])
        for trial in fresh:
            seen.add(trial.number)
            completed += trial.state == "complete"
            pruned += trial.state == "pruned"
            failed += trial.state == "failed"
            yield ServerSentEvent(
                event="trial", id=str(trial.number),
                data={"job_id": job_id, **trial.model_dump(), "trials_completed": completed,
                      "trials_pruned": pruned, "trials_failed": failed})
        while floor in seen:
            floor += 1
        if JobStatus(status["status"]).is_finished():
            yield ServerSentEvent(event="status", data={**status["payload"], "final": True})
            return
        if await request.is_disconnected():
            return
        await asyncio.sleep(poll)


def _existing_job(job_id: str, settings: SettingsDep) -> str:
    # A dependency, so an unknown job is a 404 before the stream starts; its own short
    # session, so no connection stays checked out while the stream runs.
    with session_scope(settings.db_url) as session:
        repository.get_job(session, job_id)
    return job_id


@router.get(
    "/{job_id}/events",
    response_class=EventSourceResponse,
    summary="Live progress as Server-Sent Events",
    description=(
        "A `status` event now and on every status change, a `trial` event (id = trial "
        "number) for every finished trial, and a last `status` event with `final: true` "
        "once the job has succeeded, failed or been cancelled; then the stream ends. "
        "Try `curl -N`."
    ),
    responses={200: {"content": {"text/event-stream": {"example": EXAMPLE_STREAM}}}},
)
async def job_events(
    request: Request,
    job_id: Annotated[str, Depends(_existing_job)],
    poll: Annotated[float, Query(ge=0.1, le=10, description="seconds between looks")] = 0.5,
) -> AsyncIterator[ServerSentEvent]:
    url = request.app.state.settings.db_url
    async for event in _stream(request, url, job_id, poll):
        yield event

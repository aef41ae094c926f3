"""Live progress of a job as Server-Sent Events, so other systems need not poll.

The API process has no line to the workers: one shared poller per watched job reads
the database (our copy of the trials, and the job row) and every open stream of that
job turns what changed into events (service/api/jobwatch.py).
"""

from __future__ import annotations

from collections.abc import AsyncIterator
from typing import Annotated, Any
from urllib.parse import quote

from fastapi import APIRouter, Depends, Query, Request, Response
from fastapi.sse import EventSourceResponse, ServerSentEvent

from service import repository
from service.api.deps import SettingsDep
from service.api.jobwatch import Ticket, WatchHub
from service.api.routes.jobs import to_out
from service.auth import hash_key
from service.db import session_scope

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


def _watcher(request: Request) -> str:
    """Whose stream this is, for the per-key cap: a hash of the key (all key-less
    requests count as one)."""
    authorization = request.headers.get("authorization")
    return hash_key(authorization) if authorization else "no key"


async def _stream(request: Request, ticket: Ticket) -> AsyncIterator[ServerSentEvent]:
    hub: WatchHub = request.app.state.watch_hub
    async for kind, data in hub.events(ticket, request.is_disconnected):
        if kind == "trial":
            yield ServerSentEvent(event="trial", id=str(data["number"]), data=data)
        else:
            yield ServerSentEvent(event="status", data=data)


def _existing_job(job_id: str, settings: SettingsDep) -> str:
    # A dependency, so an unknown job is a 404 before the stream starts; its own short
    # session, so no connection stays checked out while the stream runs.
    with session_scope(settings.db_url) as session:
        repository.get_job(session, job_id)
    return job_id


async def _admitted(request: Request, job_id: Annotated[str, Depends(_existing_job)],
                    ) -> AsyncIterator[Ticket]:
    """A place under the stream caps, taken before the response starts (so a refusal is
    a 429, not a stream cut short) and given back when the request ends, even if the
    stream itself never started."""
    hub: WatchHub = request.app.state.watch_hub
    ticket = hub.subscribe(job_id, _watcher(request),
                           lambda job: _status_payload(job, final=False))
    try:
        yield ticket
    finally:
        ticket.release()


@router.get(
    "/{job_id}/watch",
    response_class=EventSourceResponse,
    summary="Live progress as Server-Sent Events",
    description=(
        "A `status` event now and on every status change, a `trial` event (id = trial "
        "number) for every finished trial, and a last `status` event with `final: true` "
        "once the job has succeeded, failed or been cancelled; then the stream ends. "
        "Try `curl -N`. A job's streams share one poller that looks once a second; open "
        "streams are capped per key and in total (429 past a cap)."
    ),
    responses={200: {"content": {"text/event-stream": {"example": EXAMPLE_STREAM}}}},
)
async def watch_job(
    request: Request,
    ticket: Annotated[Ticket, Depends(_admitted, scope="request")],
    poll: Annotated[float, Query(
        ge=0.1, le=10, description="accepted for older clients; a job's streams share one "
        "poller that looks once a second")] = 1.0,
) -> AsyncIterator[ServerSentEvent]:
    async for event in _stream(request, ticket):
        yield event


#: The stream's path until this release; it redirects for one release, then goes.
OLD_STREAM_NOTE = (
    "Deprecated: the stream moved to `GET /v1/jobs/{job_id}/watch`. This path answers "
    "308 to it (query kept) with a `Deprecation` header, for this release only."
)


@router.get("/{job_id}/events", status_code=308, deprecated=True, response_class=Response,
            summary="Old path of the live stream (308 to /watch)",
            description=OLD_STREAM_NOTE,
            responses={308: {"description": "Permanent redirect to `/v1/jobs/{job_id}/watch`",
                             "headers": {"Location": {"schema": {"type": "string"}},
                                         "Deprecation": {"schema": {"type": "string"}}}}})
def old_job_events(job_id: str, request: Request) -> Response:
    # Nothing is looked up: the redirect answers the same for every job, and the new
    # path gives the 404 for an unknown one.
    query = request.url.query
    location = f"/v1/jobs/{quote(job_id, safe='')}/watch" + (f"?{query}" if query else "")
    return Response(status_code=308, headers={
        "Location": location, "Deprecation": "true",
        "Link": f'<{location}>; rel="successor-version"'})

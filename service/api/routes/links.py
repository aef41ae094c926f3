"""``POST /v1/jobs/{job_id}/report-links``: a signed, expiring, read-only report link.

Any key may ask (read scope, though it is a POST: nothing is stored). The link opens the
job's report page without a header, so it can be pasted into a browser or a chat; see
service/links.py for what it opens and how it is checked.
"""

from __future__ import annotations

from datetime import UTC, datetime

from fastapi import APIRouter, Body, Request
from pydantic import BaseModel, ConfigDict, Field

from service import links, repository
from service.api.deps import SessionDep

router = APIRouter(prefix="/v1/jobs", tags=["reports"])


class ReportLinkCreate(BaseModel):
    model_config = ConfigDict(extra="forbid")

    expires_in: int = Field(
        default=links.DEFAULT_SECONDS, ge=1, le=links.MAX_SECONDS,
        description=f"seconds the link stays valid (default {links.DEFAULT_SECONDS}, at most "
                    f"{links.MAX_SECONDS})")


class ReportLinkOut(BaseModel):
    url: str = Field(description="the report page, openable without a key until expires_at")
    expires_at: datetime


@router.post(
    "/{job_id}/report-links", response_model=ReportLinkOut,
    summary="A signed link to the job's report that opens without a key, for a while",
    description=(
        "The link opens, with GET only and until `expires_at`, this job's report page, its "
        "plots, its JSON and leaderboard, and its model's JSON, file and bundle: every "
        "link on the page. Anything else through it (another job or model, a change) is "
        f"a 403; an altered link is a 401, an expired one too. Default "
        f"{links.DEFAULT_SECONDS // 60} minutes, at most {links.MAX_SECONDS // 3600} hours "
        "(`expires_in`, seconds). Needs any key (read scope)."),
)
def create_report_link(
    job_id: str,
    request: Request,
    session: SessionDep,
    body: ReportLinkCreate | None = Body(default=None),  # noqa: B008 - FastAPI's idiom
) -> ReportLinkOut:
    repository.get_job(session, job_id)  # 404 for an unknown job
    seconds = (body or ReportLinkCreate()).expires_in
    path, expires = request.app.state.links.mint(job_id, seconds)
    base = str(request.base_url).rstrip("/")
    return ReportLinkOut(url=base + path, expires_at=datetime.fromtimestamp(expires, UTC))

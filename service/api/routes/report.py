"""A job for people: SVG plots and an HTML report page."""

from __future__ import annotations

from typing import Any, Literal

from fastapi import APIRouter
from fastapi.concurrency import run_in_threadpool
from fastapi.responses import HTMLResponse, Response

from service import repository
from service.api.deps import SettingsDep
from service.api.routes.jobs import to_out as job_out
from service.api.routes.models import to_out as model_out
from service.api.schemas import TrialOut
from service.db import session_scope
from service.errors import NotFound
from service.report import page

router = APIRouter(prefix="/v1/jobs", tags=["reports"])
PlotName = Literal["history", "hyperparameters", "features", "learning", "calibration",
                   "gains", "confusion", "predicted", "residuals", "segments"]
BOARD_ROWS = 20


def _load(url: str, job_id: str, *, board: bool) -> dict[str, Any]:
    """Plain dicts of the job, its trials (or top of the leaderboard) and its model."""
    with session_scope(url) as session:
        job = repository.get_job(session, job_id)
        out: dict[str, Any] = {"job": job_out(job).model_dump(mode="json")}
        out["trials"] = [TrialOut.model_validate(t, from_attributes=True).model_dump()
                         for t in repository.list_trials(session, job_id=job_id)]
        if board:
            rows, count = repository.leaderboard(session, job_id=job_id,
                                                 direction=out["job"]["direction"],
                                                 limit=BOARD_ROWS)
            out["board"] = [{"rank": i, "number": t.number, "score": t.score,
                             "score_std": t.score_std, "params": t.params,
                             "boosting_rounds": t.boosting_rounds}
                            for i, t in enumerate(rows, start=1)]
            out["count"] = count
        out["model"] = (model_out(repository.get_model(session, job.model_id))
                        .model_dump(mode="json") if job.model_id else None)
        if board:
            try:
                out["dataset"] = {"id": job.dataset_id,
                                  "name": repository.get_dataset(session, job.dataset_id).name}
            except NotFound:
                out["dataset"] = {"id": job.dataset_id, "name": None}  # deleted since
    return out


def _plot(url: str, job_id: str, name: str) -> bytes:
    from service.report import plots  # matplotlib loads with the first plot, not the API

    loaded = _load(url, job_id, board=False)
    try:
        return plots.render(name, trials=loaded["trials"], job=loaded["job"],
                            model=loaded["model"])
    except plots.PlotUnavailable as exc:
        raise NotFound(f"plot '{name}' of job {job_id!r} is not available: {exc}") from exc


@router.get("/{job_id}/plots/{name}.svg", response_class=Response,
            summary="A plot of the job as SVG",
            responses={200: {"content": {"image/svg+xml": {}}}})
async def get_plot(job_id: str, name: PlotName, settings: SettingsDep) -> Response:
    """`history` (score per trial, best so far), `hyperparameters` (fANOVA), `features`
    (gain), `learning` (train vs validation per round), `calibration` (binary only), and on
    the hold-out `gains` (binary), `confusion` (classification), `predicted` and `residuals`
    (regression), `segments` (metrics per segment of the job's `segments` columns)."""
    svg = await run_in_threadpool(_plot, settings.db_url, job_id, name)
    return Response(svg, media_type="image/svg+xml",
                    headers={"Cache-Control": "no-cache"})


def _report(url: str, job_id: str) -> str:
    from service.report import plots  # matplotlib loads with the first plot, not the API

    loaded = _load(url, job_id, board=True)
    return page.render(loaded["job"], loaded["board"], loaded["count"], loaded["model"],
                       plots.available(trials=loaded["trials"], model=loaded["model"]),
                       dataset=loaded["dataset"])


@router.get("/{job_id}/report", response_class=HTMLResponse,
            summary="A readable report of the job (HTML, refreshes while it runs)")
async def get_report(job_id: str, settings: SettingsDep) -> HTMLResponse:
    html = await run_in_threadpool(_report, settings.db_url, job_id)
    return HTMLResponse(html, headers={"Cache-Control": "no-cache"})

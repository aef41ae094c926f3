"""Tuning jobs: submit, list, show, cancel, trials, leaderboard."""

from __future__ import annotations

from datetime import datetime
from typing import Annotated, Any

from fastapi import APIRouter, Query, Request, Response
from sqlalchemy import RowMapping
from sqlalchemy.orm import Session

from service import repository
from service.admission import WARM_START_TRIALS, admit
from service.api import paging
from service.api.deps import SessionDep, SettingsDep, StoreDep
from service.api.schemas import (
    JobList,
    JobOut,
    JobSummary,
    Leaderboard,
    LeaderboardRow,
    Progress,
    StatusName,
    TrialList,
    TrialOut,
    as_utc,
)
from service.api.tabular import csv_response, wants_csv
from service.db import session_scope
from service.errors import NotFound, Unprocessable
from service.jobrequest import JobCreate, JobRequest
from service.progress import eta_seconds
from service.settings import Settings
from service.storage import LocalStore
from service.tables import Job, JobStatus, Trial, job_summary_fields, utcnow

router = APIRouter(prefix="/v1/jobs", tags=["jobs"])
StatusFilter = StatusName


def _progress(*, status: str, started_at: datetime | None, finished_at: datetime | None,
              trials_completed: int, trials_pruned: int, trials_failed: int,
              trials_budget: int, seconds_budget: float | None, best_score: float | None,
              best_trial_number: int | None, trials_by_fidelity: dict[str, int] | None,
              ) -> Progress:
    started = as_utc(started_at)
    end = as_utc(finished_at) or utcnow()
    elapsed = max((end - started).total_seconds(), 0.0) if started else 0.0
    return Progress(
        trials_completed=trials_completed, trials_pruned=trials_pruned,
        trials_failed=trials_failed, trials_budget=trials_budget, best_score=best_score,
        best_trial_number=best_trial_number, trials_by_fidelity=trials_by_fidelity or {},
        elapsed_seconds=round(elapsed, 3),
        eta_seconds=eta_seconds(
            status=status, elapsed=elapsed,
            finished_trials=trials_completed + trials_pruned + trials_failed,
            trials_budget=trials_budget, seconds_budget=seconds_budget),
    )


def to_out(job: Job) -> JobOut:
    effective = job.spec["effective"]
    return JobOut(
        id=job.id,
        dataset_id=job.dataset_id,
        status=job.status,
        priority=job.priority,
        target=effective["target"],
        task=effective["task"],
        metric=effective["metric"],
        direction=effective["direction"],
        spec=effective,
        progress=_progress(
            status=job.status, started_at=job.started_at, finished_at=job.finished_at,
            trials_completed=job.trials_completed, trials_pruned=job.trials_pruned,
            trials_failed=job.trials_failed, trials_budget=effective["budget"]["trials"],
            seconds_budget=effective["budget"].get("seconds"), best_score=job.best_score,
            best_trial_number=job.best_trial_number,
            trials_by_fidelity=job.trials_by_fidelity),
        model_id=job.model_id,
        promotion=job.promotion,
        error=job.error,
        problem=job.problem,
        warnings=job.warnings,
        cancel_requested=job.cancel_requested,
        attempts=job.attempts,
        max_workers=job.max_workers,
        created_at=as_utc(job.created_at),
        started_at=as_utc(job.started_at),
        finished_at=as_utc(job.finished_at),
    )


def to_summary(row: RowMapping) -> JobSummary:
    """A jobs-list row (repository.JOB_SUMMARY_COLUMNS) as the list shows it."""
    fields = dict(row)
    if fields["target"] is None:  # written before the summary columns existed
        fields.update(job_summary_fields(fields["unsummarised_spec"] or {}))
    return JobSummary(
        id=fields["id"], dataset_id=fields["dataset_id"], status=fields["status"],
        priority=fields["priority"], target=fields["target"], task=fields["task"],
        metric=fields["metric"], direction=fields["direction"],
        progress=_progress(
            status=fields["status"], started_at=fields["started_at"],
            finished_at=fields["finished_at"], trials_completed=fields["trials_completed"],
            trials_pruned=fields["trials_pruned"], trials_failed=fields["trials_failed"],
            trials_budget=fields["trials_budget"], seconds_budget=fields["seconds_budget"],
            best_score=fields["best_score"], best_trial_number=fields["best_trial_number"],
            trials_by_fidelity=fields["trials_by_fidelity"]),
        model_id=fields["model_id"], error=fields["error"],
        cancel_requested=fields["cancel_requested"], attempts=fields["attempts"],
        max_workers=fields["max_workers"], created_at=as_utc(fields["created_at"]),
        started_at=as_utc(fields["started_at"]), finished_at=as_utc(fields["finished_at"]),
    )


def _warm_start(session: Session, job_id: str) -> tuple[dict[str, Any], str]:
    """The earlier job's best trials, to enqueue first; and that job's task."""
    def bad(message: str) -> Unprocessable:
        return Unprocessable(message, errors=[{"field": "warm_start_job_id",
                                               "message": message}])
    try:
        earlier = repository.get_job(session, job_id)
    except NotFound as exc:
        raise bad(f"no job '{job_id}' to warm-start from") from exc
    effective = earlier.spec["effective"]
    top, _ = repository.leaderboard(session, job_id=job_id, direction=effective["direction"],
                                    limit=WARM_START_TRIALS)
    if not top:
        raise bad(f"job '{job_id}' has no complete trial to start from")
    warm = {"job_id": job_id, "trials": [t.number for t in top],
            "params": [dict(t.params) for t in top]}
    return warm, effective["task"]


def _submit(settings: Settings, store: LocalStore, body: JobCreate) -> JobOut:
    request = body.model_dump(mode="json")
    with session_scope(settings.db_url) as session:
        try:
            dataset = repository.get_dataset(session, body.dataset_id)
        except NotFound as exc:
            raise Unprocessable(str(exc), errors=[{"field": "dataset_id",
                                                   "message": "no such dataset"}]) from exc
        columns, rows = list(dataset.columns or []), dataset.rows
        # Kinds declared at upload hold for every job on the dataset unless the job says
        # otherwise; stored in the request so the worker sees the same.
        named = set(body.features or ())
        uploaded = {c["name"]: c["declared"] for c in dataset.columns or []
                    if c.get("declared") and c["name"] != body.target
                    and not (c["declared"] == "ignore" and c["name"] in named)}
        if uploaded:
            request["column_kinds"] = {**uploaded, **(request.get("column_kinds") or {})}
        warm_task = None
        if body.warm_start_job_id is not None:
            # Resolved now and stored in the request, so the worker enqueues exactly these.
            request["warm_start"], warm_task = _warm_start(session, body.warm_start_job_id)
    stored = JobRequest.load(request)
    # Every problem the dataset's profile shows is a 422 now; the worker prepares the rows
    # and fails the job with the same problem document if they show one more.
    effective = admit(stored, columns, rows, warm_task=warm_task)
    job_id = repository.new_id("job")
    with session_scope(settings.db_url) as session:
        job = repository.add_job(
            session,
            id=job_id,
            dataset_id=body.dataset_id,
            priority=body.priority,
            max_workers=body.max_workers,
            spec={"request": stored.model_dump(mode="json"), "effective": effective},
            study_name=f"grovekeeper-{job_id}",
            warnings=[],
        )
        return to_out(job)


@router.post("", status_code=202, response_model=JobOut, summary="Queue a tuning job")
def submit_job(
    body: JobCreate, response: Response, settings: SettingsDep, store: StoreDep
) -> JobOut:
    out = _submit(settings, store, body)
    response.headers["Location"] = f"/v1/jobs/{out.id}"
    return out


@router.get("", response_model=JobList,
            summary="List jobs, newest first; `Accept: text/csv` or `?format=csv` for CSV")
def list_jobs(
    request: Request,
    session: SessionDep,
    status: StatusFilter | None = None,
    limit: paging.LimitQuery = paging.DEFAULT_LIMIT,
    cursor: paging.CursorQuery = None,
    format: Annotated[str | None, Query(pattern="^(json|csv)$")] = None,
) -> JobList | Response:
    """`?cursor=` continues from a page's `next` (with the same `status`); the CSV form
    is the same page."""
    after = paging.decode("jobs", cursor, (datetime, str)) if cursor else None
    rows, total = repository.list_job_summaries(session, status=status, limit=limit + 1,
                                                after=after)
    rows, nxt = paging.cut(rows, limit, "jobs", lambda j: (as_utc(j["created_at"]), j["id"]))
    out = [to_summary(j) for j in rows]
    if wants_csv(request, format):
        return csv_response(JOB_CSV_HEADER, (_job_csv_row(j) for j in out))
    return JobList(items=out, total=total, next=nxt)


JOB_CSV_HEADER = ["id", "dataset_id", "status", "target", "task", "metric", "trials_completed",
                  "trials_pruned", "trials_failed", "trials_budget", "best_score",
                  "elapsed_seconds", "eta_seconds", "model_id", "created_at", "finished_at",
                  "error"]


def _job_csv_row(job: JobSummary) -> list[object]:
    fields = {**job.progress.model_dump(), **job.model_dump(exclude={"progress"})}
    return [fields[h] for h in JOB_CSV_HEADER]


@router.get("/{job_id}", response_model=JobOut)
def get_job(job_id: str, session: SessionDep) -> JobOut:
    return to_out(repository.get_job(session, job_id))


@router.post("/{job_id}/cancel", status_code=202, response_model=JobOut)
def cancel_job(job_id: str, session: SessionDep) -> JobOut:
    job = repository.request_cancel(session, job_id)
    # Commit before answering: the session dependency's own commit may run after the
    # response is sent, and a client's next request must already see the cancellation.
    session.commit()
    return to_out(job)


def _trial_out(t: object) -> TrialOut:
    return TrialOut.model_validate(t, from_attributes=True)


_CSV_TOO: dict[int | str, dict[str, Any]] = {
    200: {"content": {"text/csv": {"schema": {"type": "string"}}}}}


def _ranked_score(trial: Trial) -> float:
    # repository.leaderboard ranks only trials that have a score.
    if trial.score is None:
        raise RuntimeError(f"trial {trial.number} is ranked without a score")
    return trial.score


@router.get("/{job_id}/trials", response_model=TrialList, responses=_CSV_TOO)
def list_trials(
    job_id: str,
    request: Request,
    session: SessionDep,
    limit: Annotated[int | None, Query(ge=1, le=paging.MAX_LIMIT, description=(
        "most trials on one page (JSON: 100 when not given; CSV: every trial)"))] = None,
    cursor: paging.CursorQuery = None,
    format: Annotated[str | None, Query(pattern="^(json|csv)$")] = None,
) -> TrialList | Response:
    """Trials by number; `?cursor=` continues from a page's `next`. The CSV form is one
    table: every trial, or the page that `limit` and `cursor` name."""
    repository.get_job(session, job_id)
    csv = wants_csv(request, format)
    after = paging.decode("trials", cursor, (int,))[0] if cursor else None
    page_size = limit if limit is not None or csv else paging.DEFAULT_LIMIT
    rows = repository.list_trials(session, job_id=job_id, after=after,
                                  limit=None if page_size is None else page_size + 1)
    if page_size is None:
        page, nxt = list(rows), None
    else:
        page, nxt = paging.cut(rows, page_size, "trials", lambda t: (t.number,))
    trials = [_trial_out(t) for t in page]
    if csv:
        header = ["number", "state", "score", "score_std", "score_se", "fidelity",
                  "boosting_rounds", "duration_seconds", "fold_scores", "params"]
        return csv_response(header, ([getattr(t, h) for h in header] for t in trials))
    total = repository.count_trials(session, job_id=job_id)
    return TrialList(items=trials, total=total, next=nxt)


@router.get("/{job_id}/leaderboard", response_model=Leaderboard, responses=_CSV_TOO)
def leaderboard(
    job_id: str,
    request: Request,
    session: SessionDep,
    limit: Annotated[int | None, Query(ge=1, le=100_000, description=(
        "most rows on one page (JSON: 100 when not given; CSV: every ranked trial)"))] = None,
    cursor: paging.CursorQuery = None,
    format: Annotated[str | None, Query(pattern="^(json|csv)$")] = None,
) -> Leaderboard | Response:
    """Finished trials ranked best first (ties by number); `?cursor=` continues from a
    page's `next`. `Accept: text/csv` or `?format=csv` answers one table with a header
    row: every ranked trial, or the page that `limit` and `cursor` name."""
    job = repository.get_job(session, job_id)
    direction = job.spec["effective"]["direction"]
    csv = wants_csv(request, format)
    after, rank = None, 0
    if cursor:
        score, number, rank = paging.decode("leaderboard", cursor, (float, int, int))
        after = (score, number)
    page_size = limit if limit is not None or csv else paging.DEFAULT_LIMIT
    trials, total = repository.leaderboard(
        session, job_id=job_id, direction=direction, after=after,
        limit=None if page_size is None else page_size + 1)
    rows = [
        LeaderboardRow(rank=i, number=t.number, score=_ranked_score(t), score_std=t.score_std,
                       score_se=t.score_se, params=t.params, boosting_rounds=t.boosting_rounds)
        for i, t in enumerate(trials, start=rank + 1)
    ]
    nxt = None
    if page_size is not None:
        rows, nxt = paging.cut(rows, page_size, "leaderboard",
                               lambda r: (r.score, r.number, r.rank))
    if csv:
        names = sorted({name for r in rows for name in r.params})
        header = ["rank", "number", "score", "score_std", "score_se", "boosting_rounds",
                  *names]
        return csv_response(header, (
            [r.rank, r.number, r.score, r.score_std, r.score_se, r.boosting_rounds,
             *(r.params.get(n) for n in names)] for r in rows))
    return Leaderboard(job_id=job_id, metric=job.spec["effective"]["metric"],
                       direction=direction, items=rows, total=total, next=nxt)


def job_status_values() -> list[str]:
    return [s.value for s in JobStatus]

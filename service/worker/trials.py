"""The service's ranked copy of a job's trials (``gk_trials``) and the job's counts."""

from __future__ import annotations

import logging
from typing import Any

import tuner
from service import repository
from service.db import session_scope
from service.tables import Job

log = logging.getLogger("grovekeeper.worker")


def record_trial(url: str, job_id: str, worker_id: str, record: tuner.TrialRecord) -> None:
    with session_scope(url) as session:
        # Several workers record trials of one job: lock its row first (PostgreSQL;
        # SQLite writes one at a time anyway) so the counts below see every commit.
        session.get(Job, job_id, with_for_update={"key_share": True})
        repository.upsert_trial(session, job_id=job_id,
                                record={**record.to_dict(), "worker_id": worker_id})
        refresh_progress(session, job_id)
    # Parallel trials call this from the sampler's threads, which do not inherit the
    # worker's log context: name the job and worker on the line itself.
    log.info("trial %d %s, score %s", record.number, record.state, record.score,
             extra={"trial": record.number, "job_id": job_id, "worker_id": worker_id})


def resync_trials(url: str, job_id: str, study_name: str) -> None:
    """Copy trials Optuna finished but we never recorded (a crash between the two)."""
    records = [r for r in tuner.load_trial_records(url, study_name) if r.state != "running"]
    if not records:
        return
    with session_scope(url) as session:
        known = {t.number: t.state for t in repository.list_trials(session, job_id=job_id)}
        for record in records:
            if known.get(record.number) != record.state:
                repository.upsert_trial(session, job_id=job_id, record=record.to_dict())
        refresh_progress(session, job_id)


def refresh_progress(session: Any, job_id: str) -> None:
    job: Job = repository.get_job(session, job_id)
    counts = repository.trial_counts(session, job_id=job_id)
    job.trials_completed = counts.get("complete", 0)
    job.trials_pruned = counts.get("pruned", 0)
    job.trials_failed = counts.get("failed", 0)
    top, _ = repository.leaderboard(
        session, job_id=job_id, direction=job.spec["effective"]["direction"], limit=1
    )
    if top:
        job.best_score, job.best_trial_number = top[0].score, top[0].number

"""The service's ranked copy of a job's trials (``gk_trials``) and the job's counts."""

from __future__ import annotations

import logging
from typing import Any

import tuner
from service import queue, repository
from service.db import session_scope, with_reconnect
from service.tables import Job

log = logging.getLogger("grovekeeper.worker")


def record_trial(url: str, job_id: str, worker_id: str, record: tuner.TrialRecord, *,
                 epoch: int | None = None, lead: bool = True) -> bool:
    """Copy a finished trial into ``gk_trials``; False (and nothing written) when this
    worker no longer holds the job: a lead whose claim ``epoch`` was superseded, or a
    joiner whose participant row was swept. A lost connection is waited out, so a trial
    that finished while the database was away is written when it comes back."""

    def write() -> bool:
        with session_scope(url) as session:
            # Several workers record trials of one job: lock its row first (PostgreSQL;
            # SQLite writes one at a time anyway) so the counts below see every commit.
            if lead:
                held = queue.holds(session, job_id=job_id, worker_id=worker_id, epoch=epoch)
            else:
                held = queue.is_participant(session, job_id=job_id, worker_id=worker_id)
            if not held:
                return False
            repository.upsert_trial(session, job_id=job_id,
                                    record={**record.to_dict(), "worker_id": worker_id})
            refresh_progress(session, job_id)
            return True

    if not with_reconnect(write, f"job {job_id}: recording trial {record.number}"):
        log.warning("job %s: refused the late copy of trial %d from %s: it no longer holds "
                    "the job (claim epoch %s superseded)", job_id, record.number, worker_id,
                    epoch if lead else "of its joiner row")
        return False
    # Parallel trials call this from the sampler's threads, which do not inherit the
    # worker's log context: name the job and worker on the line itself.
    log.info("trial %d %s, score %s", record.number, record.state, record.score,
             extra={"trial": record.number, "job_id": job_id, "worker_id": worker_id})
    return True


def resync_trials(url: str, job_id: str, study_name: str) -> None:
    """Copy trials Optuna finished but we never recorded (a crash between the two)."""
    records = [r for r in with_reconnect(lambda: tuner.load_trial_records(url, study_name),
                                         f"job {job_id}: reading trials")
               if r.state != "running"]
    if not records:
        return

    def write() -> None:
        with session_scope(url) as session:
            known = {t.number: t.state
                     for t in repository.list_trials(session, job_id=job_id)}
            for record in records:
                if known.get(record.number) != record.state:
                    repository.upsert_trial(session, job_id=job_id, record=record.to_dict())
            refresh_progress(session, job_id)

    with_reconnect(write, f"job {job_id}: copying trials")


def refresh_progress(session: Any, job_id: str) -> None:
    job: Job = repository.get_job(session, job_id)
    counts = repository.trial_counts(session, job_id=job_id)
    job.trials_completed = counts.get("complete", 0)
    job.trials_pruned = counts.get("pruned", 0)
    job.trials_failed = counts.get("failed", 0)
    job.trials_by_fidelity = repository.trials_by_fidelity(session, job_id=job_id)
    top, _ = repository.leaderboard(
        session, job_id=job_id, direction=job.spec["effective"]["direction"], limit=1
    )
    if top:
        job.best_score, job.best_trial_number = top[0].score, top[0].number

"""Joining a running job: run trials of another worker's study until its budget is spent.

A joiner never creates the study, never enqueues trials and never finishes the job; its
trouble is logged and never fails the job (see service/queue.py for when it may join).
"""

from __future__ import annotations

import hashlib
import logging
import traceback

import tuner
from service import memory, queue
from service.db import is_transient, session_scope, with_reconnect
from service.worker import heartbeat
from service.worker.context import WorkerContext, load_job
from service.worker.trials import record_trial

log = logging.getLogger("grovekeeper.worker")


def join_job(ctx: WorkerContext, job_id: str) -> int:
    """Run trials of the job until its budget is spent; the number of trials this worker
    finished (0: it found nothing to run, and should not join this job again soon)."""
    flags, beat = heartbeat.start(ctx.url, job_id, ctx.worker_id, lead=False,
                                  interval=ctx.settings.heartbeat_seconds)
    log.info("worker %s joined job %s", ctx.worker_id, job_id)
    ran = 0
    try:
        job = with_reconnect(lambda: load_job(ctx, job_id), f"job {job_id}: loading")
        memory.trim()  # what reading and preparing the table freed
        if job.config.timeout is not None and job.config.timeout <= 1.0:
            return 0  # the job's wall-clock limit is (nearly) spent: nothing to add
        # Each process on one study samples with its own salt, so they draw different
        # configurations.
        def on_trial(record: tuner.TrialRecord) -> None:
            nonlocal ran
            ran += 1
            if not record_trial(ctx.url, job_id, ctx.worker_id, record, lead=False):
                flags.lost = True  # swept as stale: stop at the next fold

        def close_joining() -> None:
            def write() -> None:
                with session_scope(ctx.url) as session:
                    queue.close_joining(session, job_id=job_id)
            with_reconnect(write, f"job {job_id}: closing to joiners")

        salt = int(hashlib.sha256(ctx.worker_id.encode()).hexdigest()[:8], 16) | 1
        tuner.run_search(
            job.run.data, job.run.plan, job.config, storage_url=ctx.url,
            study_name=job.study_name,
            on_trial=on_trial,
            should_stop=lambda: flags.cancel or flags.lost or ctx.shutdown.is_set(),
            heartbeat_seconds=ctx.trial_heartbeat, grace_seconds=ctx.trial_grace,
            join=True, seed_salt=salt, on_budget_taken=close_joining,
            fence=queue.journal_fence(job_id=job_id, worker_id=ctx.worker_id, lead=False),
        )
    except tuner.JournalFenced:
        log.warning("job %s: refused the late trial journal writes from %s (its joiner row "
                    "was swept as stale)", job_id, ctx.worker_id)
    except Exception:  # noqa: BLE001 - a joiner's trouble must not fail the job
        log.error("worker %s on job %s (joined):\n%s", ctx.worker_id, job_id,
                  traceback.format_exc())
    finally:
        heartbeat.stop(flags, beat)

        def leave() -> None:
            with session_scope(ctx.url) as session:
                queue.leave(session, job_id=job_id, worker_id=ctx.worker_id)

        try:
            with_reconnect(leave, f"job {job_id}: leaving")
        except Exception as exc:
            if not is_transient(exc):
                raise  # otherwise the stale sweep removes the row
    log.info("worker %s left job %s (%d trials)", ctx.worker_id, job_id, ran)
    return ran

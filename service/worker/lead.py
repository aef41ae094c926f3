"""Leading a job: the worker that claimed it opens or resumes the study, runs trials,
waits for its joiners, then refits the winner and finishes the job.

Every write about the job carries the claim's epoch (service/queue.py, fencing): once
another worker has claimed the job, this one abandons it without touching it. A lost
database connection is waited out (``with_reconnect``); if it stays away too long the job
is left running, and the stale sweep hands it to the next worker.
"""

from __future__ import annotations

import dataclasses
import logging
import traceback
from collections.abc import Callable
from typing import Any

import pandas as pd

import tuner
from service import comparing, memory, queue, repository
from service.db import is_transient, session_scope, with_reconnect
from service.errors import describe_failure, input_problem
from service.jobspec import RunPlan
from service.tables import JobStatus
from service.worker import heartbeat
from service.worker.context import LoadedJob, WorkerContext, load_job
from service.worker.finalise import Fenced, JobFailed, check_claim, fit_and_store
from service.worker.trials import record_trial, resync_trials

log = logging.getLogger("grovekeeper.worker")

Outcome = tuple[JobStatus | None, str | None, str | None]


def run_job(ctx: WorkerContext, job_id: str, epoch: int | None = None) -> None:
    flags, beat = heartbeat.start(ctx.url, job_id, ctx.worker_id, lead=True,
                                  interval=ctx.settings.heartbeat_seconds, epoch=epoch)
    problem: dict[str, Any] | None = None
    try:
        status, error, model_id = _execute(ctx, job_id, flags, epoch)
    except (Fenced, tuner.JournalFenced) as exc:
        if isinstance(exc, tuner.JournalFenced):
            log.warning("job %s: refused the late trial journal writes from %s (claim epoch "
                        "%s superseded)", job_id, ctx.worker_id, epoch)
        flags.lost = True
        status, error, model_id = None, None, None
    except JobFailed as exc:
        status, error, model_id = JobStatus.FAILED, str(exc), None
    except (tuner.TunerError, ValueError) as exc:
        status, error, model_id = JobStatus.FAILED, str(exc), None
        # Bad input the rows showed (the API judged the profile only): the job keeps the
        # problem document the API would have answered.
        problem = input_problem(exc) if getattr(exc, "errors", None) else None
        log.warning("job %s failed: %s", job_id, exc)
    except Exception as exc:  # noqa: BLE001 - any crash must end as a failed job
        if is_transient(exc):
            # The database stayed away: not the job's fault. Hand it back if possible.
            log.warning("job %s: database unreachable (%s); handing the job back",
                        job_id, type(exc).__name__)
            status, error, model_id = None, None, None
        else:
            # The message is shown to every reader of the job: no paths or hosts in it.
            status, model_id = JobStatus.FAILED, None
            error = f"internal error: {describe_failure(exc)}"
            log.error("job %s crashed:\n%s", job_id, traceback.format_exc())
    finally:
        heartbeat.stop(flags, beat)
    if flags.lost:
        log.warning("job %s: claimed by another worker meanwhile; %s abandons it untouched",
                    job_id, ctx.worker_id)
        return

    def write() -> None:
        with session_scope(ctx.url) as session:
            if status is None:
                queue.release(session, job_id=job_id, worker_id=ctx.worker_id, epoch=epoch)
                log.info("job %s handed back to the queue", job_id)
            elif queue.finish(session, job_id=job_id, worker_id=ctx.worker_id, status=status,
                              error=error, model_id=model_id, epoch=epoch):
                if problem is not None:
                    repository.get_job(session, job_id).problem = problem
                log.info("job %s %s", job_id, status.value)
            else:
                log.warning("job %s: refused the late %s status from %s (claim epoch %s "
                            "superseded)", job_id, status.value, ctx.worker_id, epoch)

    try:
        with_reconnect(write, f"job {job_id}: final status")
    except Exception as exc:
        if not is_transient(exc):
            raise
        log.error("job %s: database unreachable; the stale sweep will hand it on", job_id)


def record_plan(ctx: WorkerContext, job_id: str, run: RunPlan,
                config: tuner.SearchConfig) -> None:
    """Write the effective spec built from the rows over the provisional one the API
    wrote (service/admission.py), with what this worker chose for the job (trials at
    once, threads), and the data warnings."""
    effective = dict(run.effective)
    if run.effective.get("parallelism") == "machine":
        effective.update(max_parallel_trials=config.max_parallel_trials,
                         num_threads=config.num_threads)

    def write() -> None:
        with session_scope(ctx.url) as session:
            row = repository.get_job(session, job_id)
            row.spec = {**row.spec, "effective": effective}
            row.warnings = list(run.data.warnings)

    with_reconnect(write, f"job {job_id}: recording its plan")


def prepare_job(ctx: WorkerContext, job_id: str) -> LoadedJob:
    """Build the job's run from its rows and record it on the job (``record_plan``).

    Raises the tuner's bad-input errors when the rows show a problem the profile did not.
    """
    job = with_reconnect(lambda: load_job(ctx, job_id), f"job {job_id}: loading")
    memory.trim()  # what reading and preparing the table freed
    record_plan(ctx, job_id, job.run, job.config)
    return job


def _execute(ctx: WorkerContext, job_id: str, flags: heartbeat.JobFlags,
             epoch: int | None) -> Outcome:
    job = prepare_job(ctx, job_id)
    run, config = job.run, job.config
    resync_trials(ctx.url, job_id, job.study_name)

    def should_stop() -> bool:
        return flags.cancel or flags.lost or ctx.shutdown.is_set()

    def set_joinable(joinable: bool) -> None:
        def write() -> None:
            with session_scope(ctx.url) as session:
                queue.set_joinable(session, job_id=job_id, worker_id=ctx.worker_id,
                                   joinable=joinable, epoch=epoch)
        with_reconnect(write, f"job {job_id}: joinable")

    def on_trial(record: tuner.TrialRecord) -> None:
        if not record_trial(ctx.url, job_id, ctx.worker_id, record, epoch=epoch):
            flags.lost = True  # fenced off: stop at the next fold
        memory.trim()  # what the trial's boosters and any new fold Datasets left free

    # Joiners may come once trial 0 is taken, and only until the last share of the
    # budget is handed out: one joining later would load the study to find nothing to run.
    shared = job.max_workers > 1
    fence = queue.journal_fence(job_id=job_id, worker_id=ctx.worker_id, epoch=epoch)
    tuner.run_search(
        run.data, run.plan, config, storage_url=ctx.url, study_name=job.study_name,
        on_trial=on_trial, should_stop=should_stop, heartbeat_seconds=ctx.trial_heartbeat,
        grace_seconds=ctx.trial_grace,
        on_started=(lambda: set_joinable(True)) if shared else None,
        on_budget_taken=(lambda: set_joinable(False)) if shared else None,
        fence=fence,
    )
    memory.trim()  # the search's folds and boosters
    if job.max_workers > 1 and not flags.lost:
        set_joinable(False)
    if not should_stop():
        _wait_for_joiners(ctx, job_id, should_stop)
    if flags.lost:
        return None, None, None  # another worker owns it now; write nothing more
    if flags.cancel:
        # Cancelled jobs are not refit: the trials finished so far stay ranked in the
        # leaderboard, and a new job can be submitted with a small budget if needed.
        return JobStatus.CANCELLED, None, None
    if ctx.shutdown.is_set():
        return None, None, None
    # close_search fails trials still running: only the job's holder may do that.
    check_claim(ctx.url, job_id, ctx.worker_id, epoch)
    result = with_reconnect(
        lambda: tuner.close_search(ctx.url, job.study_name,
                                   direction=run.effective["direction"],
                                   selection=config.selection, fence=fence),
        f"job {job_id}: closing the search")
    resync_trials(ctx.url, job_id, job.study_name)
    if result.chosen is None:
        return JobStatus.FAILED, "no trial completed; see the failed trials", None
    run = dataclasses.replace(run, effective={**run.effective,
                                              "selection_report": result.selection})
    model_id = fit_and_store(ctx.url, ctx.store, job_id, run, result.chosen,
                             worker_id=ctx.worker_id, epoch=epoch)
    promote_safely(ctx, job_id, model_id, run)
    return JobStatus.SUCCEEDED, None, model_id


def promote_safely(ctx: WorkerContext, job_id: str, model_id: str, run: RunPlan) -> None:
    """Apply the job's ``promote`` request; a failure is reported, never fails the job."""
    try:
        with session_scope(ctx.url) as session:
            job = repository.get_job(session, job_id)
            if run.request.promote is None:
                return
            dataset = repository.get_dataset(session, job.dataset_id)
            path = ctx.store.local_path(dataset.file_key, dataset.file_sha256)
        frame = pd.read_parquet(path)
        # The rows prepare() kept (a missing target drops a row), in its order.
        frame = frame[frame[run.data.target].notna()].reset_index(drop=True)
        promotion = comparing.promote(ctx.url, ctx.store, job_id=job_id, model_id=model_id,
                                      frame=frame, holdout_rows=run.plan.holdout_idx)
    except Exception as exc:  # noqa: BLE001 - the model is stored; only the move failed
        log.error("job %s: promotion failed:\n%s", job_id, traceback.format_exc())
        promotion = {"moved": False, "error": f"promotion failed: {exc!r}"}
    with session_scope(ctx.url) as session:
        repository.get_job(session, job_id).promotion = promotion


def _wait_for_joiners(ctx: WorkerContext, job_id: str, should_stop: Callable[[], bool]) -> None:
    """Let joiners finish their trials in flight, so the refit sees every trial.

    A joiner stops on its own once the budget is spent; a dead one is swept after
    the stale timeout, which bounds this wait.
    """
    while not should_stop():
        def look() -> list[str]:
            with session_scope(ctx.url) as session:
                queue.requeue_stale(session,
                                    stale_after_seconds=ctx.settings.stale_after_seconds)
                return [w for w in queue.participants(session, job_id=job_id)
                        if w != ctx.worker_id]

        if not with_reconnect(look, f"job {job_id}: waiting for joiners"):
            return
        ctx.shutdown.wait(min(0.5, ctx.settings.poll_seconds))

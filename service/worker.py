"""A tuning worker: claims queued jobs from the database and runs them.

Runs as its own process (``grovekeeper worker``); the API never trains. One worker
runs one trial at a time with LightGBM on one thread, so N workers use N cores
without OpenMP threads fighting over them (LIBRARIES.md §3, threads vs processes).

A worker either leads a job (it claimed it from the queue: it opens or resumes the study,
and refits and finishes the job once the budget is spent) or joins a running job whose
``max_workers`` leaves room (it only runs trials of the study). See service/queue.py.
"""

from __future__ import annotations

import dataclasses
import hashlib
import logging
import os
import signal
import socket
import threading
import traceback
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

import tuner
from service import queue, repository
from service.db import init_db, session_scope
from service.evaluation import evaluate_safely
from service.jobspec import RunPlan, build_run
from service.logs import log_context
from service.schemas import as_utc
from service.settings import Settings
from service.storage import ArtifactStore
from service.tables import Job, JobStatus, utcnow

log = logging.getLogger("grovekeeper.worker")


@dataclass
class _JobFlags:
    """What the heartbeat thread learns, read by the search between folds."""

    cancel: bool = False
    lost: bool = False
    done: threading.Event = field(default_factory=threading.Event)


class Worker:
    def __init__(self, settings: Settings, *, worker_id: str | None = None) -> None:
        self.settings = settings
        self.url = settings.db_url
        self.worker_id = worker_id or f"{socket.gethostname()}:{os.getpid()}"
        self.store = ArtifactStore(settings.artifacts_url, settings.tmp_dir)
        # Optuna's trial heartbeat takes whole seconds. Its grace period is the job's stale
        # timeout, so by the time a dead lead's job is claimed again its trials are (or are
        # about to be) stale too; at least two beats, so a live trial is never failed.
        self.trial_heartbeat = max(1, round(settings.heartbeat_seconds))
        self.trial_grace = max(2 * self.trial_heartbeat, round(settings.stale_after_seconds))
        self.shutdown = threading.Event()

    # -- loop ----------------------------------------------------------------

    def run_forever(self, *, parent_pid: int | None = None) -> None:
        log.info("worker %s started on %s", self.worker_id, _redact(self.url))
        if parent_pid is not None:
            threading.Thread(target=self._watch_parent, args=(parent_pid,), daemon=True).start()
        while not self.shutdown.is_set():
            if not self.run_once():
                self.shutdown.wait(self.settings.poll_seconds)
        log.info("worker %s stopped", self.worker_id)

    def _watch_parent(self, parent_pid: int) -> None:
        # A worker started by ``serve`` must not outlive it (e.g. after kill -9 of serve).
        while not self.shutdown.wait(1.0):
            if os.getppid() != parent_pid:
                log.warning("worker %s: parent %d is gone; stopping", self.worker_id, parent_pid)
                self.shutdown.set()

    def run_once(self) -> bool:
        """Sweep stale claims, then claim and run one job. False when the queue is empty."""
        with session_scope(self.url) as session:
            for job_id in queue.requeue_stale(
                session, stale_after_seconds=self.settings.stale_after_seconds
            ):
                log.warning("job %s: worker stopped heart-beating; back in the queue", job_id)
        with session_scope(self.url) as session:
            job_id = queue.claim_next(session, worker_id=self.worker_id)
        if job_id is not None:
            with log_context(job_id=job_id, worker_id=self.worker_id):  # ids on every line
                self.run_job(job_id)
            return True
        with session_scope(self.url) as session:
            job_id = queue.join_next(session, worker_id=self.worker_id)
        if job_id is not None:
            with log_context(job_id=job_id, worker_id=self.worker_id):
                self.join_job(job_id)
            return True
        return False

    # -- one job -------------------------------------------------------------

    def run_job(self, job_id: str) -> None:
        flags = _JobFlags()
        beat = threading.Thread(target=self._heartbeat, args=(job_id, flags, True), daemon=True)
        beat.start()
        try:
            status, error, model_id = self._execute(job_id, flags)
        except (tuner.TunerError, ValueError) as exc:
            status, error, model_id = JobStatus.FAILED, str(exc), None
            log.warning("job %s failed: %s", job_id, exc)
        except Exception as exc:  # noqa: BLE001 - any crash must end as a failed job
            status, error, model_id = JobStatus.FAILED, f"internal error: {exc!r}", None
            log.error("job %s crashed:\n%s", job_id, traceback.format_exc())
        finally:
            flags.done.set()
            beat.join(timeout=5)
        with session_scope(self.url) as session:
            if status is None:
                queue.release(session, job_id=job_id, worker_id=self.worker_id)
                log.info("job %s handed back to the queue", job_id)
            else:
                queue.finish(
                    session,
                    job_id=job_id,
                    worker_id=self.worker_id,
                    status=status,
                    error=error,
                    model_id=model_id,
                )
                log.info("job %s %s", job_id, status.value)

    def _load(self, job_id: str) -> tuple[RunPlan, tuner.SearchConfig, str, int]:
        with session_scope(self.url) as session:
            job = repository.get_job(session, job_id)
            dataset = repository.get_dataset(session, job.dataset_id)
            request, study_name = job.spec["request"], job.study_name
            file_key, file_sha = dataset.file_key, dataset.file_sha256
            dataset_sha = dataset.sha256
            started_at, max_workers = job.started_at, job.max_workers
        frame = pd.read_parquet(self.store.local_path(file_key, file_sha))
        run = build_run(request, frame, dataset_sha256=dataset_sha)
        # Parallel trials share this worker's cores: never more trials or LightGBM threads
        # than cores (tuner divides num_threads among the trials; default one each).
        cores = os.cpu_count() or 1
        parallel = max(1, min(run.config.max_parallel_trials, cores))
        config = dataclasses.replace(run.config, max_parallel_trials=parallel,
                                     num_threads=min(run.config.num_threads, cores))
        if config.timeout is not None and started_at is not None:
            # budget.seconds is the job's wall-clock limit from its first start: a resumed
            # job, or a worker joining late, gets what is left of it, not a fresh one.
            used = (utcnow() - as_utc(started_at)).total_seconds()
            config = dataclasses.replace(config, timeout=max(1.0, config.timeout - used))
        return run, config, study_name, max_workers

    def _execute(
        self, job_id: str, flags: _JobFlags
    ) -> tuple[JobStatus | None, str | None, str | None]:
        run, config, study_name, max_workers = self._load(job_id)
        self._resync_trials(job_id, study_name)

        def should_stop() -> bool:
            return flags.cancel or flags.lost or self.shutdown.is_set()

        def open_to_joiners() -> None:
            if max_workers > 1:
                with session_scope(self.url) as session:
                    queue.set_joinable(session, job_id=job_id, worker_id=self.worker_id)

        tuner.run_search(
            run.data,
            run.plan,
            config,
            storage_url=self.url,
            study_name=study_name,
            on_trial=lambda record: self._record_trial(job_id, record),
            should_stop=should_stop,
            heartbeat_seconds=self.trial_heartbeat,
            grace_seconds=self.trial_grace,
            on_started=open_to_joiners,
        )
        if max_workers > 1:
            with session_scope(self.url) as session:
                queue.set_joinable(session, job_id=job_id, worker_id=self.worker_id,
                                   joinable=False)
        if not should_stop():
            self._wait_for_joiners(job_id, should_stop)
        if flags.lost:
            return None, None, None  # another worker owns it now; write nothing more
        if flags.cancel:
            # Cancelled jobs are not refit: the trials finished so far stay ranked in the
            # leaderboard, and a new job can be submitted with a small budget if needed.
            return JobStatus.CANCELLED, None, None
        if self.shutdown.is_set():
            return None, None, None
        result = tuner.close_search(self.url, study_name, direction=run.effective["direction"],
                                     selection=config.selection)
        self._resync_trials(job_id, study_name)
        if result.chosen is None:
            return JobStatus.FAILED, "no trial completed; see the failed trials", None
        run = dataclasses.replace(run, effective={**run.effective,
                                                  "selection_report": result.selection})
        model_id = self._fit_and_store(job_id, run, result.chosen)
        return JobStatus.SUCCEEDED, None, model_id

    def _wait_for_joiners(self, job_id: str, should_stop: Any) -> None:
        """Let joiners finish their trials in flight, so the refit sees every trial.

        A joiner stops on its own once the budget is spent; a dead one is swept after
        the stale timeout, which bounds this wait.
        """
        while not should_stop():
            with session_scope(self.url) as session:
                queue.requeue_stale(session, stale_after_seconds=self.settings.stale_after_seconds)
                others = [w for w in queue.participants(session, job_id=job_id)
                          if w != self.worker_id]
            if not others:
                return
            self.shutdown.wait(min(0.5, self.settings.poll_seconds))

    # -- joining a running job ---------------------------------------------------

    def join_job(self, job_id: str) -> None:
        """Run trials of another worker's job until its budget is spent or it ends."""
        flags = _JobFlags()
        beat = threading.Thread(target=self._heartbeat, args=(job_id, flags, False),
                                daemon=True)
        beat.start()
        log.info("worker %s joined job %s", self.worker_id, job_id)
        try:
            run, config, study_name, _ = self._load(job_id)
            if config.timeout is not None and config.timeout <= 1.0:
                return  # the job's wall-clock limit is (nearly) spent: nothing to add
            salt = int(hashlib.sha256(self.worker_id.encode()).hexdigest()[:8], 16) | 1
            tuner.run_search(
                run.data, run.plan, config, storage_url=self.url, study_name=study_name,
                on_trial=lambda record: self._record_trial(job_id, record),
                should_stop=lambda: flags.cancel or flags.lost or self.shutdown.is_set(),
                heartbeat_seconds=self.trial_heartbeat, grace_seconds=self.trial_grace,
                join=True, seed_salt=salt,
            )
        except Exception:  # noqa: BLE001 - a joiner's trouble must not fail the job
            log.error("worker %s on job %s (joined):\n%s", self.worker_id, job_id,
                      traceback.format_exc())
        finally:
            flags.done.set()
            beat.join(timeout=5)
            with session_scope(self.url) as session:
                queue.leave(session, job_id=job_id, worker_id=self.worker_id)
        log.info("worker %s left job %s", self.worker_id, job_id)

    def _fit_and_store(self, job_id: str, run: RunPlan, best: tuner.TrialRecord) -> str:
        fitted = tuner.fit_final(run.data, run.plan, run.config, best)
        evaluation = evaluate_safely(fitted, run, self.url, job_id)
        model_id = repository.new_id("mdl")
        key = f"models/{model_id}.txt"
        with self.store.temp_path(".txt") as tmp:
            sha = tuner.save_model(fitted, tmp)
            size = tmp.stat().st_size
            self.store.put(tmp, key)
        try:
            with session_scope(self.url) as session:
                repository.add_model(
                    session,
                    id=model_id,
                    job_id=job_id,
                    task=fitted.task,
                    metric=fitted.metric,
                    params=fitted.params,
                    boosting_rounds=fitted.boosting_rounds,
                    trial_number=best.number,
                    cv=fitted.cv,
                    holdout=fitted.holdout,
                    feature_schema=fitted.schema.to_dict(),
                    classes=fitted.classes,
                    target=run.data.target,
                    feature_importance=fitted.feature_importance,
                    details={"manifest": run.effective, "evaluation": evaluation,
                             "selection": run.effective.get("selection_report"),
                             "final_refit": fitted.refit},
                    sha256=sha,
                    file_key=key,
                    size_bytes=size,
                )
        except Exception:
            self.store.delete(key)
            raise
        return model_id

    # -- trial bookkeeping ---------------------------------------------------

    def _record_trial(self, job_id: str, record: tuner.TrialRecord) -> None:
        with session_scope(self.url) as session:
            # Several workers record trials of one job: lock its row first (PostgreSQL;
            # SQLite writes one at a time anyway) so the counts below see every commit.
            session.get(Job, job_id, with_for_update={"key_share": True})
            repository.upsert_trial(session, job_id=job_id,
                                    record={**record.to_dict(), "worker_id": self.worker_id})
            _refresh_progress(session, job_id)
        log.info("trial %d %s, score %s", record.number, record.state, record.score,
                 extra={"trial": record.number})

    def _resync_trials(self, job_id: str, study_name: str) -> None:
        """Copy trials Optuna finished but we never recorded (a crash between the two)."""
        records = [r for r in tuner.load_trial_records(self.url, study_name)
                   if r.state != "running"]
        if not records:
            return
        with session_scope(self.url) as session:
            known = {t.number: t.state for t in repository.list_trials(session, job_id=job_id)}
            for record in records:
                if known.get(record.number) != record.state:
                    repository.upsert_trial(session, job_id=job_id, record=record.to_dict())
            _refresh_progress(session, job_id)

    def _heartbeat(self, job_id: str, flags: _JobFlags, lead: bool) -> None:
        beat = queue.heartbeat if lead else queue.heartbeat_joiner
        while not flags.done.wait(self.settings.heartbeat_seconds):
            try:
                with session_scope(self.url) as session:
                    ours, cancel = beat(session, job_id=job_id, worker_id=self.worker_id)
            except Exception as exc:  # noqa: BLE001 - a missed beat is retried next time
                log.warning("job %s: heartbeat failed: %s", job_id, exc)
                continue
            flags.cancel = flags.cancel or cancel
            if not ours:
                flags.lost = True
                return


def _refresh_progress(session: Any, job_id: str) -> None:
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


def _redact(url: str) -> str:
    return url.split("@")[-1] if "@" in url else url


def main(settings: Settings, *, parent_pid: int | None = None) -> None:
    init_db(settings.db_url)
    settings.ensure_dirs()
    worker = Worker(settings)

    def _stop(signum: int, _frame: Any) -> None:
        log.info("worker %s: signal %d, finishing the current trial", worker.worker_id, signum)
        worker.shutdown.set()

    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    worker.run_forever(parent_pid=parent_pid)

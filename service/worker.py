"""A tuning worker: claims queued jobs from the database and runs them.

Runs as its own process (``grovekeeper worker``); the API never trains. One worker
runs one trial at a time with LightGBM on one thread, so N workers use N cores
without OpenMP threads fighting over them (LIBRARIES.md §3, threads vs processes).
"""

from __future__ import annotations

import dataclasses
import logging
import os
import signal
import socket
import threading
import time
import traceback
from dataclasses import dataclass, field
from typing import Any

import pandas as pd

import tuner
from service import queue, repository
from service.db import init_db, session_scope
from service.jobspec import RunPlan, build_run
from service.schemas import as_utc
from service.settings import Settings
from service.storage import LocalStore
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
        self.store = LocalStore(settings.home, settings.tmp_dir)
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
        if job_id is None:
            return False
        self.run_job(job_id)
        return True

    # -- one job -------------------------------------------------------------

    def run_job(self, job_id: str) -> None:
        flags = _JobFlags()
        beat = threading.Thread(target=self._heartbeat, args=(job_id, flags), daemon=True)
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

    def _execute(
        self, job_id: str, flags: _JobFlags
    ) -> tuple[JobStatus | None, str | None, str | None]:
        with session_scope(self.url) as session:
            job = repository.get_job(session, job_id)
            dataset = repository.get_dataset(session, job.dataset_id)
            request, study_name = job.spec["request"], job.study_name
            file_key, file_sha = dataset.file_key, dataset.file_sha256
            dataset_sha = dataset.sha256
            started_at = job.started_at
        frame = pd.read_parquet(self.store.local_path(file_key, file_sha))
        run = build_run(request, frame, dataset_sha256=dataset_sha)
        # Parallel trials share this worker's cores: never more trials than cores, one
        # LightGBM thread each (tuner divides num_threads among the trials).
        parallel = max(1, min(run.config.max_parallel_trials, os.cpu_count() or 1))
        config = dataclasses.replace(run.config, max_parallel_trials=parallel,
                                     num_threads=parallel)
        if config.timeout is not None and started_at is not None:
            # A resumed job gets what is left of its wall-clock budget, not a fresh one.
            used = (utcnow() - as_utc(started_at)).total_seconds()
            config = dataclasses.replace(config, timeout=max(1.0, config.timeout - used))

        self._resync_trials(job_id, study_name)

        def should_stop() -> bool:
            return flags.cancel or flags.lost or self.shutdown.is_set()

        result = tuner.run_search(
            run.data,
            run.plan,
            config,
            storage_url=self.url,
            study_name=study_name,
            on_trial=lambda record: self._record_trial(job_id, record),
            should_stop=should_stop,
        )
        if flags.lost:
            return None, None, None  # another worker owns it now; write nothing more
        if flags.cancel:
            return JobStatus.CANCELLED, None, None
        if self.shutdown.is_set():
            return None, None, None
        if result.chosen is None:
            return JobStatus.FAILED, "no trial completed; see the failed trials", None
        run = dataclasses.replace(run, effective={**run.effective,
                                                  "selection_report": result.selection})
        model_id = self._fit_and_store(job_id, run, result.chosen)
        return JobStatus.SUCCEEDED, None, model_id

    def _fit_and_store(self, job_id: str, run: RunPlan, best: tuner.TrialRecord) -> str:
        fitted = tuner.fit_final(run.data, run.plan, run.config, best)
        model_id = repository.new_id("mdl")
        key = f"models/{model_id}.txt"
        path = self.store.path(key)
        path.parent.mkdir(parents=True, exist_ok=True)
        sha = tuner.save_model(fitted, path)
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
                    details={"manifest": run.effective,
                             "selection": run.effective.get("selection_report"),
                             "final_refit": fitted.refit},
                    sha256=sha,
                    file_key=key,
                    size_bytes=path.stat().st_size,
                )
        except Exception:
            self.store.delete(key)
            raise
        return model_id

    # -- trial bookkeeping ---------------------------------------------------

    def _record_trial(self, job_id: str, record: tuner.TrialRecord) -> None:
        with session_scope(self.url) as session:
            repository.upsert_trial(session, job_id=job_id, record=record.to_dict())
            _refresh_progress(session, job_id)

    def _resync_trials(self, job_id: str, study_name: str) -> None:
        """Copy trials Optuna finished but we never recorded (a crash between the two)."""
        records = [r for r in tuner.load_trial_records(self.url, study_name) if r.state != "running"]
        if not records:
            return
        with session_scope(self.url) as session:
            known = {t.number: t.state for t in repository.list_trials(session, job_id=job_id)}
            for record in records:
                if known.get(record.number) != record.state:
                    repository.upsert_trial(session, job_id=job_id, record=record.to_dict())
            _refresh_progress(session, job_id)

    def _heartbeat(self, job_id: str, flags: _JobFlags) -> None:
        while not flags.done.wait(self.settings.heartbeat_seconds):
            try:
                with session_scope(self.url) as session:
                    ours, cancel = queue.heartbeat(session, job_id=job_id, worker_id=self.worker_id)
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

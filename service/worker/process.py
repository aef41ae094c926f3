"""The worker process: a loop that claims queued jobs (or joins running ones) and runs them.

Runs as its own process (``grovekeeper worker``); the API never trains. How many trials
and LightGBM threads a job uses inside one worker is the job's to say (see
``service/jobspec.py``); several workers on one job share its study (service/queue.py).
"""

from __future__ import annotations

import importlib
import logging
import os
import signal
import threading
import time
from typing import Any

from service import queue, repository
from service.db import init_db, is_transient, session_scope, with_reconnect
from service.logs import log_context
from service.memory import return_freed_memory
from service.settings import Settings
from service.worker.comparison import run_comparison
from service.worker.context import WorkerContext
from service.worker.join import join_job
from service.worker.lead import run_job
from service.worker.scoring import run_scoring

log = logging.getLogger("grovekeeper.worker")


class Worker:
    """One worker process's loop over the queue."""

    def __init__(self, settings: Settings, *, worker_id: str | None = None) -> None:
        self.ctx = (WorkerContext(settings, worker_id=worker_id) if worker_id
                    else WorkerContext(settings))
        self.settings = settings
        self.worker_id = self.ctx.worker_id
        self.shutdown = self.ctx.shutdown
        # Jobs this worker joined and found nothing to run in (their budget was handed
        # out, or their time was up), with when: not joined again for a while, so a job
        # finishing its last trials is not joined and left over and over.
        self._fruitless: dict[str, float] = {}

    def run_forever(self, *, parent_pid: int | None = None) -> None:
        log.info("worker %s ready on %s", self.worker_id, _redact(self.ctx.url))
        if parent_pid is not None:
            threading.Thread(target=self._watch_parent, args=(parent_pid,), daemon=True).start()
        pause = self.settings.poll_seconds
        while not self.shutdown.is_set():
            try:
                busy = self.run_once()
            except Exception as exc:
                if not is_transient(exc):
                    raise
                # A worker never exits because the database is away: wait and look again.
                log.warning("worker %s: database unreachable (%s); retrying in %.1f s",
                            self.worker_id, type(exc).__name__, pause)
                self.shutdown.wait(pause)
                pause = min(5.0, pause * 2)
                continue
            pause = self.settings.poll_seconds
            if not busy:
                self.shutdown.wait(self.settings.poll_seconds)
        log.info("worker %s stopped", self.worker_id)

    def _watch_parent(self, parent_pid: int) -> None:
        # A worker started by ``serve`` must not outlive it (e.g. after kill -9 of serve).
        while not self.shutdown.wait(1.0):
            if os.getppid() != parent_pid:
                log.warning("worker %s: parent %d is gone; stopping", self.worker_id, parent_pid)
                self.shutdown.set()

    def run_once(self) -> bool:
        """Sweep stale claims, then claim and run one job, or else one batch scoring run,
        or else one comparison, or else join a running job. False when there is nothing to do."""
        url = self.ctx.url
        with session_scope(url) as session:
            for job_id in queue.requeue_stale(
                session, stale_after_seconds=self.settings.stale_after_seconds
            ):
                log.warning("job %s: worker stopped heart-beating; back in the queue", job_id)
        with session_scope(url) as session:
            claimed = queue.claim(session, worker_id=self.worker_id)
        if claimed is not None:
            job_id, epoch = claimed
            with log_context(job_id=job_id, worker_id=self.worker_id):  # ids on every line
                run_job(self.ctx, job_id, epoch)
            return True
        with session_scope(url) as session:
            scoring_id = repository.claim_scoring(
                session, worker_id=self.worker_id,
                stale_after_seconds=self.settings.stale_after_seconds)
        if scoring_id is not None:
            with log_context(job_id=scoring_id, worker_id=self.worker_id):
                run_scoring(url, self.ctx.store, scoring_id, self.worker_id, self.shutdown,
                            chunk_rows=self.settings.scoring_chunk_rows)
            return True
        with session_scope(url) as session:
            comparison_id = repository.claim_comparison(
                session, worker_id=self.worker_id,
                stale_after_seconds=self.settings.stale_after_seconds)
        if comparison_id is not None:
            with log_context(job_id=comparison_id, worker_id=self.worker_id):
                run_comparison(url, self.ctx.store, comparison_id, self.worker_id)
            return True
        now = time.monotonic()
        self._fruitless = {j: at for j, at in self._fruitless.items()
                           if now - at < max(10.0, self.settings.stale_after_seconds)}
        with session_scope(url) as session:
            joining = queue.join_next(session, worker_id=self.worker_id,
                                      skip=self._fruitless)
        if joining is not None:
            with log_context(job_id=joining, worker_id=self.worker_id):
                if join_job(self.ctx, joining) == 0:
                    self._fruitless[joining] = time.monotonic()
            return True
        return False


#: What a job loads on first use beyond what importing the worker loads: a worker is a
#: tuning process, so it loads them when it starts, before it claims work. The first job
#: starts sooner, and a worker's idle memory is that of a worker ready to tune.
PRELOAD = (
    "pyarrow.parquet",  # reading a dataset
    "sklearn.model_selection",  # the folds (tuner/validation.py)
    "tuner.search", "tuner.model", "tuner.evaluation.holdout", "tuner.evaluation.gain",
    "optuna.importance",  # fANOVA (tuner/evaluation/diagnostics.py)
)


def load_libraries(names: tuple[str, ...] = PRELOAD) -> float:
    """Import ``names`` now; the seconds it took."""
    started = time.perf_counter()
    for name in names:
        importlib.import_module(name)
    return time.perf_counter() - started


def _redact(url: str) -> str:
    return url.split("@")[-1] if "@" in url else url


def main(settings: Settings, *, parent_pid: int | None = None) -> None:
    with_reconnect(lambda: init_db(settings.db_url), "worker start-up")
    settings.ensure_dirs()
    return_freed_memory()
    seconds = load_libraries()
    worker = Worker(settings)
    log.info("worker %s: libraries loaded in %.1f s", worker.worker_id, seconds)
    worker.ctx.store.sweep_temp()  # left by an earlier crash of this machine's processes

    def _stop(signum: int, _frame: Any) -> None:
        log.info("worker %s: signal %d, finishing the current trial", worker.worker_id, signum)
        worker.shutdown.set()

    signal.signal(signal.SIGTERM, _stop)
    signal.signal(signal.SIGINT, _stop)
    worker.run_forever(parent_pid=parent_pid)

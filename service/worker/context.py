"""What every part of a worker shares: its identity, settings and store, and the loading
of a job's data and search configuration (the same for the lead and for joiners)."""

from __future__ import annotations

import dataclasses
import os
import socket
import threading
from dataclasses import dataclass, field

import pandas as pd

import tuner
from service import memory, repository
from service.api.schemas import as_utc
from service.db import session_scope
from service.jobspec import RunPlan, build_run
from service.settings import Settings
from service.storage import ArtifactStore
from service.tables import utcnow
from tuner.trial_loop import machine_split


@dataclass
class WorkerContext:
    settings: Settings
    worker_id: str = field(default_factory=lambda: f"{socket.gethostname()}:{os.getpid()}")
    shutdown: threading.Event = field(default_factory=threading.Event)

    def __post_init__(self) -> None:
        self.url = self.settings.db_url
        self.store = ArtifactStore(self.settings.artifacts_url, self.settings.tmp_dir)
        # Optuna's trial heartbeat takes whole seconds. Its grace period is the job's stale
        # timeout, so by the time a dead lead's job is claimed again its trials are (or are
        # about to be) stale too; at least two beats, so a live trial is never failed.
        self.trial_heartbeat = max(1, round(self.settings.heartbeat_seconds))
        self.trial_grace = max(2 * self.trial_heartbeat,
                               round(self.settings.stale_after_seconds))


@dataclass(frozen=True)
class LoadedJob:
    run: RunPlan
    config: tuner.SearchConfig
    study_name: str
    max_workers: int


def _read(ctx: WorkerContext, file_key: str, file_sha: str) -> pd.DataFrame:
    frame = pd.read_parquet(ctx.store.local_path(file_key, file_sha))
    memory.trim()  # the read's own buffers (about the table's size again), before prepare()
    return frame


def load_job(ctx: WorkerContext, job_id: str) -> LoadedJob:
    """The job's data, validation plan and search configuration, clamped to this machine."""
    with session_scope(ctx.url) as session:
        job = repository.get_job(session, job_id)
        dataset = repository.get_dataset(session, job.dataset_id)
        request, study_name = job.spec["request"], job.study_name
        file_key, file_sha = dataset.file_key, dataset.file_sha256
        dataset_sha = dataset.sha256
        started_at, max_workers = job.started_at, job.max_workers
    # Read straight into the call: build_run holds the only reference to the raw table,
    # and drops it once the prepared features replace it.
    run = build_run(request, _read(ctx, file_key, file_sha), dataset_sha256=dataset_sha)
    # Parallel trials share this worker's cores: never more trials or LightGBM threads
    # than cores (tuner divides num_threads among the trials; default one each).
    cores = os.cpu_count() or 1
    parallel, threads = run.config.max_parallel_trials, run.config.num_threads
    if run.effective.get("parallelism") == "machine":
        # Neither was asked for: every core, as trials or as threads by the table's size.
        # A job shared by several workers runs one trial at a time in each (on all its
        # cores), which keeps the budget bound: at most one trial per other worker over.
        parallel, threads = machine_split(len(run.plan.train_idx), cores)
        if max_workers > 1:
            parallel = 1
    parallel = max(1, min(parallel, cores))
    config = dataclasses.replace(run.config, max_parallel_trials=parallel,
                                 num_threads=min(threads, cores))
    if config.timeout is not None and started_at is not None:
        # budget.seconds is the job's wall-clock limit from its first start: a resumed
        # job, or a worker joining late, gets what is left of it, not a fresh one.
        used = (utcnow() - as_utc(started_at)).total_seconds()
        config = dataclasses.replace(config, timeout=max(1.0, config.timeout - used))
    return LoadedJob(run, config, study_name, max_workers)

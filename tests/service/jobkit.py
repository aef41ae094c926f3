"""Jobs queued straight into a database, and real worker processes to run them."""

from __future__ import annotations

import contextlib
import signal
import subprocess
import sys
import time
from collections.abc import Callable, Iterator
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import sqlalchemy as sa

from examples.demo_data import kilns
from service import repository
from service.api.schemas import JobCreate
from service.db import init_db, session_scope
from service.jobspec import build_run
from service.settings import Settings
from service.storage import ArtifactStore, sha256_file
from service.tables import Job, JobWorker, Trial
from tests.conftest import ROOT, child_env

# Short timeouts so a dead worker is noticed within seconds (they are env vars for the
# worker processes, read by service/settings.py).
FAST = {"GROVEKEEPER_STALE_AFTER_SECONDS": "3", "GROVEKEEPER_HEARTBEAT_SECONDS": "0.5",
        "GROVEKEEPER_POLL_SECONDS": "0.2"}


def add_dataset(url: str, home: Path, n_rows: int = 300, seed: int = 1) -> str:
    settings = Settings(home=home, database_url=url)
    settings.ensure_dirs()
    init_db(url)
    store = ArtifactStore(settings.artifacts_url, settings.tmp_dir)
    frame = kilns(n_rows=n_rows, seed=seed)
    dataset_id = repository.new_id("ds")
    key = f"datasets/{dataset_id}.parquet"
    with store.temp_path(".parquet") as tmp:
        frame.to_parquet(tmp, index=False)
        sha = sha256_file(tmp)
        store.put(tmp, key)
    with session_scope(url) as session:
        repository.add_dataset(
            session, id=dataset_id, name="kilns", rows=len(frame), n_columns=frame.shape[1],
            size_bytes=1, sha256=sha, source_format="parquet", columns=[], warnings=[],
            file_key=key, file_sha256=sha)
    return dataset_id


def add_job(url: str, home: Path, dataset_id: str, **fields: Any) -> str:
    """Queue a job the way POST /v1/jobs does (same validation, same spec)."""
    import pandas as pd

    body = JobCreate(dataset_id=dataset_id, target="defect", exclude=["firing_id"],
                     cv={"folds": 3}, **fields)
    request = body.model_dump(mode="json")
    settings = Settings(home=home, database_url=url)
    with session_scope(url) as session:
        dataset = repository.get_dataset(session, dataset_id)
        path = ArtifactStore(settings.artifacts_url, settings.tmp_dir).local_path(
            dataset.file_key, dataset.file_sha256)
    run = build_run(request, pd.read_parquet(path))
    job_id = repository.new_id("job")
    with session_scope(url) as session:
        repository.add_job(session, id=job_id, dataset_id=dataset_id, priority=body.priority,
                           max_workers=body.max_workers,
                           spec={"request": request, "effective": run.effective},
                           study_name=f"grovekeeper-{job_id}", warnings=[])
    return job_id


@dataclass
class Workers:
    """``grovekeeper worker`` processes on one home and database."""

    home: Path
    url: str
    env: dict[str, str] = field(default_factory=dict)
    procs: list[subprocess.Popen[bytes]] = field(default_factory=list)

    def start(self, n: int = 1) -> list[subprocess.Popen[bytes]]:
        started = []
        for _ in range(n):
            log = open(self.home.parent / f"worker-{len(self.procs)}.log", "ab")  # noqa: SIM115
            proc = subprocess.Popen([sys.executable, "-m", "service", "worker"],
                                    env=child_env(self.home, self.url, **{**FAST, **self.env}),
                                    stdout=log, stderr=subprocess.STDOUT, cwd=ROOT)
            log.close()
            self.procs.append(proc)
            started.append(proc)
        return started

    def logs(self) -> str:
        return "\n".join(p.read_text(errors="replace")
                         for p in sorted(self.home.parent.glob("worker-*.log")))

    def stop(self) -> None:
        for proc in self.procs:
            if proc.poll() is None:
                proc.send_signal(signal.SIGTERM)
        for proc in self.procs:
            try:
                proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                proc.kill()
                proc.wait()


@contextlib.contextmanager
def workers(home: Path, url: str, **env: str) -> Iterator[Workers]:
    pool = Workers(home=home, url=url, env=env)
    try:
        yield pool
    finally:
        pool.stop()


def job_row(url: str, job_id: str) -> Job:
    with session_scope(url) as session:
        job = session.get(Job, job_id)
        assert job is not None
        session.expunge(job)
        return job


def trials(url: str, job_id: str) -> list[Trial]:
    with session_scope(url) as session:
        rows = list(repository.list_trials(session, job_id=job_id))
        for row in rows:
            session.expunge(row)
        return rows


def participants(url: str, job_id: str) -> list[str]:
    with session_scope(url) as session:
        return list(session.scalars(sa.select(JobWorker.worker_id)
                                    .where(JobWorker.job_id == job_id)))


def wait_until(check: Callable[[], Any], timeout: float, what: str,
               logs: Callable[[], str] = lambda: "") -> Any:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        value = check()
        if value:
            return value
        time.sleep(0.2)
    raise AssertionError(f"timed out after {timeout} s waiting for {what}\n{logs()[-4000:]}")


def finished(url: str, job_id: str) -> list[Trial]:
    return [t for t in trials(url, job_id) if t.state in ("complete", "pruned")]

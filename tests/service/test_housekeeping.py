"""Backups and retention on real databases: ``grovekeeper backup`` while another process
writes, and ``grovekeeper prune`` against jobs and files of different ages."""

from __future__ import annotations

import hashlib
import os
import sqlite3
import subprocess
import sys
import threading
import time
from datetime import timedelta
from pathlib import Path

import sqlalchemy as sa

from service import audit, repository
from service.db import session_scope
from service.tables import Dataset, Job, Trial, utcnow
from tests.conftest import ROOT, child_env
from tests.service.jobkit import add_dataset, add_job
from tuner.journal import JOURNAL


def grovekeeper(home: Path, url: str, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "service", *args], env=child_env(home, url),
                          cwd=ROOT, capture_output=True, text=True, timeout=300)


def test_backup_of_a_running_sqlite_service_is_consistent(tmp_path: Path) -> None:
    home = tmp_path / "home"
    url = f"sqlite:///{home / 'grovekeeper.db'}"
    ids = [add_dataset(url, home, n_rows=200, seed=s) for s in (1, 2)]
    stop = threading.Event()
    written = 0

    def write() -> None:  # another writer, as the API and workers would be
        nonlocal written
        while not stop.is_set():
            with session_scope(url) as session:
                audit.record(session, action="test.write", target=str(written), key_id=None)
            written += 1

    thread = threading.Thread(target=write)
    thread.start()
    try:
        time.sleep(0.3)
        done = grovekeeper(home, url, "backup", str(tmp_path / "copy"))
    finally:
        stop.set()
        thread.join()
    assert done.returncode == 0, done.stderr
    assert written > 0
    copy = tmp_path / "copy"
    conn = sqlite3.connect(copy / "grovekeeper.db")
    try:
        # SQLite's own consistency check (https://www.sqlite.org/pragma.html#pragma_integrity_check)
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        rows = conn.execute("SELECT id, file_key, file_sha256 FROM gk_datasets").fetchall()
    finally:
        conn.close()
    assert sorted(r[0] for r in rows) == sorted(ids)
    for _, key, sha in rows:
        assert hashlib.sha256((copy / key).read_bytes()).hexdigest() == sha
    again = grovekeeper(home, url, "backup", str(copy))
    assert again.returncode == 2 and "not empty" in again.stderr  # never overwrites


def _finished_job_with_trials(url: str, home: Path, dataset_id: str, days_ago: float) -> str:
    job_id = add_job(url, home, dataset_id, budget={"trials": 2})
    with session_scope(url) as session:
        job = session.get(Job, job_id)
        assert job is not None
        job.status, job.finished_at = "succeeded", utcnow() - timedelta(days=days_ago)
        for number in range(3):
            repository.upsert_trial(session, job_id=job_id, record={
                "number": number, "state": "complete", "params": {}, "score": 0.5,
                "score_std": 0.1, "fold_scores": [], "best_iterations": [],
                "boosting_rounds": 10, "duration_seconds": 0.1})
        study = job.study_name
    with session_scope(url) as session:
        for seq in range(4):
            session.execute(sa.insert(JOURNAL).values(study=study, seq=seq, body="{}"))
    return job_id


def test_prune_deletes_old_trials_and_old_unreferenced_files_only(db_url: str,
                                                                  tmp_path: Path) -> None:
    home = tmp_path / "home"
    dataset_id = add_dataset(db_url, home)
    old = _finished_job_with_trials(db_url, home, dataset_id, days_ago=10)
    recent = _finished_job_with_trials(db_url, home, dataset_id, days_ago=1)
    stray_old = home / "models" / "mdl_gone.txt"
    stray_young = home / "models" / "mdl_arriving.txt"
    for stray in (stray_old, stray_young):
        stray.parent.mkdir(parents=True, exist_ok=True)
        stray.write_text("tree\n")
    two_hours_ago = time.time() - 7200
    os.utime(stray_old, (two_hours_ago, two_hours_ago))
    done = grovekeeper(home, db_url, "prune", "--trials-days", "7")
    assert done.returncode == 0, done.stderr
    with session_scope(db_url) as session:
        left = {job: session.scalar(sa.select(sa.func.count()).select_from(Trial)
                                    .where(Trial.job_id == job)) for job in (old, recent)}
        journal = {job: session.scalar(
            sa.select(sa.func.count()).select_from(JOURNAL)
            .where(JOURNAL.c.study == f"grovekeeper-{job}")) for job in (old, recent)}
        assert session.get(Job, old) is not None  # the job itself stays
        file_key = session.get(Dataset, dataset_id).file_key  # type: ignore[union-attr]
    assert left == {old: 0, recent: 3}
    assert journal == {old: 0, recent: 4}
    assert not stray_old.exists() and stray_young.exists()
    assert (home / file_key).exists()  # referenced: kept

"""Backups and retention: a consistent copy of the database and the artifacts while the
service runs, and the deletion of what has outlived its use.

Backup: SQLite's online backup API copies the database page by page while writers carry
on (each step sees one consistent state; a write in between restarts the copy of the
changed pages), then every artifact the copy refers to is copied beside it. Artifacts are
never rewritten (new ids for new files), so the files copied after the database match its
rows. PostgreSQL is copied with its own tool (``pg_dump``, see README); ``backup`` then
copies the artifacts the live database refers to.

Retention: trials (our copy and the journal) of jobs that finished more than
``retain_trials_days`` ago are deleted (the job row, its counts and its model stay), and
files under datasets/ and models/ that no row refers to are deleted once they are older
than an hour (a file is written before its row; a younger one may be on its way in).
Models are files with rows, so they are never unreferenced; no model is deleted here, and
so none behind a channel.
"""

from __future__ import annotations

import logging
import shutil
import sqlite3
import time
from dataclasses import dataclass, field
from datetime import timedelta
from pathlib import Path

import sqlalchemy as sa

from service.db import get_engine, is_sqlite, rows_changed, session_scope
from service.settings import Settings
from service.storage import ArtifactStore
from service.tables import Dataset, Job, JobStatus, Model, Trial, utcnow
from tuner.journal_db import BEATS, JOURNAL

log = logging.getLogger("grovekeeper.housekeeping")
_FINISHED = [s.value for s in JobStatus if s.is_finished()]
UNREFERENCED_GRACE_S = 3600.0


@dataclass
class BackupReport:
    database: Path | None
    artifacts: int = 0
    missing: list[str] = field(default_factory=list)


def _sqlite_path(url: str) -> Path:
    return Path(sa.engine.make_url(url).database or "")


def backup(settings: Settings, dest: Path) -> BackupReport:
    """Copy the database (SQLite) and every artifact it refers to into ``dest``."""
    dest.mkdir(parents=True, exist_ok=True)
    if any(dest.iterdir()):
        raise ValueError(f"{dest} is not empty; back up into a new folder")
    url = settings.db_url
    copy: Path | None = None
    if is_sqlite(url):
        copy = dest / "grovekeeper.db"
        source = sqlite3.connect(_sqlite_path(url), timeout=60)
        target = sqlite3.connect(copy)
        try:
            # 1024 pages a step, a short sleep between: writers are never held up for long.
            source.backup(target, pages=1024, sleep=0.005)
        finally:
            target.close()
            source.close()
        keys_url = f"sqlite:///{copy}"
    else:
        keys_url = url
    engine = sa.create_engine(keys_url) if copy else get_engine(url)
    try:
        with engine.connect() as conn:
            keys = [k for (k,) in conn.execute(sa.select(Dataset.file_key))]
            keys += [k for (k,) in conn.execute(sa.select(Model.file_key))]
    finally:
        if copy:
            engine.dispose()
    store = ArtifactStore(settings.artifacts_url, settings.tmp_dir)
    report = BackupReport(database=copy)
    for key in keys:
        try:
            source_file = store.local_path(key)
        except FileNotFoundError:
            report.missing.append(key)  # deleted after the copy of its row
            continue
        (dest / key).parent.mkdir(parents=True, exist_ok=True)
        shutil.copy2(source_file, dest / key)
        report.artifacts += 1
    return report


@dataclass
class PruneReport:
    jobs: int = 0
    trials: int = 0
    journal_rows: int = 0
    files: list[str] = field(default_factory=list)


def prune(settings: Settings, *, trials_days: float | None,
          unreferenced: bool = True) -> PruneReport:
    """Apply the retention settings once (see the module notes)."""
    url = settings.db_url
    report = PruneReport()
    if trials_days is not None:
        cutoff = utcnow() - timedelta(days=trials_days)
        with session_scope(url) as session:
            old = session.execute(sa.select(Job.id, Job.study_name).where(
                Job.status.in_(_FINISHED), Job.finished_at < cutoff)).all()
            for job_id, study in old:
                gone = session.execute(sa.delete(Trial).where(Trial.job_id == job_id))
                report.trials += rows_changed(gone)
                if study:
                    rows = session.execute(sa.delete(JOURNAL).where(JOURNAL.c.study == study))
                    report.journal_rows += rows_changed(rows)
                    session.execute(sa.delete(BEATS).where(BEATS.c.study == study))
            report.jobs = len(old)
    if unreferenced:
        store = ArtifactStore(settings.artifacts_url, settings.tmp_dir)
        if store.is_local:
            with session_scope(url) as session:
                known = set(session.scalars(sa.select(Dataset.file_key)))
                known |= set(session.scalars(sa.select(Model.file_key)))
            now = time.time()
            for folder in ("datasets", "models"):
                base = store.root / folder
                if not base.exists():
                    continue
                for path in base.iterdir():
                    key = f"{folder}/{path.name}"
                    if (path.is_file() and key not in known
                            and now - path.stat().st_mtime > UNREFERENCED_GRACE_S):
                        path.unlink(missing_ok=True)
                        report.files.append(key)
    if report.jobs or report.files:
        log.info("retention: trials of %d job(s) and %d unreferenced file(s) deleted",
                 report.jobs, len(report.files))
    return report

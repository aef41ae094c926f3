"""The artifact store behind fsspec URLs, and additive schema upgrades."""

from __future__ import annotations

import hashlib
from pathlib import Path

import fsspec
import pytest
import sqlalchemy as sa

from service.db import get_engine, init_db, session_scope
from service.migrations import SCHEMA_VERSION
from service.storage import ArtifactCorrupt, ArtifactMissing, ArtifactStore
from service.tables import Job, SchemaVersion


@pytest.mark.parametrize("kind", ["folder", "file-url", "memory"])
def test_store_round_trip_and_sha_check(kind: str, tmp_path: Path) -> None:
    root = {"folder": str(tmp_path / "art"), "file-url": f"file://{tmp_path / 'art'}",
            "memory": f"memory://gk-{tmp_path.name}"}[kind]
    store = ArtifactStore(root, tmp_path / "tmp")
    data = b"tree\n" * 1000
    store.put_bytes(data, "models/mdl_1.txt")
    sha = hashlib.sha256(data).hexdigest()
    assert store.exists("models/mdl_1.txt")
    assert store.local_path("models/mdl_1.txt", sha).read_bytes() == data
    # Nothing but the artifact is left behind: no temporary names beside it.
    fs, base = fsspec.core.url_to_fs(root)
    assert [Path(p).name for p in fs.find(base)] == ["mdl_1.txt"]
    with pytest.raises(ArtifactCorrupt):
        store.local_path("models/mdl_1.txt", "0" * 64)
    # Another process's cache (a fresh store on the same root) sees the same bytes.
    other = ArtifactStore(root, tmp_path / "tmp2")
    assert other.local_path("models/mdl_1.txt", sha).read_bytes() == data
    store.delete("models/mdl_1.txt")
    with pytest.raises(ArtifactMissing):
        other.local_path("models/mdl_2.txt")
    assert not store.exists("models/mdl_1.txt")
    with pytest.raises(ValueError):
        store.put_bytes(b"x", "../escape.txt")


def test_remote_copy_corrupted_after_caching_is_refused(tmp_path: Path) -> None:
    root = f"memory://gk-corrupt-{tmp_path.name}"
    store = ArtifactStore(root, tmp_path / "tmp")
    store.put_bytes(b"good", "datasets/ds_1.parquet")
    sha = hashlib.sha256(b"good").hexdigest()
    cached = store.local_path("datasets/ds_1.parquet", sha)
    cached.write_bytes(b"bad!")  # a damaged cache is fetched again, not trusted
    assert store.local_path("datasets/ds_1.parquet", sha).read_bytes() == b"good"
    fs, base = fsspec.core.url_to_fs(root)
    fs.pipe_file(f"{base}/datasets/ds_1.parquet", b"evil")
    cached.unlink()
    with pytest.raises(ArtifactCorrupt):
        store.local_path("datasets/ds_1.parquet", sha)


def test_old_database_gains_new_columns_and_keeps_rows(db_url: str) -> None:
    engine = get_engine(db_url)
    with engine.begin() as conn:
        # gk_jobs as the foundation created it, before max_workers and joinable existed.
        conn.execute(sa.text(
            "CREATE TABLE gk_jobs (id VARCHAR(40) PRIMARY KEY, dataset_id VARCHAR(40) NOT NULL,"
            " status VARCHAR(16) NOT NULL, priority INTEGER NOT NULL, spec JSON NOT NULL,"
            " study_name VARCHAR(80) NOT NULL, trials_completed INTEGER NOT NULL,"
            " trials_pruned INTEGER NOT NULL, trials_failed INTEGER NOT NULL, best_score FLOAT,"
            " best_trial_number INTEGER, cancel_requested BOOLEAN NOT NULL, error TEXT,"
            " model_id VARCHAR(40), worker_id VARCHAR(120), attempts INTEGER NOT NULL,"
            " warnings JSON NOT NULL, created_at TIMESTAMP WITH TIME ZONE NOT NULL,"
            " started_at TIMESTAMP WITH TIME ZONE, heartbeat_at TIMESTAMP WITH TIME ZONE,"
            " finished_at TIMESTAMP WITH TIME ZONE)"))
        spec = ('{"effective": {"target": "defect", "task": "binary", "metric": "roc_auc",'
                ' "direction": "maximize", "budget": {"trials": 7, "seconds": null}}}')
        conn.execute(sa.text(
            "INSERT INTO gk_jobs VALUES ('job_old', 'ds', 'succeeded', 0, :spec, 's', 3, 0, 0,"
            " 0.9, 1, false, NULL, NULL, NULL, 1, '[]', '2026-01-01 00:00:00+00', NULL, NULL,"
            " NULL)"), {"spec": spec})
    init_db(db_url)
    init_db(db_url)  # idempotent
    with session_scope(db_url) as session:
        job = session.get(Job, "job_old")
        assert job is not None and job.max_workers == 1 and job.joinable is False
        assert job.trials_completed == 3
        # The jobs list's columns, filled from the stored request by the upgrade.
        assert (job.target, job.task, job.metric, job.direction, job.trials_budget,
                job.seconds_budget) == ("defect", "binary", "roc_auc", "maximize", 7, None)
        assert session.scalar(sa.select(SchemaVersion.version)) == SCHEMA_VERSION
    indexes = {i["name"] for i in sa.inspect(engine).get_indexes("gk_jobs")}
    assert {"ix_gk_jobs_listed", "ix_gk_jobs_status_listed", "ix_gk_jobs_claim"} <= indexes

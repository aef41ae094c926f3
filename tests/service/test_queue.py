"""The queue contract, on SQLite and on the real PostgreSQL (Optuna's STORAGE_MODES idea)."""

from __future__ import annotations

import multiprocessing as mp
from datetime import timedelta

import sqlalchemy as sa

from service import queue, repository
from service.db import dispose_engines, init_db, session_scope
from service.tables import Job, JobStatus, utcnow


def _add_jobs(url: str, n: int, **fields) -> list[str]:
    ids = []
    with session_scope(url) as session:
        for i in range(n):
            job = repository.add_job(
                session, id=f"job_{i:04d}", dataset_id="ds_x", spec={"request": {}},
                study_name=f"s{i}", created_at=utcnow() + timedelta(milliseconds=i), **fields)
            ids.append(job.id)
    return ids


def test_claims_by_priority_then_age(db_url: str) -> None:
    init_db(db_url)
    _add_jobs(db_url, 3)
    with session_scope(db_url) as session:
        session.get(Job, "job_0002").priority = 5
    order = []
    with session_scope(db_url) as session:
        for _ in range(4):
            order.append(queue.claim_next(session, worker_id="w1"))
    assert order == ["job_0002", "job_0000", "job_0001", None]
    with session_scope(db_url) as session:
        job = session.get(Job, "job_0000")
        assert job.status == "running" and job.worker_id == "w1" and job.attempts == 1


def test_heartbeat_release_finish_and_stale_sweep(db_url: str) -> None:
    init_db(db_url)
    _add_jobs(db_url, 2)
    with session_scope(db_url) as session:
        a = queue.claim_next(session, worker_id="w1")
        b = queue.claim_next(session, worker_id="w2")
    with session_scope(db_url) as session:
        assert queue.heartbeat(session, job_id=a, worker_id="w1") == (True, False)
        assert queue.heartbeat(session, job_id=a, worker_id="w2") == (False, False)
        repository.request_cancel(session, b)
    with session_scope(db_url) as session:
        assert queue.heartbeat(session, job_id=b, worker_id="w2") == (True, True)
        # w2 goes silent: its heartbeat is older than the stale limit.
        session.get(Job, b).heartbeat_at = utcnow() - timedelta(seconds=120)
    with session_scope(db_url) as session:
        assert queue.requeue_stale(session, stale_after_seconds=60) == [b]
    with session_scope(db_url) as session:
        assert queue.finish(session, job_id=b, worker_id="w2", status=JobStatus.FAILED) is False
        assert queue.release(session, job_id=a, worker_id="w1") is True
    with session_scope(db_url) as session:
        assert session.get(Job, a).status == "queued"
        assert queue.claim_next(session, worker_id="w3") in (a, b)


def _claim_all(url: str, worker: str, out: mp.Queue) -> None:
    dispose_engines(close=False)  # a forked child must not reuse the parent's connections
    got = []
    while True:
        with session_scope(url) as session:
            job_id = queue.claim_next(session, worker_id=worker)
        if job_id is None:
            break
        got.append(job_id)
    out.put((worker, got))


def test_four_processes_claim_each_job_exactly_once(db_url: str) -> None:
    init_db(db_url)
    ids = _add_jobs(db_url, 120)
    dispose_engines()
    ctx = mp.get_context("fork")
    out: mp.Queue = ctx.Queue()
    procs = [ctx.Process(target=_claim_all, args=(db_url, f"w{i}", out)) for i in range(4)]
    for p in procs:
        p.start()
    results = [out.get(timeout=120) for _ in procs]
    for p in procs:
        p.join(timeout=30)
    claimed = [job for _, got in results for job in got]
    assert sorted(claimed) == ids  # every job once: none lost, none claimed twice
    with session_scope(db_url) as session:
        owners = dict(session.execute(sa.select(Job.id, Job.worker_id)).all())
    for worker, got in results:
        assert all(owners[j] == worker for j in got)

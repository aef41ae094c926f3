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


def test_joiners_respect_max_workers_and_joinable(db_url: str) -> None:
    init_db(db_url)
    _add_jobs(db_url, 2)
    with session_scope(db_url) as session:
        session.get(Job, "job_0000").max_workers = 3
    with session_scope(db_url) as session:
        assert queue.claim_next(session, worker_id="lead") == "job_0000"
        assert queue.claim_next(session, worker_id="other") == "job_0001"  # max_workers 1
    with session_scope(db_url) as session:
        # Not joinable until the lead has taken the enqueued trial 0.
        assert queue.join_next(session, worker_id="w2") is None
        queue.set_joinable(session, job_id="job_0000", worker_id="lead")
    with session_scope(db_url) as session:
        assert queue.join_next(session, worker_id="w2") == "job_0000"
        assert queue.join_next(session, worker_id="w2") is None  # already in
        assert queue.join_next(session, worker_id="w3") == "job_0000"
        assert queue.join_next(session, worker_id="w4") is None  # 3 of 3
        assert queue.participants(session, job_id="job_0000") == ["lead", "w2", "w3"]
    with session_scope(db_url) as session:
        assert queue.heartbeat_joiner(session, job_id="job_0000", worker_id="w2") == (True,
                                                                                       False)
        assert queue.heartbeat_joiner(session, job_id="job_0000", worker_id="w4") == (False,
                                                                                       False)
        queue.leave(session, job_id="job_0000", worker_id="w3")
    with session_scope(db_url) as session:
        assert queue.join_next(session, worker_id="w4") == "job_0000"


def test_stale_lead_requeues_while_joiners_carry_on(db_url: str) -> None:
    from service.tables import JobWorker

    init_db(db_url)
    _add_jobs(db_url, 1)
    with session_scope(db_url) as session:
        session.get(Job, "job_0000").max_workers = 2
    with session_scope(db_url) as session:
        queue.claim_next(session, worker_id="lead")
        queue.set_joinable(session, job_id="job_0000", worker_id="lead")
    with session_scope(db_url) as session:
        queue.join_next(session, worker_id="joiner")
    old = utcnow() - timedelta(seconds=120)
    with session_scope(db_url) as session:
        session.get(Job, "job_0000").heartbeat_at = old
        session.get(JobWorker, ("job_0000", "lead")).heartbeat_at = old
    with session_scope(db_url) as session:
        assert queue.requeue_stale(session, stale_after_seconds=60) == ["job_0000"]
    with session_scope(db_url) as session:
        assert queue.participants(session, job_id="job_0000") == ["joiner"]
        # The joiner keeps going while the job waits for a new lead ...
        assert queue.heartbeat_joiner(session, job_id="job_0000", worker_id="joiner") == (
            True, False)
        # ... the old lead has lost it ...
        assert queue.heartbeat(session, job_id="job_0000", worker_id="lead") == (False, False)
        assert queue.claim_next(session, worker_id="lead2") == "job_0000"
    with session_scope(db_url) as session:
        assert queue.finish(session, job_id="job_0000", worker_id="lead2",
                            status=JobStatus.SUCCEEDED)
    with session_scope(db_url) as session:
        # ... and stops once the job is finished.
        assert queue.participants(session, job_id="job_0000") == []
        assert queue.heartbeat_joiner(session, job_id="job_0000", worker_id="joiner")[0] is False


def _join_all(url: str, worker: str, out: mp.Queue) -> None:
    dispose_engines(close=False)
    with session_scope(url) as session:
        out.put((worker, queue.join_next(session, worker_id=worker)))


def test_concurrent_joiners_never_exceed_max_workers(db_url: str) -> None:
    init_db(db_url)
    _add_jobs(db_url, 1)
    with session_scope(db_url) as session:
        session.get(Job, "job_0000").max_workers = 3
    with session_scope(db_url) as session:
        queue.claim_next(session, worker_id="lead")
        queue.set_joinable(session, job_id="job_0000", worker_id="lead")
    dispose_engines()
    ctx = mp.get_context("fork")
    out: mp.Queue = ctx.Queue()
    procs = [ctx.Process(target=_join_all, args=(db_url, f"w{i}", out)) for i in range(6)]
    for p in procs:
        p.start()
    results = [out.get(timeout=60) for _ in procs]
    for p in procs:
        p.join(timeout=30)
    joined = sorted(w for w, job in results if job == "job_0000")
    with session_scope(db_url) as session:
        members = queue.participants(session, job_id="job_0000")
    # A joiner that finds the row locked (SKIP LOCKED) tries again at its next poll, so
    # fewer may get in at once, never more.
    assert 1 <= len(joined) <= 2 and sorted(members) == sorted(["lead", *joined])
    with session_scope(db_url) as session:
        for i in range(6, 9):
            queue.join_next(session, worker_id=f"w{i}")
        assert len(queue.participants(session, job_id="job_0000")) == 3

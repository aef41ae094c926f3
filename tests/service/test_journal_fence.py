"""A worker that lost its job cannot write to the job's trial journal (Optuna's storage),
and a worker does not join a job whose budget is all handed out. Real SQLite and the real
PostgreSQL (db_url runs each test on both), real Optuna studies on the journal."""

from __future__ import annotations

import logging
from datetime import timedelta
from pathlib import Path

import pytest
import sqlalchemy as sa

import tuner
from service import queue
from service.db import session_scope
from service.settings import Settings
from service.tables import Job, JobWorker, utcnow
from service.worker.process import Worker
from tests.service.jobkit import add_dataset, add_job, participants
from tuner.journal import JOURNAL, engine


def _journal_rows(url: str, study: str) -> int:
    with engine(url).connect() as conn:
        return conn.scalar(sa.select(sa.func.count()).select_from(JOURNAL)
                           .where(JOURNAL.c.study == study))


def _go_stale(url: str, job_id: str, worker_id: str) -> None:
    """The worker stops heart-beating (cut off, paused): its stamps age past the limit."""
    old = utcnow() - timedelta(seconds=120)
    with session_scope(url) as session:
        job = session.get(Job, job_id)
        if job.worker_id == worker_id:
            job.heartbeat_at = old
        session.execute(sa.update(JobWorker).where(JobWorker.job_id == job_id,
                                                   JobWorker.worker_id == worker_id)
                        .values(heartbeat_at=old))


def test_a_superseded_lead_cannot_append_to_the_trial_journal(
        db_url: str, tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    home = tmp_path / "home"
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"trials": 5})
    study_name = f"grovekeeper-{job_id}"
    with session_scope(db_url) as session:
        claimed, epoch = queue.claim(session, worker_id="lead-a")
    assert claimed == job_id
    fence_a = queue.journal_fence(job_id=job_id, worker_id="lead-a", epoch=epoch)
    study = tuner.open_study(db_url, study_name, direction="maximize", seed=1, create=True,
                             fence=fence_a)
    trial = study.ask()  # lead-a holds the job: its writes go in
    trial.suggest_float("x", 0.0, 1.0)
    before = _journal_rows(db_url, study_name)
    assert before > 0

    # lead-a goes quiet; the sweep hands the job back and lead-b claims it (epoch + 1).
    _go_stale(db_url, job_id, "lead-a")
    with session_scope(db_url) as session:
        assert queue.requeue_stale(session, stale_after_seconds=60) == [job_id]
    with session_scope(db_url) as session:
        assert queue.claim(session, worker_id="lead-b") == (job_id, epoch + 1)

    # lead-a comes back and carries on as if nothing happened: every write is refused.
    with caplog.at_level(logging.WARNING, logger="tuner.journal"):
        with pytest.raises(tuner.JournalFenced):
            study.tell(trial, 0.9)
        with pytest.raises(tuner.JournalFenced):
            study.ask()
    assert _journal_rows(db_url, study_name) == before  # nothing of it was written
    refusals = [r.getMessage() for r in caplog.records if "refused by its fence" in
                r.getMessage()]
    assert len(refusals) == 2 and all(study_name in m for m in refusals)
    assert "set_trial_state_values" in refusals[0]
    # What every other process reads: lead-a's trial has no result from it.
    (record,) = [r for r in tuner.load_trial_records(db_url, study_name)
                 if r.number == trial.number]
    assert record.state == "running" and record.score is None

    # lead-b holds the job under the new epoch: its writes go in.
    fence_b = queue.journal_fence(job_id=job_id, worker_id="lead-b", epoch=epoch + 1)
    result = tuner.close_search(db_url, study_name, direction="maximize", fence=fence_b)
    assert result.n_failed == 1  # lead-a's trial, failed by the job's holder
    assert _journal_rows(db_url, study_name) == before + 1


def test_a_swept_joiner_cannot_append_to_the_trial_journal(db_url: str,
                                                           tmp_path: Path) -> None:
    home = tmp_path / "home"
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"trials": 5},
                     max_workers=2)
    study_name = f"grovekeeper-{job_id}"
    with session_scope(db_url) as session:
        _, epoch = queue.claim(session, worker_id="lead")
    tuner.open_study(db_url, study_name, direction="maximize", seed=1, create=True,
                     fence=queue.journal_fence(job_id=job_id, worker_id="lead", epoch=epoch))
    with session_scope(db_url) as session:
        queue.set_joinable(session, job_id=job_id, worker_id="lead")
    with session_scope(db_url) as session:
        assert queue.join_next(session, worker_id="joiner") == job_id
    fence = queue.journal_fence(job_id=job_id, worker_id="joiner", lead=False)
    joined = tuner.open_study(db_url, study_name, direction="maximize", seed=1,
                              create=False, fence=fence)
    joined.tell(joined.ask(), 0.5)
    before = _journal_rows(db_url, study_name)

    _go_stale(db_url, job_id, "joiner")
    with session_scope(db_url) as session:
        queue.requeue_stale(session, stale_after_seconds=60)
    assert participants(db_url, job_id) == ["lead"]
    with pytest.raises(tuner.JournalFenced):
        joined.ask()
    assert _journal_rows(db_url, study_name) == before


def test_a_worker_does_not_join_again_a_job_with_nothing_left_to_run(
        db_url: str, tmp_path: Path, caplog: pytest.LogCaptureFixture) -> None:
    home = tmp_path / "home"
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"trials": 2},
                     max_workers=2)
    with session_scope(db_url) as session:
        _, epoch = queue.claim(session, worker_id="lead")
    study = tuner.open_study(db_url, f"grovekeeper-{job_id}", direction="maximize", seed=1,
                             create=True)
    for _ in range(2):  # the whole budget is finished; the lead has yet to close the job
        study.tell(study.ask(), 0.5)
    with session_scope(db_url) as session:
        queue.set_joinable(session, job_id=job_id, worker_id="lead", epoch=epoch)

    worker = Worker(Settings(home=home, database_url=db_url), worker_id="late")
    with caplog.at_level(logging.INFO, logger="grovekeeper.worker"):
        assert worker.run_once() is True  # it joins, finds the budget spent, leaves
        assert worker.run_once() is False  # and does not join the same job again
        assert worker.run_once() is False
    joins = [r for r in caplog.records if r.getMessage().startswith("worker late joined")]
    assert len(joins) == 1
    assert participants(db_url, job_id) == ["lead"]


def test_the_search_says_when_its_budget_is_all_handed_out(tmp_path: Path) -> None:
    data = tuner.prepare(_frame(), target="y")
    plan = tuner.plan_validation(data, n_folds=3, holdout_fraction=0.2)
    config = tuner.SearchConfig(task=data.task, metric=tuner.default_metric(data.task),
                                n_trials=4, max_parallel_trials=1, num_threads=1,
                                max_rounds=20)
    finished: list[int] = []
    taken_after: list[int] = []
    tuner.run_search(data, plan, config, storage_url=f"sqlite:///{tmp_path}/s.db",
                     study_name="s", on_trial=lambda r: finished.append(r.number),
                     on_budget_taken=lambda: taken_after.append(len(finished)))
    # Once, as the fourth (last) trial starts: three had finished by then.
    assert taken_after == [3] and len(finished) == 4


def _frame():  # type: ignore[no-untyped-def]
    import numpy as np
    import pandas as pd

    rng = np.random.default_rng(0)
    x = rng.normal(size=(200, 3))
    return pd.DataFrame({"a": x[:, 0], "b": x[:, 1], "c": x[:, 2],
                         "y": x[:, 0] + 0.5 * x[:, 1] + rng.normal(scale=0.3, size=200)})

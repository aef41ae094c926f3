"""Crashes, shared jobs and cancellation with real worker processes, on SQLite and on the
real PostgreSQL (db_url runs each test on both)."""

from __future__ import annotations

import os
import signal
from datetime import datetime
from pathlib import Path

import pytest
from optuna.trial import TrialState

import tuner
from service import repository
from service.db import session_scope
from tests.service.jobkit import (
    add_dataset,
    add_job,
    finished,
    job_row,
    participants,
    trials,
    wait_until,
    workers,
)

pytestmark = pytest.mark.e2e


def _optuna_trials(url: str, job_id: str) -> dict[int, tuner.TrialRecord]:
    return {r.number: r for r in tuner.load_trial_records(url, f"grovekeeper-{job_id}")}


def test_kill9_then_a_fresh_worker_completes_the_full_budget(db_url: str,
                                                             tmp_path: Path) -> None:
    home = tmp_path / "home"
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"trials": 8})
    with workers(home, db_url) as pool:
        (first,) = pool.start(1)
        wait_until(lambda: len(finished(db_url, job_id)) >= 3, 120, "3 finished trials",
                   pool.logs)
        first.send_signal(signal.SIGKILL)
        first.wait()
        before = {r.number: r for r in _optuna_trials(db_url, job_id).values()
                  if r.state in ("complete", "pruned")}
        assert len(before) >= 3 and job_row(db_url, job_id).status == "running"

        pool.start(1)
        job = wait_until(lambda: (j := job_row(db_url, job_id)).status == "succeeded" and j,
                         180, "the job to succeed after the crash", pool.logs)
    assert job.attempts == 2  # the job went back to the queue once and was claimed again
    after = _optuna_trials(db_url, job_id)
    done = [r for r in after.values() if r.state in ("complete", "pruned")]
    assert len(done) == 8  # one worker at the end: exactly the budget of finished trials
    assert "running" not in {r.state for r in after.values()}  # the killed trial was failed
    for number, record in before.items():
        assert after[number].params == record.params and after[number].score == record.score
    ours = trials(db_url, job_id)
    numbers = [t.number for t in ours]
    assert len(numbers) == len(set(numbers))
    assert {t.number: t.state for t in ours} == {r.number: r.state for r in after.values()}
    assert job.model_id is not None and participants(db_url, job_id) == []


def test_two_workers_share_one_job_within_the_budget_bound(db_url: str,
                                                           tmp_path: Path) -> None:
    home = tmp_path / "home"
    budget = 10
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"trials": budget},
                     max_workers=2)
    with workers(home, db_url) as pool:
        pool.start(2)
        job = wait_until(lambda: (j := job_row(db_url, job_id)).status == "succeeded" and j,
                         240, "the shared job to succeed", pool.logs)
        logs = pool.logs()
    # The joiner joins while there is work left; finding none (its last join raced the
    # lead closing the job) happens at most once, not join-and-leave over and over.
    assert logs.count(f"left job {job_id} (0 trials)") <= 1, logs[-3000:]
    done = finished(db_url, job_id)
    contributors = {t.worker_id for t in done}
    # Each worker beyond the first may have one trial in flight when the budget is reached
    # (README, several workers). Whether the second worker joined in time depends on how
    # fast trials run, so the bound counts the workers that did.
    assert budget <= len(done) <= budget + len(contributors) - 1
    numbers = [t.number for t in trials(db_url, job_id)]
    assert sorted(numbers) == list(range(len(numbers)))  # unique, none skipped
    assert job.attempts == 1 and job.model_id is not None
    assert participants(db_url, job_id) == []


def test_a_second_worker_joins_a_running_job(db_url: str, tmp_path: Path) -> None:
    # A time budget, so the job runs long enough to be joined however fast trials are.
    home = tmp_path / "home"
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"seconds": 8},
                     max_workers=2)
    with workers(home, db_url) as pool:
        pool.start(2)
        job = wait_until(lambda: (j := job_row(db_url, job_id)).status == "succeeded" and j,
                         240, "the shared job to succeed", pool.logs)
    done = finished(db_url, job_id)
    assert len({t.worker_id for t in done}) == 2
    numbers = [t.number for t in trials(db_url, job_id)]
    assert sorted(numbers) == list(range(len(numbers)))  # unique, none skipped
    assert job.attempts == 1 and job.model_id is not None
    assert participants(db_url, job_id) == []


def test_two_workers_many_jobs_each_claimed_once(db_url: str, tmp_path: Path) -> None:
    home = tmp_path / "home"
    dataset_id = add_dataset(db_url, home, n_rows=200)
    ids = [add_job(db_url, home, dataset_id, budget={"trials": 2}) for _ in range(5)]
    with workers(home, db_url) as pool:
        pool.start(2)
        wait_until(lambda: all(job_row(db_url, j).status == "succeeded" for j in ids), 240,
                   "every job to succeed", pool.logs)
    for job_id in ids:
        job = job_row(db_url, job_id)
        assert job.attempts == 1  # claimed exactly once
        assert {t.worker_id for t in trials(db_url, job_id)} == {job.worker_id}


def _logged_at(logs: str, message: str) -> datetime:
    """When a text log line containing ``message`` was written (the worker's local time)."""
    line = next(line for line in logs.splitlines() if message in line)
    return datetime.strptime(line[:23], "%Y-%m-%d %H:%M:%S,%f")


def test_cancel_stops_at_the_trials_in_flight(db_url: str, tmp_path: Path) -> None:
    home = tmp_path / "home"
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"trials": 500})
    # The cancel flag travels with the heartbeat; beat often, as trials here are short.
    with workers(home, db_url, GROVEKEEPER_HEARTBEAT_SECONDS="0.2") as pool:
        pool.start(1)
        wait_until(lambda: len(finished(db_url, job_id)) >= 2, 120, "2 finished trials",
                   pool.logs)
        with session_scope(db_url) as session:
            repository.request_cancel(session, job_id)
        job = wait_until(lambda: (j := job_row(db_url, job_id)).status == "cancelled" and j,
                         120, "the job to be cancelled", pool.logs)
        seen = _logged_at(pool.logs(), f"job {job_id}: cancel requested")
    study = tuner.load_study(db_url, f"grovekeeper-{job_id}")
    threads = os.cpu_count() or 1  # parallel trials never exceed the cores
    # Enqueued configurations (the portfolio) that never started have no start time.
    started = [t for t in study.trials if t.datetime_start is not None]
    started_after = [t for t in started if t.datetime_start > seen]
    in_flight = [t for t in started if t.datetime_start <= seen
                 and (t.datetime_complete is None or t.datetime_complete > seen)]
    # The worker sets the flag, then logs it: a trial started after that line saw the flag
    # before its first boosting round and was stopped, never scored; at most one per thread
    # can have been asked for before the search loop noticed.
    assert all(t.state == TrialState.PRUNED for t in started_after), started_after
    assert len(started_after) <= threads
    # The trials running when the flag arrived were the last to finish.
    assert len(in_flight) <= threads
    assert len(study.trials) < 500
    assert job.model_id is None  # cancelled jobs are not refit (README)
    assert participants(db_url, job_id) == []


def test_sigterm_hands_the_job_back_and_a_new_worker_resumes(db_url: str,
                                                             tmp_path: Path) -> None:
    home = tmp_path / "home"
    # Far more trials than the two awaited, so the first worker is still searching when
    # the signal comes, however fast trials run (with 6, a quick machine finished the
    # job between the poll and the signal).
    budget = 30
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"trials": budget})
    with workers(home, db_url) as pool:
        (first,) = pool.start(1)
        wait_until(lambda: len(finished(db_url, job_id)) >= 2, 120, "2 finished trials",
                   pool.logs)
        first.send_signal(signal.SIGTERM)
        assert first.wait(timeout=60) == 0
        job = job_row(db_url, job_id)
        assert job.status == "queued" and job.worker_id is None  # released at once
        assert participants(db_url, job_id) == []
        kept = {t.number: (t.params, t.score) for t in finished(db_url, job_id)}
        pool.start(1)
        wait_until(lambda: job_row(db_url, job_id).status == "succeeded", 180,
                   "the resumed job to succeed", pool.logs)
    after = {t.number: (t.params, t.score) for t in finished(db_url, job_id)}
    assert all(after[n] == v for n, v in kept.items())
    # The interrupted trial was pruned (it counts as finished), so the budget holds.
    assert len(after) == budget


def test_wall_clock_limit_ends_the_search_and_refits(db_url: str, tmp_path: Path) -> None:
    from service.api.schemas import as_utc

    home = tmp_path / "home"
    job_id = add_job(db_url, home, add_dataset(db_url, home), budget={"seconds": 4})
    with workers(home, db_url) as pool:
        pool.start(1)
        job = wait_until(lambda: (j := job_row(db_url, job_id)).status == "succeeded" and j,
                         120, "the time-limited job to succeed", pool.logs)
    done = finished(db_url, job_id)
    last = max(as_utc(t.finished_at) for t in done)
    slowest = max(t.duration_seconds or 0 for t in done)
    # Optuna checks the timeout between trials: the last trial may start just before it.
    assert (last - as_utc(job.started_at)).total_seconds() < 4 + slowest + 5
    assert len(done) >= 1 and job.model_id is not None

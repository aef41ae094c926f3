"""The trial journal (tuner/_journal.py): Optuna storage on a SQL table.

Every check runs on SQLite and on the real PostgreSQL (the db_url fixture), with several
real processes where the claim is about processes. The reference behaviour is Optuna's
own storage contract: trial numbers are contiguous per study, an enqueued trial runs
once (Optuna's FAQ on enqueue_trial with several workers; docs/measured-facts.md §2 measured
RDBStorage on SQLite running 22 of 200 enqueued trials twice), and a trial whose
heartbeat went stale is failed by the next trial started (Optuna's RDBStorage heartbeat
docs).
"""

from __future__ import annotations

import multiprocessing
import time
import warnings

import optuna
import pytest
import sqlalchemy as sa
from optuna.storages import fail_stale_trials
from optuna.trial import TrialState

from tuner.journal import BEATS, TrialJournal, engine
from tuner.study import open_study

N_PROCESSES = 3


def _objective(trial: optuna.Trial) -> float:
    x = trial.suggest_float("x", -3.0, 3.0)
    n = trial.suggest_int("n", 1, 9)
    for step in range(3):
        trial.report(x * step, step=step)
    trial.set_user_attr("record", {"x": x, "folds": [1.5, 2.5], "nested": {"n": n}})
    return (x - 1.0) ** 2 + n


def _run(url: str, study: str, n_trials: int) -> None:
    optuna.logging.set_verbosity(optuna.logging.WARNING)
    storage = TrialJournal(url, study)
    loaded = optuna.load_study(study_name=study, storage=storage,
                               sampler=optuna.samplers.RandomSampler())
    loaded.optimize(_objective, n_trials=n_trials)


def _in_processes(url: str, study: str, n_trials: int) -> None:
    ctx = multiprocessing.get_context("spawn")
    procs = [ctx.Process(target=_run, args=(url, study, n_trials)) for _ in range(N_PROCESSES)]
    for proc in procs:
        proc.start()
    for proc in procs:
        proc.join(timeout=240)
        assert proc.exitcode == 0


def test_processes_share_one_study_with_contiguous_numbers(db_url: str) -> None:
    optuna.create_study(study_name="shared", storage=TrialJournal(db_url, "shared"))
    _in_processes(db_url, "shared", n_trials=15)
    trials = optuna.load_study(study_name="shared",
                               storage=TrialJournal(db_url, "shared")).trials
    assert sorted(t.number for t in trials) == list(range(N_PROCESSES * 15))
    assert all(t.state == TrialState.COMPLETE for t in trials)
    # What a fresh process replays is what the writers wrote.
    for t in trials:
        assert t.value == (t.params["x"] - 1.0) ** 2 + t.params["n"]
        assert t.intermediate_values == {s: t.params["x"] * s for s in range(3)}
        assert t.user_attrs["record"]["nested"] == {"n": t.params["n"]}


def test_each_enqueued_trial_runs_once_across_processes(db_url: str) -> None:
    study = optuna.create_study(study_name="queued", storage=TrialJournal(db_url, "queued"))
    wanted = [{"x": round(-3.0 + 0.2 * i, 1), "n": 1 + i % 9} for i in range(24)]
    for params in wanted:
        study.enqueue_trial(params)
    _in_processes(db_url, "queued", n_trials=8)  # 3 x 8 = exactly the 24 queued
    trials = optuna.load_study(study_name="queued",
                               storage=TrialJournal(db_url, "queued")).trials
    ran = sorted((t.params["x"], t.params["n"]) for t in trials
                 if t.state == TrialState.COMPLETE)
    assert ran == sorted((p["x"], p["n"]) for p in wanted)
    assert not [t for t in trials if t.state == TrialState.WAITING]


def test_studies_keep_separate_journals(db_url: str) -> None:
    for name, n in (("a", 3), ("b", 5)):
        optuna.create_study(study_name=name, storage=TrialJournal(db_url, name)).optimize(
            _objective, n_trials=n)
    assert [t.number for t in optuna.load_study(
        study_name="b", storage=TrialJournal(db_url, "b")).trials] == [0, 1, 2, 3, 4]
    with pytest.raises(KeyError):
        optuna.load_study(study_name="c", storage=TrialJournal(db_url, "c"))


def test_a_trial_without_heartbeat_goes_stale_and_a_live_one_does_not(db_url: str) -> None:
    # One process started trial 0 and died long ago; another is alive and beating.
    # A grace of an hour: the live trial cannot go stale however slow this machine is; the
    # dead one's last beat is written an hour and a minute in the past instead of waiting.
    dead = TrialJournal(db_url, "hb", heartbeat_seconds=1, grace_seconds=3600)
    study = optuna.create_study(study_name="hb", storage=dead)
    live_storage = TrialJournal(db_url, "hb", heartbeat_seconds=1, grace_seconds=3600)
    live_study = optuna.load_study(study_name="hb", storage=live_storage)
    with warnings.catch_warnings():
        # ask() warns that heartbeats belong to optimize(); here the beats are by hand.
        warnings.simplefilter("ignore", UserWarning)
        orphan = study.ask()
        live = live_study.ask()
    dead.record_heartbeat(orphan._trial_id)
    with engine(db_url, writer=True).begin() as conn:
        conn.execute(sa.update(BEATS).where(BEATS.c.study == "hb",
                                            BEATS.c.trial_id == orphan._trial_id)
                     .values(beat_at=time.time() - 3660))
    live_storage.record_heartbeat(live._trial_id)
    assert live_storage._get_stale_trial_ids(live_study._study_id) == [orphan._trial_id]
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", optuna.exceptions.ExperimentalWarning)
        fail_stale_trials(live_study)  # what optimize() runs before each trial
    states = {t.number: t.state for t in live_study.get_trials(deepcopy=False)}
    assert states == {orphan.number: TrialState.FAIL, live.number: TrialState.RUNNING}
    # The dead process's view catches up: telling the failed trial a value is refused.
    with pytest.raises((ValueError, optuna.exceptions.UpdateFinishedTrialError)):
        study.tell(orphan, 1.0)
    assert study.get_trials(deepcopy=False)[orphan.number].state == TrialState.FAIL


def test_a_study_in_optunas_own_tables_is_carried_over(db_url: str) -> None:
    # A database from before the journal: the study lives in Optuna's RDBStorage tables.
    rdb = optuna.storages.RDBStorage(db_url)
    legacy = optuna.create_study(study_name="old", direction="minimize", storage=rdb)
    legacy.optimize(_objective, n_trials=3)
    before = {t.number: (t.params, t.value) for t in legacy.trials}
    rdb.engine.dispose()
    study = open_study(db_url, "old", direction="minimize", seed=0, create=True)
    assert {t.number: (t.params, t.value) for t in study.trials} == before
    study.optimize(_objective, n_trials=1)
    assert [t.number for t in study.trials] == [0, 1, 2, 3]

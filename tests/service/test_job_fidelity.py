"""Rows as a fidelity through a real in-process worker: what the job, its trial copy, its
leaderboard and its progress say about configurations stopped on row subsamples."""

from __future__ import annotations

from pathlib import Path

import tuner.fidelity
from service import repository
from service.api.routes.jobs import to_out
from service.db import session_scope
from service.settings import Settings
from service.tables import Job, Model
from service.worker.process import Worker
from tests.service.jobkit import add_dataset, add_job, trials
from tuner.evaluation import sampling


def _run(tmp_path: Path, n_rows: int, **fields) -> tuple[str, str]:
    home = tmp_path / "home"
    url = f"sqlite:///{tmp_path / 'gk.db'}"
    job_id = add_job(url, home, add_dataset(url, home, n_rows=n_rows), **fields)
    assert Worker(Settings(home=home, database_url=url)).run_once()
    return url, job_id


def test_large_search_rows_climb_rungs_and_only_full_rows_rank(tmp_path: Path,
                                                               monkeypatch) -> None:
    # The service's threshold is 50,000 search rows; lowered so 1,500 rows climb rungs.
    monkeypatch.setattr(tuner.fidelity, "FIDELITY_FROM_ROWS", 600)
    url, job_id = _run(tmp_path, 1_500, budget={"trials": 14}, pruner="none", max_rounds=80,
                       reproducible=True)
    rows = trials(url, job_id)
    with session_scope(url) as session:
        job = session.get(Job, job_id)
        assert job.status == "succeeded", job.error
        out = to_out(job)
        board, total = repository.leaderboard(session, job_id=job_id,
                                              direction=job.spec["effective"]["direction"],
                                              limit=None)
        model = session.get(Model, job.model_id)
        effective = job.spec["effective"]
    assert effective["fidelity"]["rungs"] == [0.1111, 0.3333, 1.0]
    # One trial per configuration, and the budget counts configurations.
    assert len(rows) == 14 and all(t.state in ("complete", "pruned") for t in rows)
    fidelities = {t.number: t.fidelity for t in rows}
    assert set(fidelities.values()) <= {0.1111, 0.3333, 1.0}
    assert any(f < 1.0 for f in fidelities.values())
    # Without in-fold pruning every pruned trial was stopped on a subsample.
    assert all(t.fidelity < 1.0 for t in rows if t.state == "pruned")
    assert all(t.score is None for t in rows if t.fidelity < 1.0)
    # Only trials on all the rows are ranked; the model is one of them.
    assert total == len(board) == sum(t.state == "complete" for t in rows)
    assert all(t.fidelity == 1.0 for t in board)
    assert fidelities[model.trial_number] == 1.0
    # Progress counts finished trials by the share of the rows they reached.
    by_fidelity = out.progress.trials_by_fidelity
    assert sum(by_fidelity.values()) == 14 == out.progress.trials_completed + \
        out.progress.trials_pruned
    for key, share in (("0.1111", 0.1111), ("0.3333", 0.3333), ("1", 1.0)):
        assert by_fidelity.get(key, 0) == sum(t.fidelity == share for t in rows)


def test_small_tables_report_every_trial_on_all_rows(tmp_path: Path, monkeypatch) -> None:
    # The drift reference counts at most SAMPLE_ROWS training rows (50,000; lowered here).
    monkeypatch.setattr(sampling, "SAMPLE_ROWS", 100)
    url, job_id = _run(tmp_path, 300, budget={"trials": 4}, pruner="none")
    rows = trials(url, job_id)
    with session_scope(url) as session:
        job = session.get(Job, job_id)
        assert job.status == "succeeded", job.error
        out = to_out(job)
        assert job.spec["effective"]["fidelity"]["rungs"] == [1.0]
        search_rows = job.spec["effective"]["rows"]["search"]
        reference = session.get(Model, job.model_id).details["drift_reference"]
    assert [t.fidelity for t in rows] == [1.0] * 4
    assert out.progress.trials_by_fidelity == {"1": 4}
    assert (reference["rows"], reference["sampled_from"]) == (100, search_rows)
    for feature in reference["features"]:
        assert sum(feature["counts"]) == 100

"""The ``num_threads`` job option: what a real in-process worker hands LightGBM per trial."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import pytest

from service.db import session_scope
from service.settings import Settings
from service.tables import Job
from service.worker.process import Worker
from tests.service.jobkit import add_dataset, add_job
from tuner.objective import CVObjective

CASES = [
    # (job fields, cores, LightGBM threads each CV fold got)
    ({}, 2, {1}),  # the default on a small table: a trial per core, one thread each
    ({"reproducible": True}, 2, {1}),  # one trial at a time, one thread
    ({"max_parallel_trials": 2}, 2, {1}),  # two trials split the two threads
    ({"max_parallel_trials": 1, "num_threads": 2}, 2, {2}),  # one trial, both cores
    ({"max_parallel_trials": 1, "num_threads": 4}, 2, {2}),  # never more than the cores
    ({"max_parallel_trials": 2, "num_threads": 4}, 4, {2}),  # 4 threads over 2 trials
]


@pytest.mark.parametrize(("fields", "cores", "threads"), CASES)
def test_worker_gives_each_trial_its_share_of_threads(tmp_path: Path, monkeypatch,
                                                      fields: dict[str, Any], cores: int,
                                                      threads: set[int]) -> None:
    home = tmp_path / "home"
    url = f"sqlite:///{tmp_path / 'gk.db'}"
    job_id = add_job(url, home, add_dataset(url, home, n_rows=150), budget={"trials": 3},
                     pruner="none", **fields)
    seen: set[int] = set()
    original = CVObjective._fit_fold

    def spy(self: CVObjective, params: dict[str, Any], fold: Any, *rest: Any) -> Any:
        seen.add(params["num_threads"])
        return original(self, params, fold, *rest)

    monkeypatch.setattr(CVObjective, "_fit_fold", spy)
    monkeypatch.setattr(os, "cpu_count", lambda: cores)
    assert Worker(Settings(home=home, database_url=url)).run_once()
    with session_scope(url) as session:
        job = session.get(Job, job_id)
        assert job.status == "succeeded", job.error
        effective = job.spec["effective"]
    assert seen == threads
    # The effective spec records what was asked for (the worker caps it to its cores),
    # or, when nothing was, what the worker chose: every core.
    if not fields:
        assert effective["parallelism"] == "machine"
        assert (effective["max_parallel_trials"], effective["num_threads"]) == (cores, cores)
    else:
        assert effective["num_threads"] == fields.get("num_threads",
                                                      fields.get("max_parallel_trials", 1))

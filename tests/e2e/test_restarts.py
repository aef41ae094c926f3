"""Restarting the API mid-job and stopping ``serve`` with SIGTERM, on SQLite and on the real
PostgreSQL: real ``grovekeeper serve`` processes on loopback ports."""

from __future__ import annotations

import os
from pathlib import Path
from typing import Any

import httpx
import pytest

from examples.demo_data import kilns
from tests.conftest import Server, wait_for_job
from tests.service.jobkit import FAST, finished, job_row, participants, wait_until, workers

pytestmark = pytest.mark.e2e


def _submit(server: Server, budget: dict[str, float]) -> str:
    frame = kilns(n_rows=300, seed=2)
    with server.client() as client:
        dataset = client.post("/v1/datasets", params={"name": "kilns"},
                              content=frame.to_csv(index=False).encode(),
                              headers={"Content-Type": "text/csv"}).json()
        response = client.post("/v1/jobs", json={
            "dataset_id": dataset["id"], "target": "defect", "exclude": ["firing_id"],
            "cv": {"folds": 3}, "budget": budget})
        assert response.status_code == 202, response.text
        return response.json()["id"]


def _all_trials(client: httpx.Client, job_id: str) -> list[dict[str, Any]]:
    """Every trial, page by page (a page holds at most 100)."""
    items: list[dict[str, Any]] = []
    params: dict[str, str] = {}
    while True:
        page = client.get(f"/v1/jobs/{job_id}/trials", params=params).json()
        items += page["items"]
        if page["next"] is None:
            return items
        params = {"cursor": page["next"]}


def test_api_restart_mid_job_loses_nothing(db_url: str, tmp_path: Path) -> None:
    home = tmp_path / "home"
    api = Server(home=home, db_url=db_url, workers=0, extra_env=FAST).start()
    try:
        # A time budget: the job outlasts the API's stop and restart however fast trials
        # run (a restart takes a few seconds; 40 s leaves room on a busy machine).
        job_id = _submit(api, {"seconds": 40})
        with workers(home, db_url) as pool:
            pool.start(1)
            wait_until(lambda: len(finished(db_url, job_id)) >= 2, 120, "2 finished trials",
                       pool.logs)
            with api.client() as client:
                seen = _all_trials(client, job_id)
            api.stop()
            assert job_row(db_url, job_id).status == "running"  # the worker carries on
            api = Server(home=home, db_url=db_url, workers=0, extra_env=FAST).start()
            with api.client() as client:
                job = wait_for_job(client, job_id, timeout=180)
                after = {t["number"]: t for t in _all_trials(client, job_id)}
    finally:
        api.stop()
    assert job["status"] == "succeeded" and job["attempts"] == 1, job
    assert job["progress"]["trials_completed"] + job["progress"]["trials_pruned"] == len(
        [t for t in after.values() if t["state"] in ("complete", "pruned")])
    for trial in seen:
        if trial["state"] in ("complete", "pruned"):
            assert after[trial["number"]] == trial


def test_sigterm_to_serve_stops_its_workers_and_releases_the_job(db_url: str,
                                                                 tmp_path: Path) -> None:
    home = tmp_path / "home"
    server = Server(home=home, db_url=db_url, workers=1, extra_env=FAST).start()
    try:
        job_id = _submit(server, {"trials": 500})
        wait_until(lambda: len(finished(db_url, job_id)) >= 1, 120, "a finished trial",
                   server.log)
        worker_pid = int(job_row(db_url, job_id).worker_id.rsplit(":", 1)[1])
    finally:
        server.stop()
    assert server.proc is not None and server.proc.returncode == 0, server.log()
    assert not os.path.exists(f"/proc/{worker_pid}")  # the worker exited with serve
    job = job_row(db_url, job_id)
    assert job.status == "queued" and job.worker_id is None, server.log()
    assert participants(db_url, job_id) == []
    assert len(finished(db_url, job_id)) >= 1  # its finished trials are kept for the resume

"""A worker cut off from PostgreSQL by a real network partition, long enough that its job
is handed to another worker, then let back: fencing keeps it from writing over its
successor. The cut-off worker runs in its own network namespace and reaches the database
through a veth pair and a small TCP proxy on addresses the test creates and removes."""

from __future__ import annotations

import subprocess
import sys
import time
from datetime import UTC, datetime
from pathlib import Path

import pytest
import sqlalchemy as sa

import tuner
from service.db import session_scope
from service.tables import Model
from tests.conftest import ROOT, child_env
from tests.faults.kit import TcpProxy, can_make_namespaces, namespace
from tests.service.jobkit import (
    add_dataset,
    add_job,
    finished,
    job_row,
    trials,
    wait_until,
    workers,
)

pytestmark = [pytest.mark.e2e, pytest.mark.partition,
              pytest.mark.skipif(not can_make_namespaces(), reason="needs root and ip")]

STALE = 4.0
ENV = {"GROVEKEEPER_STALE_AFTER_SECONDS": str(STALE), "GROVEKEEPER_HEARTBEAT_SECONDS": "0.5",
       "GROVEKEEPER_POLL_SECONDS": "0.2"}
# Longer than the stale timeout plus the trial grace period (the same few seconds) and
# the client's 10 s give-up on unacknowledged data: the job is surely someone else's.
CUT_SECONDS = 16.0


@pytest.fixture
def pg_url(tmp_path: Path):  # type: ignore[no-untyped-def]
    from tests.conftest import fresh_database

    with fresh_database("postgres", tmp_path) as url:
        yield url


def test_partitioned_lead_is_fenced_off_and_the_job_ends_with_one_model(
        pg_url: str, tmp_path: Path) -> None:
    home = tmp_path / "home"
    job_id = add_job(pg_url, home, add_dataset(pg_url, home), budget={"trials": 40})
    with namespace() as ns:
        proxy = TcpProxy(ns.host_address, ("127.0.0.1", 5432))
        inner_url = pg_url.replace("127.0.0.1:5432", f"{ns.host_address}:{proxy.port}")
        assert inner_url != pg_url
        log_path = tmp_path / "cut-worker.log"
        with open(log_path, "ab") as log:
            cut_worker = subprocess.Popen(
                ns.command([sys.executable, "-m", "service", "worker"]),
                env=child_env(home, inner_url, **ENV), stdout=log, stderr=subprocess.STDOUT,
                cwd=ROOT)

        def cut_log() -> str:
            return log_path.read_text(errors="replace")

        try:
            wait_until(lambda: len(finished(pg_url, job_id)) >= 3, 180,
                       "3 trials from the worker in the namespace", cut_log)
            first = job_row(pg_url, job_id)
            assert first.worker_id.endswith(f":{cut_worker.pid}") and first.epoch == 1
            with workers(home, pg_url, **ENV) as pool:
                pool.start(1)
                time.sleep(1.0)  # the second worker is idle: the job allows one worker
                ns.cut()
                cut_at = datetime.now(UTC)
                try:
                    successor = wait_until(
                        lambda: (j := job_row(pg_url, job_id)).epoch == 2 and j, 60,
                        "the job to be claimed again", pool.logs)
                    time.sleep(max(0.0, CUT_SECONDS - (datetime.now(UTC) - cut_at)
                                   .total_seconds()))
                finally:
                    ns.heal()
                job = wait_until(lambda: (j := job_row(pg_url, job_id)).status
                                 in ("succeeded", "failed") and j, 300,
                                 "the job to finish", lambda: pool.logs() + cut_log())
                # The cut-off worker came back and abandoned the job; give its late
                # writes time to arrive (and be refused).
                wait_until(lambda: "abandons it untouched" in cut_log()
                           or "refused the late" in cut_log()
                           or "refused by its fence" in cut_log(), 60,
                           "the cut-off worker to notice it lost the job", cut_log)
                time.sleep(2.0)
                assert cut_worker.poll() is None, cut_log()  # it never exits
                logs = pool.logs()
        finally:
            cut_worker.terminate()
            try:
                cut_worker.wait(timeout=60)
            except subprocess.TimeoutExpired:
                cut_worker.kill()
            proxy.close()
    assert job.status == "succeeded", (job.error, logs[-3000:], cut_log()[-3000:])
    assert job.worker_id == successor.worker_id != first.worker_id
    assert job.epoch == 2 and job.attempts == 2
    with session_scope(pg_url) as session:
        models = session.scalars(sa.select(Model).where(Model.job_id == job_id)).all()
        assert len(models) == 1 and job.model_id == models[0].id
    assert [p.name for p in (home / "models").iterdir()] == [f"{job.model_id}.txt"]
    rows = trials(pg_url, job_id)
    assert sorted(t.number for t in rows) == list(range(len(rows)))  # unique, no gaps
    # Nothing the cut-off worker recorded is later than the cut: its late copies were
    # refused (and said so in its log).
    mine = [t for t in rows if t.worker_id == first.worker_id]
    assert mine and all(t.finished_at <= cut_at for t in mine)
    text = cut_log()
    assert "refused the late" in text or "abandons it untouched" in text, text[-3000:]
    # Optuna's own record, the trial journal, agrees with our copy: no trial the cut-off
    # worker started or finished after the cut went in (its appends are fenced too, and
    # say so when it tried), and nothing is left running.
    journal = {r.number: r.state
               for r in tuner.load_trial_records(pg_url, f"grovekeeper-{job_id}")}
    assert journal == {t.number: t.state for t in rows}
    assert "running" not in journal.values()

"""A bounded load test on a real ``grovekeeper serve`` (SQLite, one worker).

16 clients for 12 s mix predictions, uploads and leaderboard reads while a job runs. Every
request must succeed, the server log must never say "database is locked", and every
upload must read back with the digest and row count it was created with.
"""

from __future__ import annotations

import hashlib
import threading
import time
from collections import Counter
from collections.abc import Iterator

import pandas as pd
import pytest

from examples.demo_data import kilns
from tests.conftest import Server, wait_for_job

CLIENTS = 16
SECONDS = 12.0


@pytest.fixture
def busy_server(tmp_path) -> Iterator[Server]:  # type: ignore[no-untyped-def]
    srv = Server(home=tmp_path / "home", workers=1).start()
    try:
        yield srv
    finally:
        srv.stop()


@pytest.mark.e2e
def test_mixed_load_while_a_job_runs(busy_server: Server) -> None:
    frame = kilns(n_rows=200, seed=5)
    with busy_server.client() as client:
        ds = client.post("/v1/datasets", content=frame.to_csv(index=False).encode(),
                         headers={"Content-Type": "text/csv"}).json()["id"]
        first = client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                               "budget": {"trials": 2}, "cv": {"folds": 2}})
        model_id = wait_for_job(client, first.json()["id"], timeout=120)["model_id"]
        # The job that runs during the load: stopped by its time budget, not by trials.
        running = client.post("/v1/jobs", json={
            "dataset_id": ds, "target": "defect", "budget": {"trials": 100_000,
                                                             "seconds": SECONDS + 5}}).json()
    rows = frame.drop(columns=["defect"]).head(20).to_dict(orient="records")
    rows = [{k: None if pd.isna(v) else (v.item() if hasattr(v, "item") else v)
             for k, v in r.items()} for r in rows]
    stop = time.monotonic() + SECONDS
    outcomes: Counter[str] = Counter()
    failures: list[str] = []
    uploads: list[tuple[str, str, int]] = []
    lock = threading.Lock()

    def client_loop(n: int) -> None:
        try:
            requests(n)
        except Exception as exc:  # noqa: BLE001 - a dropped connection is a failure too
            with lock:
                failures.append(f"client {n}: {exc!r}")

    def requests(n: int) -> None:
        i = 0
        with busy_server.client() as client:
            while time.monotonic() < stop:
                kind = ("predict", "upload", "leaderboard")[(n + i) % 3]
                i += 1
                if kind == "predict":
                    r = client.post(f"/v1/models/{model_id}/predictions", json={"rows": rows})
                    good = r.status_code == 200 and len(r.json()["predictions"]) == len(rows)
                elif kind == "upload":
                    body = frame.sample(n=30, random_state=n * 1000 + i).to_csv(
                        index=False).encode()
                    r = client.post("/v1/datasets", params={"name": f"load-{n}-{i}"},
                                    content=body, headers={"Content-Type": "text/csv"})
                    good = r.status_code == 201
                    if good:
                        with lock:
                            uploads.append((r.json()["id"], hashlib.sha256(body).hexdigest(), 30))
                else:
                    r = client.get(f"/v1/jobs/{running['id']}/leaderboard", params={"limit": 5})
                    good = r.status_code == 200
                with lock:
                    outcomes[f"{kind} {r.status_code}"] += 1
                    if not good:
                        failures.append(f"{kind}: {r.status_code} {r.text[:200]}")

    threads = [threading.Thread(target=client_loop, args=(n,)) for n in range(CLIENTS)]
    for t in threads:
        t.start()
    for t in threads:
        t.join(timeout=SECONDS + 60)
    assert not any(t.is_alive() for t in threads)
    print(f"load: {dict(outcomes)} in {SECONDS} s with {CLIENTS} clients")  # noqa: T201
    assert failures == [], failures[:5]
    assert sum(outcomes.values()) > CLIENTS * 3  # the load really happened
    with busy_server.client() as client:
        job = client.get(f"/v1/jobs/{running['id']}").json()
        assert job["status"] in ("running", "succeeded"), job
        assert job["progress"]["trials_completed"] >= 1  # the job made progress meanwhile
        client.post(f"/v1/jobs/{running['id']}/cancel")
        for dataset_id, sha, n_rows in uploads:
            got = client.get(f"/v1/datasets/{dataset_id}")
            assert got.status_code == 200, got.text
            assert got.json()["sha256"] == sha and got.json()["rows"] == n_rows
    assert "database is locked" not in busy_server.log()

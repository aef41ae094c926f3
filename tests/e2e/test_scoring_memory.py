"""Batch scoring holds a chunk, not the table: a fresh worker process's peak memory
barely moves when the table grows tenfold, to a million rows."""

from __future__ import annotations

import time
from pathlib import Path

import pandas as pd
import pyarrow.parquet as pq
import pytest

from examples.demo_data import kilns
from service import repository
from service.db import session_scope
from service.settings import Settings
from service.storage import ArtifactStore, sha256_file
from tests.conftest import Server, wait_for_job
from tests.service.jobkit import workers

pytestmark = pytest.mark.e2e
CHUNK = 20_000


def peak_rss_mb(pid: int) -> float:
    for line in Path(f"/proc/{pid}/status").read_text().splitlines():
        if line.startswith("VmHWM:"):  # the process's peak resident memory
            return int(line.split()[1]) / 1024
    raise AssertionError("no VmHWM")


def store_table(url: str, home: Path, frame: pd.DataFrame) -> str:
    settings = Settings(home=home, database_url=url)
    store = ArtifactStore(settings.artifacts_url, settings.tmp_dir)
    dataset_id = repository.new_id("ds")
    key = f"datasets/{dataset_id}.parquet"
    with store.temp_path(".parquet") as tmp:
        frame.to_parquet(tmp, index=False, row_group_size=CHUNK)
        sha = sha256_file(tmp)
        store.put(tmp, key)
    columns = [{"name": c} for c in frame.columns]
    with session_scope(url) as session:
        repository.add_dataset(session, id=dataset_id, name="big", rows=len(frame),
                               n_columns=frame.shape[1], size_bytes=1, sha256=sha,
                               source_format="parquet", columns=columns, warnings=[],
                               file_key=key, file_sha256=sha)
    return dataset_id


def big_table(n: int) -> pd.DataFrame:
    base = kilns(n_rows=10_000, seed=3).drop(columns=["defect"])
    frame = pd.concat([base] * (n // len(base)), ignore_index=True)
    frame["firing_id"] = [f"F-{k:08d}" for k in range(len(frame))]
    return frame


@pytest.mark.skipif(not Path("/proc/self/status").exists(), reason="needs /proc")
def test_worker_peak_memory_stays_flat_as_rows_grow(tmp_path: Path) -> None:
    home = tmp_path / "home"
    url = f"sqlite:///{tmp_path / 'grovekeeper.db'}"
    server = Server(home=home, db_url=url, workers=1).start()
    try:
        with server.client() as client:
            body = kilns(n_rows=300, seed=1).to_csv(index=False).encode()
            ds = client.post("/v1/datasets", content=body,
                             headers={"Content-Type": "text/csv"}).json()["id"]
            job = client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                                "exclude": ["firing_id"],
                                                "budget": {"trials": 2},
                                                "cv": {"folds": 3}}).json()
            model_id = wait_for_job(client, job["id"])["model_id"]
    finally:
        server.stop()
    peaks, table_mb = {}, {}
    for n in (100_000, 1_000_000):
        frame = big_table(n)
        table_mb[n] = frame.memory_usage(deep=True).sum() / 2**20
        dataset_id = store_table(url, home, frame)
        del frame
        with session_scope(url) as session:
            scoring_id = repository.add_scoring(
                session, id=repository.new_id("scr"), model_id=model_id, channel=None,
                dataset_id=dataset_id, keep=["firing_id"], unseen="error", rows_total=n).id
        with workers(home, url, GROVEKEEPER_SCORING_CHUNK_ROWS=str(CHUNK)) as pool:
            (proc,) = pool.start(1)
            deadline = time.monotonic() + 600
            while True:
                with session_scope(url) as session:
                    run = repository.get_scoring(session, scoring_id)
                    status, done = run.status, run.rows_done
                if status in ("succeeded", "failed", "cancelled"):
                    break
                assert time.monotonic() < deadline, pool.logs()[-3000:]
                time.sleep(0.5)
            peaks[n] = peak_rss_mb(proc.pid)
        assert status == "succeeded", pool.logs()[-3000:]
        assert done == n
        with session_scope(url) as session:
            key = repository.get_scoring(session, scoring_id).result_key
        settings = Settings(home=home, database_url=url)
        result = ArtifactStore(settings.artifacts_url, settings.tmp_dir).local_path(key)
        assert pq.ParquetFile(result).metadata.num_rows == n
    grown = peaks[1_000_000] - peaks[100_000]
    extra_table = table_mb[1_000_000] - table_mb[100_000]
    print(f"peak RSS MB: {peaks}; table in pandas MB: {table_mb}")
    # Holding the table would add its whole size; a chunked run adds next to nothing.
    assert grown < 0.4 * extra_table, (peaks, table_mb)

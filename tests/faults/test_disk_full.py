"""A full disk under the artifact folder (a small tmpfs mounted as the home, the database
beside it), and a crash mid-upload: real API servers and worker processes."""

from __future__ import annotations

import contextlib
import errno
import os
import signal
import socket
import time
from pathlib import Path

import pytest

from examples.demo_data import kilns
from service.settings import Settings
from tests.conftest import Server
from tests.faults.kit import tmpfs
from tests.service.conftest import live_api
from tests.service.jobkit import add_dataset, add_job, job_row, wait_until, workers

pytestmark = [pytest.mark.e2e]
root_only = pytest.mark.skipif(os.geteuid() != 0, reason="mounting a tmpfs needs root")


def fill(folder: Path) -> Path:
    """Write a file until the file system is full; returns it (delete it to free space)."""
    filler = folder / "filler.bin"
    block = b"\0" * 65536
    with open(filler, "wb") as fh:
        try:
            while True:
                fh.write(block)
                fh.flush()
        except OSError as exc:
            assert exc.errno == errno.ENOSPC, exc
    return filler


def leftovers(home: Path) -> list[str]:
    """Files under the home other than the filler: partial uploads, temp files, models."""
    return sorted(str(p.relative_to(home)) for p in home.rglob("*")
                  if p.is_file() and p.name != "filler.bin")


@root_only
@pytest.mark.disk_full
def test_upload_on_a_full_disk_is_507_leaves_nothing_and_works_once_freed(
        db_url: str, tmp_path: Path) -> None:
    body = kilns(n_rows=3000, seed=4).to_csv(index=False).encode()
    with tmpfs(tmp_path / "home", "4m") as home:
        settings = Settings(home=home, database_url=db_url)
        with live_api(settings) as api, api.client() as client:
            filler = fill(home)
            r = client.post("/v1/datasets", params={"name": "kilns"}, content=body,
                            headers={"Content-Type": "text/csv"})
            assert r.status_code == 507, r.text
            assert r.headers["content-type"].startswith("application/problem+json")
            problem = r.json()
            assert problem["code"] == "disk_full" and "disk space" in problem["detail"]
            assert str(home) not in r.text  # no internal paths
            assert leftovers(home) == []  # no partial file
            listed = client.get("/v1/datasets").json()
            assert listed.get("total", listed.get("count")) == 0  # and no row
            filler.unlink()
            r = client.post("/v1/datasets", params={"name": "kilns"}, content=body,
                            headers={"Content-Type": "text/csv"})
            assert r.status_code == 201, r.text
            assert leftovers(home) == [f"datasets/{r.json()['id']}.parquet"]


@root_only
@pytest.mark.disk_full
def test_model_save_on_a_full_disk_fails_the_job_in_words_and_the_next_job_succeeds(
        db_url: str, tmp_path: Path) -> None:
    with tmpfs(tmp_path / "home", "4m") as home:
        dataset_id = add_dataset(db_url, home)
        first = add_job(db_url, home, dataset_id, budget={"trials": 3})
        filler = fill(home)
        with workers(home, db_url) as pool:
            pool.start(1)
            job = wait_until(lambda: (j := job_row(db_url, first)).status
                             in ("succeeded", "failed") and j, 240, "the job to end",
                             pool.logs)
            assert job.status == "failed", pool.logs()[-3000:]
            assert job.error == "disk full while saving the model"
            assert job.model_id is None
            assert leftovers(home) == [f"datasets/{dataset_id}.parquet"]  # no partial model
            filler.unlink()
            second = add_job(db_url, home, dataset_id, budget={"trials": 3})
            job = wait_until(lambda: (j := job_row(db_url, second)).status
                             in ("succeeded", "failed") and j, 240, "the next job",
                             pool.logs)
        assert job.status == "succeeded", (job.error, pool.logs()[-3000:])
        assert leftovers(home) == sorted([f"datasets/{dataset_id}.parquet",
                                          f"models/{job.model_id}.txt"])


def test_temp_files_of_an_upload_cut_by_kill_9_are_swept_at_the_next_start(
        tmp_path: Path) -> None:
    home = tmp_path / "home"
    server = Server(home=home, workers=0).start()
    temp = home / "tmp"
    row = b"1240,raku,0.5,0\n"
    try:
        with socket.create_connection(("127.0.0.1", server.port)) as conn:
            conn.sendall(b"POST /v1/datasets?name=big HTTP/1.1\r\nHost: 127.0.0.1\r\n"
                         b"Content-Type: text/csv\r\nContent-Length: 200000000\r\n\r\n"
                         b"peak_temp_c,clay_body,glaze_mm,defect\n")
            deadline = time.monotonic() + 60
            while not any(p.stat().st_size > 1_000_000 for p in temp.glob("gk-*")):
                assert time.monotonic() < deadline, "no temporary upload file appeared"
                conn.sendall(row * 20000)
            assert server.proc is not None
            os.kill(server.proc.pid, signal.SIGKILL)
            server.proc.wait()
            with contextlib.suppress(OSError):
                conn.sendall(row * 1000)
        server.stop()  # already dead: closes its log
        left = list(temp.glob("gk-*"))
        assert left, "the crash left no temporary file: nothing to sweep"
        server = Server(home=home, workers=0).start()
        assert list(temp.glob("gk-*")) == []
        assert "removed 1 temporary file(s) left by a crash" in server.log()
    finally:
        server.stop()

"""What the service writes back: CSV answers, plots, headers, failure messages, files.

One small real job whose column names and class labels are hostile: a label that a
spreadsheet would run as a formula, a column named like matplotlib math text, and
prediction inputs whose extra column names no HTTP header can carry raw.
"""

from __future__ import annotations

import csv
import io
import stat
import subprocess
import sys
from collections.abc import Iterator
from pathlib import Path
from urllib.parse import unquote

import numpy as np
import pandas as pd
import pytest

from tests.conftest import ROOT, Server, child_env, wait_for_job

pytestmark = pytest.mark.e2e
FORMULA = '=HYPERLINK("http://attacker.invalid","open")'
MATH = "$\\foo$"
TARGET = "@label"


def _table(n: int = 240, seed: int = 4) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    glaze = rng.normal(0, 1, n)
    temp = rng.normal(1200, 30, n)
    label = np.where(glaze + 0.02 * (temp - 1200) + rng.normal(0, 0.5, n) > 0, FORMULA, "sound")
    return pd.DataFrame({MATH: glaze, "peak_temp_c": temp, TARGET: label})


@pytest.fixture(scope="module")
def hostile_job(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Server, dict]]:
    server = Server(home=tmp_path_factory.mktemp("out") / "home", workers=1).start()
    try:
        with server.client() as client:
            up = client.post("/v1/datasets", params={"name": "-SUM(A1)"},
                             content=_table().to_csv(index=False).encode(),
                             headers={"Content-Type": "text/csv"})
            assert up.status_code == 201, up.text
            job = client.post("/v1/jobs", json={"dataset_id": up.json()["id"],
                                                "target": TARGET, "budget": {"trials": 3}})
            assert job.status_code == 202, job.text
            done = wait_for_job(client, job.json()["id"])
        assert done["status"] == "succeeded", (done, server.log())
        yield server, done
    finally:
        server.stop()


def _rows(text: str) -> list[list[str]]:
    return list(csv.reader(io.StringIO(text)))


def test_csv_answers_neutralise_formula_text(hostile_job: tuple[Server, dict]) -> None:
    server, job = hostile_job
    body = "peak_temp_c,$\\foo$\n1200,3.0\n1200,-3.0\n"
    with server.client() as client:
        got = client.post(f"/v1/models/{job['model_id']}/predictions", content=body,
                          headers={"Content-Type": "text/csv"})
        assert got.status_code == 200, got.text
        rows = _rows(got.text)
        labels = {r[0] for r in rows[1:]}
        assert labels == {"'" + FORMULA, "sound"}  # the formula label, defused
        assert not any(cell.startswith(("=", "+", "@")) for row in rows for cell in row)
        # The JSON answer carries the label exactly: only spreadsheets need the apostrophe.
        js = client.post(f"/v1/models/{job['model_id']}/predictions",
                         json={"rows": [{"peak_temp_c": 1200, MATH: 3.0}]}).json()
        assert js["predictions"] == [FORMULA]

        datasets = _rows(client.get("/v1/datasets", params={"format": "csv"}).text)
        assert datasets[1][1] == "'-SUM(A1)"
        assert datasets[1][2] == "240"  # numbers untouched
        jobs = _rows(client.get("/v1/jobs", params={"format": "csv"}).text)
        header = jobs[0]
        assert jobs[1][header.index("target")] == "'" + TARGET


def test_math_text_column_names_plot(hostile_job: tuple[Server, dict]) -> None:
    server, job = hostile_job
    with server.client() as client:
        features = client.get(f"/v1/jobs/{job['id']}/plots/features.svg")
        assert features.status_code == 200, features.text
        assert MATH in features.text  # drawn as the literal name, not parsed as math
        for name in ("history", "hyperparameters", "learning", "calibration"):
            assert client.get(f"/v1/jobs/{job['id']}/plots/{name}.svg").status_code == 200
        assert client.get(f"/v1/jobs/{job['id']}/report").status_code == 200


def test_ignored_columns_header_carries_any_name(hostile_job: tuple[Server, dict]) -> None:
    server, job = hostile_job
    extra = ["Größe™", "日本語", "tab\there", "a,b", "%41", "plain"]
    frame = pd.DataFrame({"peak_temp_c": [1200.0], MATH: [0.5],
                          **{name: ["x"] for name in extra}})
    with server.client() as client:
        got = client.post(f"/v1/models/{job['model_id']}/predictions",
                          content=frame.to_csv(index=False).encode(),
                          headers={"Content-Type": "text/csv"})
        assert got.status_code == 200, got.text
        raw = got.headers["x-ignored-columns"]
        assert raw.isascii() and "\r" not in raw and "\n" not in raw
        assert [unquote(n) for n in raw.split(",")] == extra
        # A line break inside a quoted header name is refused by the CSV reader itself;
        # either way it never reaches a header, and it is never a server error.
        broken = frame.rename(columns={"plain": "line\r\nbreak"})
        got = client.post(f"/v1/models/{job['model_id']}/predictions",
                          content=broken.to_csv(index=False).encode(),
                          headers={"Content-Type": "text/csv"})
        assert got.status_code < 500, got.text
        if got.status_code == 200:
            assert "\n" not in got.headers["x-ignored-columns"]


def test_data_folder_is_private(hostile_job: tuple[Server, dict]) -> None:
    server, _ = hostile_job
    home = server.home
    for folder in (home, home / "datasets", home / "models", home / "tmp"):
        assert stat.S_IMODE(folder.stat().st_mode) == 0o700, folder
    files = [p for p in home.rglob("*") if p.is_file()]
    assert any(p.name == "grovekeeper.db" for p in files)
    assert any(p.suffix == ".parquet" for p in files)
    for path in files:
        assert stat.S_IMODE(path.stat().st_mode) & 0o077 == 0, (path, oct(path.stat().st_mode))


def test_failure_message_names_the_cause_without_paths(tmp_path: Path) -> None:
    home = tmp_path / "secret-place" / "home"
    home.parent.mkdir()
    server = Server(home=home, workers=0).start()
    worker_log = tmp_path / "worker.log"
    worker = None
    try:
        with server.client() as client:
            up = client.post("/v1/datasets", params={"name": "kilns"},
                             content=_table().to_csv(index=False).encode(),
                             headers={"Content-Type": "text/csv"})
            job = client.post("/v1/jobs", json={"dataset_id": up.json()["id"],
                                                "target": TARGET, "budget": {"trials": 2}})
            assert job.status_code == 202, job.text
            # The stored table disappears after the job was accepted: the worker fails
            # on a file error whose own text holds the full path.
            for path in (home / "datasets").glob("*.parquet"):
                path.unlink()
            with open(worker_log, "wb") as log:
                worker = subprocess.Popen([sys.executable, "-m", "service", "worker"],
                                          env=child_env(home), cwd=ROOT, stdout=log,
                                          stderr=subprocess.STDOUT)
            done = wait_for_job(client, job.json()["id"], timeout=120)
    finally:
        if worker is not None:
            worker.terminate()
            worker.wait(timeout=60)
        server.stop()
    assert done["status"] == "failed"
    error = done["error"]
    assert "missing" in error
    assert "secret-place" not in error and "/" not in error, error
    assert "secret-place" in worker_log.read_text(errors="replace")  # the detail is logged

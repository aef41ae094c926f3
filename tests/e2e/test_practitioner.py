"""The practitioner's path against a real ``grovekeeper serve``: the client commands,
the SSE stream, /metrics, JSON logs, the bundle's standalone snippet and the walkthrough."""

from __future__ import annotations

import csv
import io
import json
import os
import re
import subprocess
import sys
import textwrap
import zipfile
from collections.abc import Iterator
from pathlib import Path

import httpx
import pandas as pd
import pytest
from prometheus_client.parser import text_string_to_metric_families

from examples.demo_data import kilns
from tests.conftest import ROOT, Server, child_env

pytestmark = pytest.mark.e2e
TRIALS = 5


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    # The shared fixture's server, with JSON-lines logs so the log test can parse them.
    home = tmp_path_factory.mktemp("gk") / "home"
    srv = Server(home=home, extra_env={"GROVEKEEPER_LOG_FORMAT": "json"}).start()
    try:
        yield srv
    finally:
        srv.stop()


@pytest.fixture(scope="module")
def table(tmp_path_factory: pytest.TempPathFactory) -> Path:
    path = tmp_path_factory.mktemp("data") / "kilns.csv"
    kilns(n_rows=400, seed=4).to_csv(path, index=False)
    return path


def gk(server: Server, *args: str, timeout: float = 300) -> subprocess.CompletedProcess[str]:
    """Run a client command as a user would, against ``server``."""
    env = child_env(server.home, GROVEKEEPER_URL=server.base)
    return subprocess.run([sys.executable, "-m", "service", *args], env=env, cwd=ROOT,
                          capture_output=True, text=True, timeout=timeout)


def metric_values(text: str) -> dict[tuple[str, tuple[tuple[str, str], ...]], float]:
    out = {}
    for family in text_string_to_metric_families(text):
        for sample in family.samples:
            out[(sample.name, tuple(sorted(sample.labels.items())))] = sample.value
    return out


def sse_events(client: httpx.Client, job_id: str) -> list[tuple[str, dict]]:
    events, kind, data = [], None, []
    with client.stream("GET", f"/v1/jobs/{job_id}/watch", params={"poll": 0.2},
                       timeout=300) as response:
        assert response.status_code == 200
        assert response.headers["content-type"].startswith("text/event-stream")
        for line in response.iter_lines():
            if line.startswith("event:"):
                kind = line.split(":", 1)[1].strip()
            elif line.startswith("data:"):
                data.append(line.split(":", 1)[1].strip())
            elif line == "" and kind is not None:
                events.append((kind, json.loads("\n".join(data))))
                kind, data = None, []
    return events


@pytest.fixture(scope="module")
def cli_job(server: Server, table: Path) -> dict:
    """upload and tune --wait through the client commands, as a script would."""
    up = gk(server, "upload", str(table), "--name", "kilns")
    assert up.returncode == 0, up.stderr
    dataset_id = up.stdout.strip()
    assert dataset_id.startswith("ds_") and "400 rows" in up.stderr
    tune = gk(server, "tune", dataset_id, "--target", "defect", "--trials", str(TRIALS),
              "--seed", "2", "--wait", "--interval", "0.2")
    assert tune.returncode == 0, tune.stderr + server.log()
    job_id = tune.stdout.strip()
    with server.client() as client:
        job = client.get(f"/v1/jobs/{job_id}").json()
    return {"dataset_id": dataset_id, "job": job, "tune_stderr": tune.stderr}


def test_tune_wait_prints_plain_progress_lines(cli_job: dict) -> None:
    job = cli_job["job"]
    assert job["status"] == "succeeded" and job["model_id"]
    lines = cli_job["tune_stderr"].splitlines()
    progress = [ln for ln in lines if " trials" in ln and "elapsed" in ln]
    assert progress, lines
    # stderr is a pipe here, not a terminal: plain lines, no carriage returns or bar.
    assert "\r" not in cli_job["tune_stderr"] and "[#" not in cli_job["tune_stderr"]
    assert f"/{TRIALS} trials" in progress[-1] and "succeeded" in progress[-1]
    assert lines[-1].startswith(f"{job['id']} succeeded")


def test_board_table_and_csv_parse(server: Server, cli_job: dict) -> None:
    job_id = cli_job["job"]["id"]
    with server.client() as client:
        board = client.get(f"/v1/jobs/{job_id}/leaderboard").json()
    shown = gk(server, "board", job_id)
    assert shown.returncode == 0, shown.stderr
    rows = [ln.split() for ln in shown.stdout.splitlines()]
    assert rows[0][:5] == ["rank", "trial", "roc_auc", "std", "rounds"]
    assert len(rows) - 1 == board["total"]
    assert [int(r[1]) for r in rows[1:]] == [r["number"] for r in board["items"]]
    widths = {len(ln) for ln in shown.stdout.splitlines()[1:]}
    assert len(widths) == 1  # aligned: every row has the same width
    as_csv = gk(server, "board", job_id, "--format", "csv", "--limit", "2")
    parsed = list(csv.DictReader(io.StringIO(as_csv.stdout)))
    assert [int(r["number"]) for r in parsed] == [r["number"] for r in board["items"][:2]]


def test_status_model_and_predict(server: Server, cli_job: dict, table: Path,
                                  tmp_path: Path) -> None:
    job = cli_job["job"]
    status = gk(server, "status", job["id"])
    fields = dict(ln.split(None, 1) for ln in status.stdout.splitlines())
    assert fields["model_id"] == job["model_id"] and fields["status"] == "succeeded"
    report = gk(server, "model", job["model_id"], "--format", "json")
    model = json.loads(report.stdout)
    assert model["id"] == job["model_id"] and "roc_auc" in model["holdout"]
    out = tmp_path / "predictions.csv"
    pred = gk(server, "predict", job["model_id"], str(table), "-o", str(out))
    assert pred.returncode == 0, pred.stderr
    ours = pd.read_csv(out)
    with server.client() as client:
        direct = client.post(f"/v1/models/{job['model_id']}/predictions",
                             content=table.read_bytes(), headers={"Content-Type": "text/csv"})
    theirs = pd.read_csv(io.StringIO(direct.text))
    assert len(ours) == 400
    pd.testing.assert_frame_equal(ours, theirs)
    to_stdout = gk(server, "predict", job["model_id"], str(table))
    pd.testing.assert_frame_equal(pd.read_csv(io.StringIO(to_stdout.stdout)), theirs)


@pytest.mark.parametrize("args, code, words", [
    (["tune", "ds_missing", "--target", "defect", "--trials", "2"], 4, "dataset_id"),
    (["board", "job_nope"], 4, "not_found"),
    (["predict", "mdl_nope", "no/such/file.csv"], 2, "no such file"),
    (["status", "job_x", "--url", "http://127.0.0.1:9"], 3, "cannot reach"),
])
def test_failures_exit_nonzero_with_one_line(server: Server, args: list[str], code: int,
                                             words: str) -> None:
    result = gk(server, *args)
    assert result.returncode == code, (result.stdout, result.stderr)
    assert result.stdout == ""
    assert len(result.stderr.strip().splitlines()) == 1 and words in result.stderr


def test_sse_metrics_and_logs_follow_a_real_job(server: Server, table: Path) -> None:
    with server.client() as client:
        before = metric_values(client.get("/metrics").text)
        dataset = client.post("/v1/datasets", params={"name": "k2"}, content=table.read_bytes(),
                              headers={"Content-Type": "text/csv"}).json()
        job = client.post("/v1/jobs", json={"dataset_id": dataset["id"], "target": "defect",
                                            "budget": {"trials": TRIALS}, "seed": 9}).json()
        events = sse_events(client, job["id"])  # opened at once: it follows the live job
        trials = client.get(f"/v1/jobs/{job['id']}/trials").json()["items"]
        final = client.get(f"/v1/jobs/{job['id']}").json()
        client.post(f"/v1/models/{final['model_id']}/predictions",
                    content=table.read_bytes(), headers={"Content-Type": "text/csv"})
        after = metric_values(client.get("/metrics").text)

    kinds = [k for k, _ in events]
    assert kinds[-1] == "status" and events[-1][1]["final"] is True
    assert events[-1][1]["status"] == "succeeded" == final["status"]
    assert kinds.count("status") >= 2 and events[0][0] == "status"
    trial_events = [d for k, d in events if k == "trial"]
    # Parallel trials (the machine's default on a small table) finish in any order.
    streamed = sorted((d["number"], d["state"]) for d in trial_events)
    assert streamed == [(t["number"], t["state"]) for t in trials]
    assert len(trials) == TRIALS
    assert all(not d["final"] for k, d in events[:-1] if k == "status")

    def rise(name: str, **labels: str) -> float:
        key = (name, tuple(sorted(labels.items())))
        return after.get(key, 0.0) - before.get(key, 0.0)

    done = {s: sum(t["state"] == s for t in trials) for s in ("complete", "pruned")}
    assert rise("grovekeeper_trials_total", state="complete") == done["complete"]
    assert rise("grovekeeper_trials_total", state="pruned") == done["pruned"]
    assert rise("grovekeeper_trial_duration_seconds_count") == TRIALS
    assert rise("grovekeeper_jobs", status="succeeded") == 1
    assert rise("grovekeeper_uploads_total", outcome="accepted") == 1
    assert rise("grovekeeper_upload_bytes_total") == table.stat().st_size
    assert rise("grovekeeper_prediction_seconds_count", format="csv", outcome="ok") == 1
    assert after[("grovekeeper_database_up", ())] == 1

    records = [json.loads(ln) for ln in server.log().splitlines() if ln.startswith("{")]
    ours = [r for r in records if r.get("job_id") == job["id"]]
    assert {r["trial"] for r in ours if "trial" in r} == {t["number"] for t in trials}
    assert any(r["message"].endswith("succeeded") for r in ours)


BLOCKER = textwrap.dedent("""
    import importlib.abc, runpy, sys
    class Block(importlib.abc.MetaPathFinder):
        def find_spec(self, name, path, target=None):
            if name.split(".")[0] in {"tuner", "service", "examples", "optuna", "sklearn"}:
                raise ImportError(f"the snippet must not need {name}")
    sys.meta_path.insert(0, Block())
    sys.argv = ["predict.py", *sys.argv[1:]]
    runpy.run_path(sys.argv[0], run_name="__main__")
""")


def test_bundle_snippet_reproduces_service_predictions(server: Server, cli_job: dict,
                                                       table: Path, tmp_path: Path) -> None:
    model_id = cli_job["job"]["model_id"]
    demo = kilns(n_rows=300, seed=21)  # rows the model never saw
    rows = tmp_path / "rows.csv"
    demo.to_csv(rows, index=False)
    with server.client() as client:
        bundle = client.get(f"/v1/models/{model_id}/bundle")
        served = client.post(f"/v1/models/{model_id}/predictions", content=rows.read_bytes(),
                             headers={"Content-Type": "text/csv"})
    assert bundle.headers["content-type"] == "application/zip"
    with zipfile.ZipFile(io.BytesIO(bundle.content)) as archive:
        names = set(archive.namelist())
        archive.extractall(tmp_path)
    folder = tmp_path / model_id
    for name in ("model.txt", "schema.json", "metrics.json", "params.json", "manifest.json",
                 "predict.py"):
        assert f"{model_id}/{name}" in names
    schema = json.loads((folder / "schema.json").read_text())
    assert any(f["kind"] == "categorical" and f["levels"] for f in schema["features"])
    manifest = json.loads((folder / "manifest.json").read_text())
    assert manifest["job"]["id"] == cli_job["job"]["id"]
    # -I: no PYTHONPATH, no user site, no current folder; the blocker refuses our packages.
    env = {k: v for k, v in os.environ.items() if not k.startswith(("PYTHON", "GROVEKEEPER"))}
    result = subprocess.run([sys.executable, "-I", "-c", BLOCKER, str(rows)], cwd=folder,
                            env=env, capture_output=True, text=True, timeout=120)
    assert result.returncode == 0, result.stderr
    ours = pd.read_csv(io.StringIO(result.stdout))
    theirs = pd.read_csv(io.StringIO(served.text))
    assert list(ours.columns) == list(theirs.columns) == ["prediction", "probability_0",
                                                          "probability_1"]
    assert (ours["prediction"] == theirs["prediction"]).all()
    # Same booster, same inputs: equal up to the CSV round trip of floats.
    pd.testing.assert_frame_equal(ours, theirs, check_exact=False, rtol=1e-12)


def test_walkthrough_script_runs(server: Server) -> None:
    env = child_env(server.home, GROVEKEEPER_URL=server.base, TRIALS="4",
                    PYTHON=sys.executable)
    result = subprocess.run(["bash", "examples/walkthrough.sh"], cwd=ROOT, env=env,
                            capture_output=True, text=True, timeout=300)
    assert result.returncode == 0, result.stdout + result.stderr
    out = result.stdout
    for step in range(1, 10):
        assert f"{step}. " in out
    assert "walkthrough finished" in out
    # A finished job's stream replays its trials, then the final status (uniq -c counts).
    assert re.search(r"^\s*4 event: trial$", out, re.M) and re.search(
        r"^\s*1 event: status$", out, re.M), out
    assert "grovekeeper_trials_total" in out and "probability_1" in out

"""CSV lists, OpenAPI examples, readiness and /metrics without a database, the README's
configuration table, and the progress line and ETA, on real servers without workers."""

from __future__ import annotations

import contextlib
import csv
import io
import re
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import pytest
import uvicorn
from prometheus_client.parser import text_string_to_metric_families

from client.progress import ProgressView
from client.settings import ClientSettings
from examples.demo_data import kilns
from service.api.app import create_app
from service.progress import eta_seconds
from service.settings import Settings
from tests.conftest import ROOT, free_port
from tests.service.conftest import LiveApi


def test_dataset_and_job_lists_answer_csv(api: LiveApi) -> None:
    body = kilns(n_rows=120, seed=1).to_csv(index=False).encode()
    with api.client() as client:
        made = [client.post("/v1/datasets", params={"name": f"k{i}"}, content=body,
                            headers={"Content-Type": "text/csv"}).json() for i in range(2)]
        job = client.post("/v1/jobs", json={"dataset_id": made[0]["id"], "target": "defect",
                                            "budget": {"trials": 3}}).json()
        as_json = client.get("/v1/datasets").json()
        as_csv = client.get("/v1/datasets", headers={"Accept": "text/csv"})
        jobs_csv = client.get("/v1/jobs", params={"format": "csv"})
        bad = client.get("/v1/jobs", params={"format": "xml"})
    assert as_json["total"] == 2
    assert as_csv.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(as_csv.text)))
    assert [r["id"] for r in rows] == [d["id"] for d in as_json["items"]]
    assert [int(r["rows"]) for r in rows] == [120, 120]
    jobs = list(csv.DictReader(io.StringIO(jobs_csv.text)))
    assert [(j["id"], j["status"], j["trials_budget"]) for j in jobs] == [
        (job["id"], "queued", "3")]
    assert bad.status_code == 422 and bad.json()["errors"][0]["field"] == "format"


def test_every_route_documents_request_and_response_examples(api: LiveApi) -> None:
    with api.client() as client:
        doc = client.get("/openapi.json").json()
    missing = []
    for path, operations in doc["paths"].items():
        for method, op in operations.items():
            for media, body in op.get("requestBody", {}).get("content", {}).items():
                if "example" not in body and "examples" not in body:
                    missing.append(f"{method} {path} request {media}")
            for status, response in op["responses"].items():
                for media, body in response.get("content", {}).items():
                    if "example" not in body and "examples" not in body:
                        missing.append(f"{method} {path} {status} {media}")
            # A deprecated path that only redirects (308) has no body to show.
            if not any(s.startswith("2") and op["responses"][s].get("content")
                       for s in op["responses"]) and method != "delete" \
                    and not op.get("deprecated"):
                missing.append(f"{method} {path}: no documented success body")
    assert missing == []
    assert "/v1/jobs/{job_id}/watch" in doc["paths"] and "/metrics" in doc["paths"]


@contextlib.contextmanager
def app_without_database(tmp_path: Path) -> Iterator[str]:
    # A PostgreSQL URL on a port nobody listens on: the database is unreachable.
    url = f"postgresql+psycopg://127.0.0.1:{free_port()}/nothing?connect_timeout=2"
    settings = Settings(home=tmp_path / "home", database_url=url)
    settings.ensure_dirs()
    port = free_port()
    server = uvicorn.Server(uvicorn.Config(create_app(settings, init=False), host="127.0.0.1",
                                           port=port, log_level="error"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started and time.monotonic() < deadline:
        time.sleep(0.02)
    try:
        yield f"http://127.0.0.1:{port}"
    finally:
        server.should_exit = True
        thread.join(timeout=10)


def test_readiness_and_metrics_when_the_database_is_unreachable(tmp_path: Path) -> None:
    import httpx

    from service.db import dispose_engines

    with app_without_database(tmp_path) as base:
        live = httpx.get(f"{base}/healthz", timeout=10)
        ready = httpx.get(f"{base}/readyz", timeout=10)
        metrics = httpx.get(f"{base}/metrics", timeout=10)
    dispose_engines()
    assert live.status_code == 200
    assert ready.status_code == 503
    assert ready.headers["content-type"] == "application/problem+json"
    assert ready.json()["code"] == "not_ready"
    assert metrics.status_code == 200
    samples = {s.name: s.value for f in text_string_to_metric_families(metrics.text)
               for s in f.samples}
    assert samples["grovekeeper_database_up"] == 0


def readme_config_rows() -> dict[str, tuple[str, str]]:
    text = (ROOT / "README.md").read_text()
    section = text.split("## Configuration", 1)[1].split("\n## ", 1)[0]
    rows = {}
    for line in section.splitlines():
        cells = [c.strip() for c in line.strip().strip("|").split("|")]
        if len(cells) == 4 and cells[0].startswith("`GROVEKEEPER_"):
            rows[cells[0].strip("`")] = (cells[1].strip("`"), cells[2].strip("`"))
    return rows


def test_readme_configuration_table_matches_the_settings() -> None:
    rows = readme_config_rows()
    fields = {**Settings.model_fields, **ClientSettings.model_fields}
    assert set(rows) == {f"GROVEKEEPER_{name.upper()}" for name in fields}
    for name, info in fields.items():
        _flag, default = rows[f"GROVEKEEPER_{name.upper()}"]
        if info.default is None:
            # No value of its own: the README says what stands in (derived, or none).
            assert default == "(none)" or "$GROVEKEEPER_HOME" in default, (name, default)
        elif info.default == "":
            assert default == "(empty)", (name, default)
        elif isinstance(info.default, Path):
            assert Path(default) == info.default, name
        else:
            assert type(info.default)(default) == info.default, (name, default)


def test_readme_has_the_concepts() -> None:
    section = (ROOT / "README.md").read_text().split("## Concepts", 1)[1].split("\n## ")[0]
    terms = re.findall(r"^- \*\*(.+?)\*\*", section, re.M)
    assert {"Dataset", "Job", "Trial", "Leaderboard", "Hold-out", "Model"} <= set(terms)


@pytest.mark.parametrize("status, elapsed, done, trials, seconds, expected", [
    ("queued", 0.0, 0, 40, None, None),
    ("running", 5.0, 0, 40, None, None),  # no pace yet
    ("running", 10.0, 5, 40, None, 70.0),  # 2 s per trial, 35 to go
    ("running", 10.0, 5, 40, 30.0, 20.0),  # the seconds budget ends it sooner
    ("running", 10.0, 0, None, 30.0, 20.0),
    ("succeeded", 10.0, 40, 40, None, 0.0),
])
def test_eta_from_the_pace_so_far(status: str, elapsed: float, done: int, trials: int | None,
                                  seconds: float | None, expected: float | None) -> None:
    assert eta_seconds(status=status, elapsed=elapsed, finished_trials=done,
                       trials_budget=trials, seconds_budget=seconds) == expected


def job_doc(done: int, status: str = "running") -> dict:
    return {"status": status, "metric": "roc_auc", "progress": {
        "trials_completed": done, "trials_pruned": 1, "trials_failed": 0,
        "trials_budget": 10, "best_score": 0.8123, "elapsed_seconds": 65.0,
        "eta_seconds": 30.0}}


def test_progress_line_redraws_on_a_terminal_and_prints_changes_elsewhere() -> None:
    tty, plain = io.StringIO(), io.StringIO()
    on_tty, off_tty = ProgressView(tty, tty=True), ProgressView(plain, tty=False)
    for view in (on_tty, off_tty):
        for job in (job_doc(3), job_doc(3), job_doc(4), job_doc(9, "succeeded")):
            view.update(job)
        view.close()
    assert tty.getvalue().count("\r\x1b[2K") == 4 and tty.getvalue().endswith("\n")
    assert "[############------------]  5/10 trials" in tty.getvalue()
    lines = plain.getvalue().splitlines()
    assert len(lines) == 3  # the repeated state printed once
    assert lines[0] == "4/10 trials  1 pruned  best roc_auc 0.8123  1:05 elapsed  ~0:30 left"
    assert lines[-1].endswith("succeeded")


def test_errors_are_one_short_line_for_a_terminal(api: LiveApi) -> None:
    with api.client() as client:
        missing = client.get("/v1/jobs/job_nope")
        invalid = client.get("/v1/jobs", params={"limit": 0})
    for response, code in ((missing, "not_found"), (invalid, "validation_error")):
        assert response.headers["content-type"] == "application/problem+json"
        # One line of JSON and a newline, so curl's output ends before the prompt.
        assert response.text.endswith("}\n") and response.text.count("\n") == 1
        assert response.json()["code"] == code and len(response.text) < 300
    assert invalid.json()["errors"][0]["field"] == "limit"

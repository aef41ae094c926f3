"""Every list pages the same way: walking `next` with a small `limit` gives each item once,
in the list's order, with the right `total`; a bad cursor is a 422 naming `cursor`; the
old stream path redirects to /watch. On SQLite and PostgreSQL, against a real server."""

from __future__ import annotations

import base64
import json
import random
import subprocess
import sys
from collections.abc import Iterator
from dataclasses import dataclass
from datetime import timedelta

import httpx
import pytest
import sqlalchemy as sa

from examples.demo_data import kilns
from service import audit, repository
from service.api.routes.jobs import to_summary
from service.db import init_db, session_scope
from service.settings import Settings
from service.tables import Job, Trial, utcnow
from tests.conftest import DB_KINDS, ROOT, child_env, fresh_database
from tests.service.conftest import LiveApi, live_api

N_TRIALS = 250


@dataclass
class Filled:
    api: LiveApi
    job_id: str  # the job with N_TRIALS trials
    trials: list[Trial]


def _trial(job_id: str, number: int, rng: random.Random) -> Trial:
    state = rng.choice(["complete"] * 6 + ["pruned", "fail"])
    # Two decimals, so many trials tie on score and the number must break the tie.
    score = None if state == "fail" else round(rng.uniform(0.6, 0.9), 2)
    fidelity = None if state == "fail" else (1.0 if state == "complete" else 0.5)
    if state == "complete" and rng.random() < 0.1:
        fidelity = 0.25  # complete at a lower fidelity: listed, but never ranked
    return Trial(job_id=job_id, number=number, state=state, params={"num_leaves": number},
                 score=score, score_std=0.01, fold_scores=[], best_iterations=[],
                 boosting_rounds=10, duration_seconds=0.1, train_seconds=0.1,
                 score_se=0.005, fidelity=fidelity)


@pytest.fixture(scope="module", params=DB_KINDS)
def filled(request: pytest.FixtureRequest,
           tmp_path_factory: pytest.TempPathFactory) -> Iterator[Filled]:
    # One filled server per database for the whole module: the tests only read.
    tmp = tmp_path_factory.mktemp(request.param)
    with fresh_database(request.param, tmp) as db_url, \
            live_api(Settings(home=tmp / "home", database_url=db_url)) as api:
        body = kilns(n_rows=120, seed=1).to_csv(index=False).encode()
        with api.client() as client:
            for i in range(3):  # through the API, so the audit trail has entries too
                up = client.post("/v1/datasets", params={"name": f"k{i}"}, content=body,
                                 headers={"Content-Type": "text/csv"})
                assert up.status_code == 201, up.text
            ds = up.json()["id"]
            jobs = []
            for seed in range(5):
                made = client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                                     "budget": {"trials": 3}, "seed": seed})
                assert made.status_code == 202, made.text
                jobs.append(made.json()["id"])
            client.post(f"/v1/jobs/{jobs[1]}/cancel").raise_for_status()
        rng = random.Random(7)
        trials = [_trial(jobs[0], n, rng) for n in range(N_TRIALS)]
        same = utcnow() - timedelta(hours=1)  # rows stamped alike: the id breaks the tie
        with session_scope(db_url) as session:
            for i in range(4):
                repository.add_dataset(
                    session, id=f"ds_same{i}", name=f"same{i}", rows=1, n_columns=1,
                    size_bytes=1, sha256="0" * 64, source_format="csv", columns=[],
                    warnings=[], file_key="none", file_sha256="0" * 64, created_at=same)
            session.add_all(trials)
            for i, job_id in enumerate([*jobs, jobs[0], jobs[0]]):
                repository.add_model(
                    session, id=f"mdl_{i:02d}", job_id=job_id, task="binary",
                    metric="roc_auc", target="defect", params={}, boosting_rounds=1,
                    trial_number=0, cv={}, holdout={"roc_auc": 0.8, "rows": 24},
                    feature_schema={"features": []}, classes=[0, 1], feature_importance=[],
                    details={}, decision=None, sha256="0" * 64, file_key="none",
                    size_bytes=1, created_at=same if i < 3 else utcnow())
            for i in range(5):
                repository.move_channel(session, channel=None, name=f"line-{i}",
                                        model_id="mdl_00", action="set")
            for i in range(3):
                audit.record(session, action="test", target=f"t{i}", key_id=None)
        yield Filled(api=api, job_id=jobs[0], trials=trials)


def walk(client: httpx.Client, path: str, limit: int = 2,
         **params: object) -> tuple[list[dict], list[dict]]:
    """(every item, every page) of a list, following `next` from the first page."""
    items, pages, query = [], [], {**params, "limit": limit}
    while True:
        response = client.get(path, params=query)
        assert response.status_code == 200, response.text
        page = response.json()
        assert set(page) >= {"items", "total", "next"}
        assert len(page["items"]) <= limit
        pages.append(page)
        items.extend(page["items"])
        if page["next"] is None:
            return items, pages
        assert len(page["items"]) == limit  # only the last page may be short
        query = {**params, "limit": limit, "cursor": page["next"]}


def _key(item: dict) -> object:
    return item.get("id") or item.get("name") or (item.get("number"), item.get("rank"))


LISTS = [("/v1/datasets", {}), ("/v1/jobs", {}), ("/v1/jobs", {"status": "queued"}),
         ("/v1/models", {}), ("/v1/models", {"job_id": "{job}"}), ("/v1/channels", {}),
         ("/v1/audit", {}), ("/v1/jobs/{job}/trials", {}), ("/v1/jobs/{job}/leaderboard", {})]


@pytest.mark.parametrize(("path", "params"), LISTS,
                         ids=[p + "?" + ",".join(q) for p, q in LISTS])
def test_walking_pages_gives_the_whole_list_once_in_order(filled: Filled, path: str,
                                                          params: dict) -> None:
    path = path.replace("{job}", filled.job_id)
    params = {k: v.replace("{job}", filled.job_id) for k, v in params.items()}
    with filled.api.client() as client:
        whole = client.get(path, params={**params, "limit": 500}).json()
        items, pages = walk(client, path, **params)
    assert whole["next"] is None and len(whole["items"]) == whole["total"] > 2
    assert [_key(i) for i in items] == [_key(i) for i in whole["items"]]
    assert items == whole["items"]
    assert len({_key(i) for i in items}) == len(items)  # nothing twice
    assert all(p["total"] == whole["total"] for p in pages)
    assert pages[-1]["next"] is None and all(p["next"] for p in pages[:-1])


def test_lists_keep_their_documented_order(filled: Filled) -> None:
    with filled.api.client() as client:
        datasets = client.get("/v1/datasets", params={"limit": 1000}).json()["items"]
        jobs = client.get("/v1/jobs", params={"limit": 1000}).json()["items"]
        models = client.get("/v1/models", params={"limit": 1000}).json()["items"]
        queued = client.get("/v1/jobs", params={"status": "queued", "limit": 1000}).json()
    for listed in (datasets, jobs, models):  # newest first, ties by id (descending)
        keys = [(i["created_at"], i["id"]) for i in listed]
        assert keys == sorted(keys, reverse=True)
    assert [d["id"] for d in datasets[-4:]] == ["ds_same3", "ds_same2", "ds_same1", "ds_same0"]
    assert queued["total"] == 4 and {j["status"] for j in queued["items"]} == {"queued"}


def test_a_jobs_list_item_is_the_job_without_its_request(filled: Filled) -> None:
    # The list reads the summary fields out of the stored request in SQL (JSON paths on
    # SQLite and PostgreSQL); each must equal what the job itself answers.
    with filled.api.client() as client:
        jobs = client.get("/v1/jobs", params={"limit": 1000}).json()["items"]
        whole = {j["id"]: client.get(f"/v1/jobs/{j['id']}").json() for j in jobs}
    assert len(jobs) == 5
    for item in jobs:
        job = whole[item["id"]]
        assert set(job) - set(item) == {"spec", "warnings", "problem", "promotion"}
        assert item["target"] == job["spec"]["target"] == "defect"
        assert item["progress"]["trials_budget"] == job["spec"]["budget"]["trials"] == 3
        timeless = ("elapsed_seconds", "eta_seconds")
        assert {k: v for k, v in item["progress"].items() if k not in timeless} == \
            {k: v for k, v in job["progress"].items() if k not in timeless}
        assert {k: v for k, v in item.items() if k != "progress"} == \
            {k: job[k] for k in item if k != "progress"}


@pytest.mark.parametrize("db_url", DB_KINDS, indirect=True)
def test_a_job_row_without_summary_columns_is_listed_from_its_request(db_url: str) -> None:
    # A row an older API process wrote after the upgrade has no copies of its request's
    # fields; the list reads them from the request instead.
    init_db(db_url)
    spec = {"effective": {"target": "yield_kg", "task": "regression", "metric": "rmse",
                          "direction": "minimize", "budget": {"trials": 9, "seconds": 60.0}}}
    with session_scope(db_url) as session:
        repository.add_job(session, id="job_older", dataset_id="ds", spec=spec,
                           study_name="s", warnings=[])
        repository.add_job(session, id="job_newer", dataset_id="ds", spec=spec,
                           study_name="s", warnings=[])
        session.execute(sa.update(Job).where(Job.id == "job_older").values(
            target=None, task=None, metric=None, direction=None, trials_budget=None,
            seconds_budget=None))
    with session_scope(db_url) as session:
        rows, total = repository.list_job_summaries(session, status=None, limit=10)
        items = {r["id"]: to_summary(r) for r in rows}
    assert total == 2
    for item in items.values():
        assert (item.target, item.task, item.metric, item.direction) == (
            "yield_kg", "regression", "rmse", "minimize")
        assert item.progress.trials_budget == 9
    assert rows[0]["unsummarised_spec"] is None or rows[1]["unsummarised_spec"] is None


def test_trials_and_leaderboard_walk_over_250_trials(filled: Filled) -> None:
    expected = [t.number for t in filled.trials]
    # Outside reference: the ranking worked out here in Python from the rows inserted.
    ranked = sorted((t for t in filled.trials if t.state == "complete"
                     and t.fidelity == 1.0), key=lambda t: (-t.score, t.number))
    path = f"/v1/jobs/{filled.job_id}"
    with filled.api.client() as client:
        trials, pages = walk(client, f"{path}/trials", limit=7)
        board, board_pages = walk(client, f"{path}/leaderboard", limit=9)
        default = client.get(f"{path}/trials").json()
        top = client.get(f"{path}/leaderboard", params={"limit": 5}).json()
        as_csv = client.get(f"{path}/leaderboard", params={"format": "csv"}).text
        csv_page = client.get(f"{path}/leaderboard", params={
            "format": "csv", "limit": 3, "cursor": top["next"]}).text
    assert [t["number"] for t in trials] == expected
    assert pages[0]["total"] == N_TRIALS and len(pages) == -(-N_TRIALS // 7)
    assert len(default["items"]) == 100 and default["next"]  # the default page
    assert [r["number"] for r in board] == [t.number for t in ranked]
    assert [r["rank"] for r in board] == list(range(1, len(ranked) + 1))
    assert board_pages[0]["total"] == len(ranked)
    assert all(p["metric"] == "roc_auc" and p["direction"] == "maximize" for p in board_pages)
    assert top["items"] == board[:5]
    lines = as_csv.strip().splitlines()  # one table: the header, then every ranked trial
    assert lines[0].startswith("rank,number,") and len(lines) == len(ranked) + 1
    assert [line.split(",")[:2] for line in csv_page.strip().splitlines()[1:]] == [
        [str(r["rank"]), str(r["number"])] for r in board[5:8]]


def _tampered(cursor: str) -> list[str]:
    raw = base64.urlsafe_b64decode(cursor + "=" * (-len(cursor) % 4))
    flipped = bytearray(raw)
    flipped[len(flipped) // 3] ^= 0x01  # one bit inside the sort key
    edited = base64.urlsafe_b64encode(bytes(flipped)).decode().rstrip("=")
    return [edited, cursor[:-3], cursor + "AA", "not a cursor", "1234", "", "=" * 8]


@pytest.mark.parametrize(("path", "params"), LISTS,
                         ids=[p + "?" + ",".join(q) for p, q in LISTS])
def test_a_tampered_cursor_is_a_422_naming_cursor(filled: Filled, path: str,
                                                  params: dict) -> None:
    path = path.replace("{job}", filled.job_id)
    params = {k: v.replace("{job}", filled.job_id) for k, v in params.items()}
    other = "/v1/channels" if path != "/v1/channels" else "/v1/datasets"
    with filled.api.client() as client:
        cursor = client.get(path, params={**params, "limit": 1}).json()["next"]
        foreign = client.get(other, params={"limit": 1}).json()["next"]
        assert cursor and foreign
        for bad in [*_tampered(cursor), foreign]:
            response = client.get(path, params={**params, "limit": 1, "cursor": bad})
            if bad == "":  # an empty cursor is no cursor: the first page
                assert response.status_code == 200
                continue
            assert response.status_code == 422, (bad, response.text)
            assert response.headers["content-type"].startswith("application/problem+json")
            assert [e["field"] for e in response.json()["errors"]] == ["cursor"]


def test_the_old_stream_path_redirects_to_watch(filled: Filled) -> None:
    path = f"/v1/jobs/{filled.job_id}"
    with filled.api.client() as client:
        old = client.get(f"{path}/events", params={"poll": 0.5})
        assert old.status_code == 308
        assert old.headers["location"] == f"{path}/watch?poll=0.5"
        assert old.headers["deprecation"]
        doc = client.get("/openapi.json").json()["paths"]
        # Followed, the redirect opens the stream itself (a queued job: its status first).
        with client.stream("GET", f"{path}/events", follow_redirects=True) as stream:
            assert stream.status_code == 200
            assert str(stream.url).endswith(f"{path}/watch")
            assert stream.headers["content-type"].startswith("text/event-stream")
            first = next(line for line in stream.iter_lines() if line.startswith("event:"))
            assert first == "event: status"
    assert doc["/v1/jobs/{job_id}/events"]["get"]["deprecated"] is True
    assert "/watch" in doc["/v1/jobs/{job_id}/events"]["get"]["description"]
    assert "/v1/jobs/{job_id}/watch" in doc


def _gk(api: LiveApi, *args: str) -> subprocess.CompletedProcess[str]:
    env = child_env(api.settings.home, GROVEKEEPER_URL=api.base)
    return subprocess.run([sys.executable, "-m", "service", *args], env=env, cwd=ROOT,
                          capture_output=True, text=True, timeout=120)


def test_client_commands_walk_the_pages(filled: Filled) -> None:
    ranked = [t for t in filled.trials if t.state == "complete" and t.fidelity == 1.0]
    jobs = _gk(filled.api, "jobs", "--limit", "3", "--format", "json")
    board = _gk(filled.api, "board", filled.job_id, "--format", "json")  # over 100 rows
    top = _gk(filled.api, "board", filled.job_id, "--limit", "4")
    assert jobs.returncode == board.returncode == top.returncode == 0, jobs.stderr
    listed = json.loads(jobs.stdout)
    assert len(listed["items"]) == 3 and listed["total"] == 5 and listed["next"]
    whole = json.loads(board.stdout)
    assert len(ranked) > 100 and len(whole["items"]) == whole["total"] == len(ranked)
    assert whole["next"] is None and whole["metric"] == "roc_auc"
    assert len(top.stdout.strip().splitlines()) == 1 + 4  # header and four trials
    assert f"{len(ranked)} finished trials" in top.stderr

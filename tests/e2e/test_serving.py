"""Serving for calling systems, on a real server and database (SQLite and PostgreSQL):
the model list and its paging, and predictions that keep the caller's ids."""

from __future__ import annotations

import csv
import io
import json
import threading
import time
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest

from tests.conftest import DB_KINDS
from tests.e2e.servingkit import ORDER, Served, lightgbm_positive, served

pytestmark = pytest.mark.e2e


@pytest.fixture(scope="module", params=DB_KINDS)
def env(request: pytest.FixtureRequest,
        tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    with served(request.param, tmp_path_factory.mktemp(request.param)) as s:
        yield s


def test_models_list_newest_first_filtered_and_paged(env: Served) -> None:
    ids = {k: m["id"] for k, m in env.models.items()}
    with env.client() as client:
        everything = client.get("/v1/models").json()
        pages, cursor = [], None
        while True:
            page = client.get("/v1/models", params={"limit": 1, **(
                {"cursor": cursor} if cursor else {})}).json()
            pages.append(page)
            cursor = page["next"]
            if cursor is None:
                break
        by_dataset = client.get("/v1/models", params={"dataset_id": env.dataset_id}).json()
        by_job = client.get("/v1/models", params={"job_id": env.jobs["b"]["id"]}).json()
        by_target = client.get("/v1/models", params={"target": "no_such_column"}).json()
        as_csv = client.get("/v1/models", headers={"Accept": "text/csv"})
        bad = client.get("/v1/models", params={"cursor": "not-a-cursor!"})
    assert everything["total"] == 3 and everything["next"] is None
    listed = [m["id"] for m in everything["items"]]
    assert sorted(listed) == sorted(ids.values())
    stamps = [m["created_at"] for m in everything["items"]]
    assert stamps == sorted(stamps, reverse=True)  # newest first
    # Paging one at a time walks the same list, each model once.
    assert [p["items"][0]["id"] for p in pages] == listed
    assert all(p["total"] == 3 for p in pages)
    assert {m["id"] for m in by_dataset["items"]} == {ids["a"], ids["b"]}
    assert by_dataset["total"] == 2
    assert all(m["dataset_id"] == env.dataset_id for m in by_dataset["items"])
    assert [m["id"] for m in by_job["items"]] == [ids["b"]]
    assert by_target == {"items": [], "total": 0, "next": None}
    assert [r["id"] for r in csv.DictReader(io.StringIO(as_csv.text))] == listed
    assert bad.status_code == 422 and bad.json()["errors"][0]["field"] == "cursor"


def test_keep_returns_ids_byte_for_byte_json(env: Served) -> None:
    model = env.models["a"]
    rows = env.rows.copy()
    # JSON values as sent: strings with leading zeros, in the input order (shuffled here).
    rows = rows.iloc[np.random.default_rng(0).permutation(len(rows))].reset_index(drop=True)
    records = json.loads(rows.to_json(orient="records"))
    with env.client() as client:
        by_query = client.post(f"/v1/models/{model['id']}/predictions",
                               params={"keep": f"{ORDER},firing_id"}, json={"rows": records})
        by_field = client.post(f"/v1/models/{model['id']}/predictions",
                               json={"rows": records, "keep": [ORDER]})
        missing = client.post(f"/v1/models/{model['id']}/predictions",
                              params={"keep": "nope"}, json={"rows": records[:2]})
    assert by_query.status_code == 200, by_query.text
    answer = by_query.json()
    assert by_query.headers["X-Model-Id"] == model["id"]
    assert [k[ORDER] for k in answer["kept"]] == list(rows[ORDER])
    assert [k["firing_id"] for k in answer["kept"]] == list(rows["firing_id"])
    assert answer["kept"][0][ORDER].startswith("0")
    assert ORDER not in answer["ignored_columns"] and "firing_id" not in answer[
        "ignored_columns"]
    assert by_field.json()["kept"] == [{ORDER: v} for v in rows[ORDER]]
    # The predictions next to them are LightGBM's own Booster.predict on the same rows.
    expected = lightgbm_positive(env.booster(model["id"]), model, rows)
    np.testing.assert_allclose(np.array(answer["probabilities"])[:, 1], expected, atol=1e-9)
    assert missing.status_code == 422
    assert missing.json()["errors"][0]["field"] == "rows[0].nope"


def test_keep_returns_ids_byte_for_byte_csv(env: Served) -> None:
    model = env.models["a"]
    rows = env.rows.copy()
    rows.loc[3, ORDER] = "00,7"  # a value that needs quoting still comes back as sent
    body = rows.to_csv(index=False).encode()
    with env.client() as client:
        response = client.post(f"/v1/models/{model['id']}/predictions",
                               params={"keep": ORDER}, content=body,
                               headers={"Content-Type": "text/csv"})
        absent = client.post(f"/v1/models/{model['id']}/predictions",
                             params={"keep": "nope"}, content=body,
                             headers={"Content-Type": "text/csv"})
    assert response.status_code == 200, response.text
    assert response.headers["X-Model-Id"] == model["id"]
    table = list(csv.reader(io.StringIO(response.text)))
    assert table[0][:2] == [ORDER, "prediction"]  # kept columns first
    assert [r[0] for r in table[1:]] == list(rows[ORDER])
    # The raw lines carry the ids byte for byte (leading zeros, no float formatting).
    lines = response.text.splitlines()[1:]
    assert lines[0].startswith(f"{rows.loc[0, ORDER]},")
    assert lines[3].startswith('"00,7",')
    ignored = response.headers.get("X-Ignored-Columns", "")
    assert ORDER not in ignored.split(",")
    expected = lightgbm_positive(env.booster(model["id"]), model, rows)
    got = np.array([float(r[table[0].index("probability_1")]) for r in table[1:]])
    np.testing.assert_allclose(got, expected, atol=1e-9)
    assert absent.status_code == 422 and absent.json()["errors"][0]["field"] == "keep"


def test_keep_only_columns_are_never_checked_as_features(env: Served, tmp_path: Path) -> None:
    model = env.models["a"]
    rows = env.rows.head(5).copy()
    # A value no feature check would accept: the kept column is not a feature, so it is
    # returned, not refused.
    rows[ORDER] = ["x", "", "2026-13-45", "00", "NaN"]
    records = json.loads(rows.to_json(orient="records"))
    with env.client() as client:
        response = client.post(f"/v1/models/{model['id']}/predictions",
                               params={"keep": ORDER}, json={"rows": records})
    assert response.status_code == 200, response.text
    assert [k[ORDER] for k in response.json()["kept"]] == ["x", "", "2026-13-45", "00", "NaN"]


def test_channel_set_show_list_refuse_force_and_roll_back(env: Served) -> None:
    a, b, narrow = (env.models[k]["id"] for k in ("a", "b", "narrow"))
    write_id, write = env.write_key
    name = f"kilns-{env.server.port}"
    with env.client(write) as client:
        first = client.put(f"/v1/channels/{name}", json={"model_id": narrow})
        # Callers of the narrow model do not send glaze_thickness_mm: refused, and named.
        refused = client.put(f"/v1/channels/{name}", json={"model_id": a})
        unchanged = client.get(f"/v1/channels/{name}").json()
        forced = client.put(f"/v1/channels/{name}", json={"model_id": a, "force": True})
        # The other way round needs nothing new from callers: allowed without force.
        back = client.put(f"/v1/channels/{name}", json={"model_id": narrow})
        again = client.put(f"/v1/channels/{name}", json={"model_id": b, "force": True})
        rolled = client.post(f"/v1/channels/{name}/rollback")
        listed = client.get("/v1/channels").json()
        bad_name = client.put("/v1/channels/no%20spaces", json={"model_id": a})
        bad_model = client.put(f"/v1/channels/{name}", json={"model_id": "mdl_nope"})
        missing = client.get("/v1/channels/never-made")
        lonely = client.put(f"/v1/channels/{name}-solo", json={"model_id": a})
        no_rollback = client.post(f"/v1/channels/{name}-solo/rollback")
    with env.client(env.admin_key) as client:
        read_only = client.get(f"/v1/channels/{name}").json()
    assert first.status_code == 200, first.text
    assert first.json()["model_id"] == narrow
    assert refused.status_code == 409
    problem = refused.json()
    assert [e.get("column") for e in problem["errors"]] == ["glaze_thickness_mm"]
    assert "glaze_thickness_mm" in problem["detail"]
    assert unchanged["model_id"] == narrow and len(unchanged["history"]) == 1
    assert forced.status_code == 200 and forced.json()["model_id"] == a
    assert back.status_code == 200 and back.json()["model_id"] == narrow
    assert again.json()["model_id"] == b
    # Rollback points at the model before the last move, as a new entry.
    assert rolled.status_code == 200 and rolled.json()["model_id"] == narrow
    history = rolled.json()["history"]
    assert [(h["action"], h["model_id"], h["previous_model_id"]) for h in history] == [
        ("rollback", narrow, b), ("set", b, narrow), ("set", narrow, a), ("set", a, narrow),
        ("set", narrow, None)]
    assert [h["forced"] for h in history] == [False, True, False, True, False]
    assert all(h["key_id"] == write_id for h in history)
    stamps = [h["at"] for h in history]
    assert stamps == sorted(stamps, reverse=True)
    assert read_only == rolled.json()
    assert name in [c["name"] for c in listed["items"]] and listed["next"] is None
    assert bad_name.status_code == 422 and bad_name.json()["errors"][0]["field"] == "name"
    assert bad_model.status_code == 422
    assert bad_model.json()["errors"][0]["field"] == "model_id"
    assert missing.status_code == 404
    assert lonely.status_code == 200 and no_rollback.status_code == 409


def test_channel_predictions_json_and_csv_name_the_model(env: Served) -> None:
    a = env.models["a"]
    name = f"csv-{env.server.port}"
    rows = env.rows.head(12)
    with env.client() as client:
        client.put(f"/v1/channels/{name}", json={"model_id": a["id"]}).raise_for_status()
        as_json = client.post(f"/v1/channels/{name}/predictions", params={"keep": ORDER},
                              json={"rows": json.loads(rows.to_json(orient="records"))})
        as_csv = client.post(f"/v1/channels/{name}/predictions",
                             params={"keep": ORDER, "explain": "true"},
                             content=rows.to_csv(index=False).encode(),
                             headers={"Content-Type": "text/csv"})
        nowhere = client.post("/v1/channels/never-made/predictions", json={"rows": [{}]})
    assert as_json.status_code == 200, as_json.text
    assert as_json.json()["model_id"] == a["id"] == as_json.headers["X-Model-Id"]
    assert [k[ORDER] for k in as_json.json()["kept"]] == list(rows[ORDER])
    assert as_csv.status_code == 200, as_csv.text
    assert as_csv.headers["X-Model-Id"] == a["id"]
    table = list(csv.DictReader(io.StringIO(as_csv.text)))
    assert [r[ORDER] for r in table] == list(rows[ORDER])
    assert any(k.startswith("contribution_") for k in table[0])
    expected = lightgbm_positive(env.booster(a["id"]), a, rows)
    np.testing.assert_allclose([float(r["probability_1"]) for r in table], expected,
                               atol=1e-9)
    assert nowhere.status_code == 404


def test_channel_switched_under_load_answers_every_request(env: Served) -> None:
    """20 switches while 8 clients predict: no errors, each answer from one of the two
    models and equal to that model's own LightGBM Booster.predict on the same rows."""
    a, b = env.models["a"], env.models["b"]
    rows = env.rows.head(20)
    records = json.loads(rows.to_json(orient="records"))
    expected = {m["id"]: lightgbm_positive(env.booster(m["id"]), m, rows) for m in (a, b)}
    assert not np.allclose(expected[a["id"]], expected[b["id"]])  # tell them apart
    name = f"busy-{env.server.port}"
    with env.client() as client:
        client.put(f"/v1/channels/{name}", json={"model_id": a["id"]}).raise_for_status()
    done = threading.Event()
    answers: list[tuple[str, list[float]]] = []
    errors: list[str] = []
    lock = threading.Lock()

    def caller(k: int) -> None:
        with env.client() as client:
            while not done.is_set():
                try:
                    if k % 2:
                        r = client.post(f"/v1/channels/{name}/predictions",
                                        json={"rows": records})
                        got = (r.json()["model_id"], [p[1] for p in r.json()["probabilities"]]
                               ) if r.status_code == 200 else None
                    else:
                        r = client.post(f"/v1/channels/{name}/predictions",
                                        content=rows.to_csv(index=False).encode(),
                                        headers={"Content-Type": "text/csv"})
                        got = (r.headers["X-Model-Id"], [
                            float(x["probability_1"])
                            for x in csv.DictReader(io.StringIO(r.text))]
                        ) if r.status_code == 200 else None
                except httpx.HTTPError as exc:
                    got, r = None, None
                    with lock:
                        errors.append(repr(exc))
                with lock:
                    if got is None and r is not None:
                        errors.append(f"{r.status_code} {r.text[:200]}")
                    elif got is not None:
                        answers.append(got)

    threads = [threading.Thread(target=caller, args=(k,)) for k in range(8)]
    for t in threads:
        t.start()
    try:
        with env.client() as client:
            for i in range(20):
                target = b if i % 2 == 0 else a
                client.put(f"/v1/channels/{name}",
                           json={"model_id": target["id"]}).raise_for_status()
                time.sleep(0.05)
    finally:
        done.set()
        for t in threads:
            t.join(timeout=120)
    assert errors == []
    assert len(answers) >= 20
    seen = {model_id for model_id, _ in answers}
    assert seen <= {a["id"], b["id"]}
    for model_id, probs in answers:
        np.testing.assert_allclose(probs, expected[model_id], atol=1e-9)
    with env.client() as client:
        history = client.get(f"/v1/channels/{name}").json()["history"]
    assert len(history) == 21

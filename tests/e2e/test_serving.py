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
import pandas as pd
import pytest
from prometheus_client.parser import text_string_to_metric_families

from examples.demo_data import kilns
from service.api.schemas import JobCreate
from service.jobspec import build_run
from tests.conftest import DB_KINDS
from tests.e2e.servingkit import (
    COSTS,
    ORDER,
    Served,
    job_body,
    lightgbm_positive,
    order_numbers,
    served,
)

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
    assert everything["total"] == 4 and everything["next"] is None
    listed = [m["id"] for m in everything["items"]]
    assert sorted(listed) == sorted(ids.values())
    stamps = [m["created_at"] for m in everything["items"]]
    assert stamps == sorted(stamps, reverse=True)  # newest first
    # Paging one at a time walks the same list, each model once.
    assert [p["items"][0]["id"] for p in pages] == listed
    assert all(p["total"] == 4 for p in pages)
    assert {m["id"] for m in by_dataset["items"]} == {ids["a"], ids["b"], ids["costly"]}
    assert by_dataset["total"] == 3
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


def test_decision_threshold_from_costs_is_served_and_costed(env: Served) -> None:
    model, plain = env.models["costly"], env.models["a"]
    decision = model["decision"]
    t = decision["threshold"]
    # Uncalibrated probabilities: the cut is chosen out of fold, never on the hold-out.
    assert decision["method"] == "out_of_fold"
    assert decision["false_positive_cost"] == 1 and decision["false_negative_cost"] == 5
    assert 0 < t < 1
    assert plain["decision"]["threshold"] == 0.5 and plain["decision"]["method"] == "default"
    assert "no costs" in plain["decision"]["note"]
    # The hold-out cost, recomputed here with numpy on LightGBM's own Booster.predict of
    # the job's hold-out rows.
    request = JobCreate(**job_body(env.dataset_id, seed=4, decision=COSTS)).model_dump(
        mode="json")
    run = build_run(request, env.stored_table(env.dataset_id))
    rows = run.plan.holdout_idx
    prob = env.booster(model["id"]).predict(run.data.X.iloc[rows])
    y = run.data.y[rows]

    def cost(cut: float) -> float:
        said_yes = prob > cut
        return float(np.mean(1.0 * (said_yes & (y == 0)) + 5.0 * (~said_yes & (y == 1))))

    assert decision["holdout"]["rows"] == len(rows)
    assert decision["holdout"]["expected_cost_per_row"] == pytest.approx(cost(t), abs=1e-12)
    assert decision["holdout"]["expected_cost_per_row_at_0_5"] == pytest.approx(
        cost(0.5), abs=1e-12)
    # Labels are served with t; ?threshold= overrides it for one request.
    records = json.loads(env.rows.to_json(orient="records"))
    expected = lightgbm_positive(env.booster(model["id"]), model, env.rows)
    with env.client() as client:
        served_labels = client.post(f"/v1/models/{model['id']}/predictions",
                                    json={"rows": records}).json()
        high = client.post(f"/v1/models/{model['id']}/predictions",
                           params={"threshold": 0.9}, json={"rows": records}).json()
        as_csv = client.post(f"/v1/models/{model['id']}/predictions",
                             params={"threshold": 0.05},
                             content=env.rows.to_csv(index=False).encode(),
                             headers={"Content-Type": "text/csv"})
        bad = client.post(f"/v1/models/{model['id']}/predictions",
                          params={"threshold": 1.5}, json={"rows": records})
        wrong_task = client.post("/v1/jobs", json={
            "dataset_id": env.dataset_id, "target": "peak_temp_c",
            "decision": {"false_positive_cost": 1, "false_negative_cost": 2}})
        zero = client.post("/v1/jobs", json={
            "dataset_id": env.dataset_id, "target": "defect",
            "decision": {"false_positive_cost": 0, "false_negative_cost": 0}})
    assert served_labels["predictions"] == [int(p > t) for p in expected]
    assert high["predictions"] == [int(p > 0.9) for p in expected]
    labels = [int(r["prediction"]) for r in csv.DictReader(io.StringIO(as_csv.text))]
    assert labels == [int(p > 0.05) for p in expected]
    assert bad.status_code == 422 and bad.json()["errors"][0]["field"] == "threshold"
    assert wrong_task.status_code == 422
    assert wrong_task.json()["errors"][0]["field"] == "decision"
    assert zero.status_code == 422 and zero.json()["errors"][0]["field"].startswith("decision")


def upload_parquet(client: httpx.Client, frame: pd.DataFrame, name: str) -> str:
    # Parquet keeps text ids as text (a CSV reader may take 007 for the number 7).
    buffer = io.BytesIO()
    frame.to_parquet(buffer, index=False)
    response = client.post("/v1/datasets", params={"name": name}, content=buffer.getvalue(),
                           headers={"Content-Type": "application/vnd.apache.parquet"})
    assert response.status_code == 201, response.text
    return response.json()["id"]


def wait_scoring(client: httpx.Client, scoring_id: str, timeout: float = 300) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        run = client.get(f"/v1/scorings/{scoring_id}").json()
        if run["status"] in ("succeeded", "failed", "cancelled"):
            return run
        time.sleep(0.3)
    raise AssertionError(f"scoring {scoring_id} did not finish: {run}")


def test_batch_scoring_every_row_once_ids_kept_lightgbm_predictions(env: Served) -> None:
    a = env.models["a"]
    table = kilns(n_rows=2500, seed=11).drop(columns=["defect"])
    table.insert(0, ORDER, order_numbers(len(table)))
    name = f"batch-{env.server.port}"
    with env.client() as client:
        ds = upload_parquet(client, table, "to-score")
        client.put(f"/v1/channels/{name}", json={"model_id": a["id"]}).raise_for_status()
        made = client.post(f"/v1/channels/{name}/scorings",
                           json={"dataset_id": ds, "keep": [ORDER, "firing_id"]})
        assert made.status_code == 202, made.text
        assert made.headers["Location"] == f"/v1/scorings/{made.json()['id']}"
        # The model is fixed at submission: moving the channel now changes nothing.
        client.put(f"/v1/channels/{name}", json={"model_id": env.models["b"]["id"]})
        run = wait_scoring(client, made.json()["id"])
        parquet = client.get(run["result_url"])
        as_csv = client.get(run["result_url"], headers={"Accept": "text/csv"})
        bad_keep = client.post(f"/v1/models/{a['id']}/scorings",
                               json={"dataset_id": ds, "keep": ["nope"]})
        bad_ds = client.post(f"/v1/models/{a['id']}/scorings", json={"dataset_id": "ds_no"})
        narrow_ds = upload_parquet(client, table.drop(columns=["glaze_thickness_mm"]), "n")
        lacking = client.post(f"/v1/models/{a['id']}/scorings", json={"dataset_id": narrow_ds})
    assert run["status"] == "succeeded", run
    assert run["model_id"] == a["id"] and run["channel"] == name
    assert run["progress"] == {"rows_done": 2500, "rows_total": 2500, "fraction": 1.0}
    result = pd.read_parquet(io.BytesIO(parquet.content))
    assert list(result.columns[:3]) == [ORDER, "firing_id", "prediction"]
    # Every row once, in order, ids exactly as stored (leading zeros kept).
    assert list(result[ORDER]) == list(table[ORDER])
    assert list(result["firing_id"]) == list(table["firing_id"])
    expected = lightgbm_positive(env.booster(a["id"]), a, table)
    np.testing.assert_allclose(result["probability_1"], expected, atol=1e-9)
    rows = list(csv.DictReader(io.StringIO(as_csv.text)))
    assert as_csv.headers["content-type"].startswith("text/csv")
    assert [r[ORDER] for r in rows] == list(table[ORDER])
    np.testing.assert_allclose([float(r["probability_1"]) for r in rows], expected, atol=1e-9)
    assert bad_keep.status_code == 422 and bad_keep.json()["errors"][0]["field"] == "keep[0]"
    assert bad_ds.status_code == 422 and bad_ds.json()["errors"][0]["field"] == "dataset_id"
    assert lacking.status_code == 422
    assert [e.get("column") for e in lacking.json()["errors"]] == ["glaze_thickness_mm"]


def test_batch_scoring_cancel(env: Served) -> None:
    a = env.models["a"]
    table = kilns(n_rows=20_000, seed=12).drop(columns=["defect"])
    with env.client() as client:
        ds = upload_parquet(client, table, "to-cancel")
        made = client.post(f"/v1/models/{a['id']}/scorings", json={"dataset_id": ds}).json()
        cancelled = client.post(f"/v1/scorings/{made['id']}/cancel")
        run = wait_scoring(client, made["id"])
        result = client.get(f"/v1/scorings/{made['id']}/result")
        again = client.post(f"/v1/scorings/{made['id']}/cancel")
    assert cancelled.status_code == 202 and cancelled.json()["cancel_requested"] is True
    assert run["status"] == "cancelled" and run["result_url"] is None
    assert result.status_code == 409 and again.status_code == 409


def _drift(client: httpx.Client, model_id: str) -> dict[str, dict]:
    answer = client.get(f"/v1/models/{model_id}/drift")
    assert answer.status_code == 200, answer.text
    return {f["name"]: f for f in answer.json()["features"]}


def test_drift_stable_in_distribution_and_significant_on_the_shifted_feature(
        env: Served) -> None:
    steady, moved = env.models["costly"], env.models["narrow"]
    fresh = kilns(n_rows=5000, seed=31).drop(columns=["defect"])
    # One standard deviation of the training values (the narrow model's own dataset).
    sd = env.stored_table(env.other_dataset_id)["peak_temp_c"].std()
    shifted = fresh.drop(columns=["glaze_thickness_mm"]).copy()
    shifted["peak_temp_c"] = shifted["peak_temp_c"] + sd
    with env.client() as client:
        before = _drift(client, moved["id"])
        for model, rows in ((steady, fresh), (moved, shifted)):
            # Half as JSON rows, half as CSV: both kinds of request are counted.
            half = len(rows) // 2
            client.post(f"/v1/models/{model['id']}/predictions", json={
                "rows": json.loads(rows.iloc[:half].to_json(orient="records"))}
            ).raise_for_status()
            client.post(f"/v1/models/{model['id']}/predictions",
                        content=rows.iloc[half:].to_csv(index=False).encode(),
                        headers={"Content-Type": "text/csv"}).raise_for_status()
        stable = _drift(client, steady["id"])
        drifted = _drift(client, moved["id"])
    assert all(f["rows"] == 0 and f["psi"] is None for f in before.values())
    assert {f["rows"] for f in drifted.values()} == {5000}
    assert min(f["rows"] for f in stable.values()) >= 5000
    assert {n: f["psi"] for n, f in stable.items() if f["psi"] >= 0.1} == {}
    assert all(f["reading"] == "stable" for f in stable.values())
    assert drifted["peak_temp_c"]["psi"] > 0.25
    assert drifted["peak_temp_c"]["reading"] == "significant"
    others = {n: f["psi"] for n, f in drifted.items() if n != "peak_temp_c"}
    assert max(others.values()) < 0.25, others
    assert drifted["humidity_pct"]["missing_rate"] == pytest.approx(
        shifted["humidity_pct"].isna().mean())


def test_psi_gauges_only_for_models_behind_a_channel(env: Served) -> None:
    steady = env.models["costly"]
    name = f"gauged-{env.server.port}"
    rows = kilns(n_rows=200, seed=32).drop(columns=["defect"])

    def psi_samples(client: httpx.Client) -> list:
        client.get(f"/v1/models/{steady['id']}/drift").raise_for_status()  # flushes
        text = client.get("/metrics").text
        return [s for f in text_string_to_metric_families(text) for s in f.samples
                if s.name == "grovekeeper_feature_psi"]

    with env.client() as client:
        client.post(f"/v1/models/{steady['id']}/predictions", json={
            "rows": json.loads(rows.to_json(orient="records"))}).raise_for_status()
        # Scored rows, but no channel points at it yet: no series.
        before = psi_samples(client)
        client.put(f"/v1/channels/{name}", json={"model_id": steady["id"]}).raise_for_status()
        after = psi_samples(client)
        behind = {c["model_id"] for c in client.get("/v1/channels").json()["items"]}
    assert not [s for s in before if s.labels["model_id"] == steady["id"]]
    mine = [s for s in after if s.labels["channel"] == name]
    assert mine and all(s.labels["model_id"] == steady["id"] for s in mine)
    assert {s.labels["feature"] for s in mine} == {
        f["name"] for f in steady["feature_schema"]["features"]}
    assert {s.labels["model_id"] for s in after} <= behind

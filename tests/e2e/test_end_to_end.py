"""The user story end to end: a real ``grovekeeper serve`` (uvicorn + worker process),
curl-shaped requests, real LightGBM training, checked against outside references."""

from __future__ import annotations

import csv
import io

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
from sklearn.metrics import log_loss, mean_squared_error, roc_auc_score

import tuner
from examples.demo_data import greenhouse, kilns
from tests.conftest import Server, wait_for_job

pytestmark = pytest.mark.e2e


def upload_csv(client, frame: pd.DataFrame, name: str) -> dict:
    response = client.post("/v1/datasets", params={"name": name},
                           content=frame.to_csv(index=False).encode(),
                           headers={"Content-Type": "text/csv"})
    assert response.status_code == 201, response.text
    return response.json()


@pytest.fixture(scope="module")
def kiln_job(server: Server) -> dict:
    frame = kilns(n_rows=600, seed=3)
    with server.client() as client:
        dataset = upload_csv(client, frame, "kilns")
        response = client.post("/v1/jobs", json={"dataset_id": dataset["id"], "target": "defect",
                                                 "budget": {"trials": 6}, "seed": 5})
        assert response.status_code == 202, response.text
        assert response.headers["location"] == f"/v1/jobs/{response.json()['id']}"
        job = wait_for_job(client, response.json()["id"])
    assert job["status"] == "succeeded", (job, server.log())
    return {"frame": frame, "dataset": dataset, "job": job}


def test_upload_reports_schema_and_warnings(kiln_job: dict) -> None:
    dataset = kiln_job["dataset"]
    assert dataset["rows"] == 600
    kinds = {c["name"]: c["kind"] for c in dataset["columns"]}
    assert kinds["clay_body"] == "categorical"
    assert kinds["peak_temp_c"] == "numeric"
    assert kinds["fired_on"] == "datetime"
    missing = {c["name"]: c["missing"] for c in dataset["columns"]}
    assert missing["humidity_pct"] == int(kiln_job["frame"]["humidity_pct"].isna().sum())
    assert any("firing_id" in w for w in dataset["warnings"])  # unique ids look like keys
    assert len(dataset["sha256"]) == 64


def test_progress_and_trials(server: Server, kiln_job: dict) -> None:
    job = kiln_job["job"]
    progress = job["progress"]
    assert job["task"] == "binary" and job["metric"] == "roc_auc"
    assert progress["trials_completed"] + progress["trials_pruned"] == 6
    assert progress["elapsed_seconds"] > 0
    with server.client() as client:
        trials = client.get(f"/v1/jobs/{job['id']}/trials").json()["items"]
    assert [t["number"] for t in trials] == list(range(len(trials)))
    complete = [t for t in trials if t["state"] == "complete"]
    assert len(complete) == progress["trials_completed"]
    for t in complete:
        assert len(t["fold_scores"]) == 5
        assert t["score"] == pytest.approx(np.mean(t["fold_scores"]))
        assert t["boosting_rounds"] >= 1 and t["duration_seconds"] > 0
        # Few rows: all five folds; the standard error of their mean (ddof=1 / sqrt(5)).
        assert t["score_se"] == pytest.approx(np.std(t["fold_scores"], ddof=1) / np.sqrt(5))
    assert all(t["fidelity"] == 1.0 for t in trials)
    assert progress["best_score"] == max(t["score"] for t in complete)


def test_leaderboard_json_and_csv(server: Server, kiln_job: dict) -> None:
    job_id = kiln_job["job"]["id"]
    with server.client() as client:
        board = client.get(f"/v1/jobs/{job_id}/leaderboard").json()
        as_csv = client.get(f"/v1/jobs/{job_id}/leaderboard", headers={"Accept": "text/csv"})
        limited = client.get(f"/v1/jobs/{job_id}/leaderboard", params={"limit": 2}).json()
    scores = [r["score"] for r in board["items"]]
    assert scores == sorted(scores, reverse=True)  # ROC AUC: larger is better
    assert [r["rank"] for r in board["items"]] == list(range(1, len(scores) + 1))
    assert len(limited["items"]) == 2 and limited["items"] == board["items"][:2]
    assert as_csv.headers["content-type"].startswith("text/csv")
    rows = list(csv.DictReader(io.StringIO(as_csv.text)))
    assert [int(r["number"]) for r in rows] == [r["number"] for r in board["items"]]
    assert float(rows[0]["score"]) == pytest.approx(scores[0])
    assert "num_leaves" in rows[0]
    assert all(r["score_se"] > 0 for r in board["items"])
    assert float(rows[0]["score_se"]) == pytest.approx(board["items"][0]["score_se"])


def test_served_predictions_match_lightgbm(server: Server, kiln_job: dict, tmp_path) -> None:
    model_id = kiln_job["job"]["model_id"]
    frame = kiln_job["frame"].head(40)
    rows = frame.drop(columns=["defect"]).to_dict(orient="records")
    rows = [{k: (None if pd.isna(v) else v) for k, v in r.items()} for r in rows]
    with server.client() as client:
        model = client.get(f"/v1/models/{model_id}").json()
        file = client.get(f"/v1/models/{model_id}/file")
        served = client.post(f"/v1/models/{model_id}/predictions", json={"rows": rows}).json()
        as_csv = client.post(f"/v1/models/{model_id}/predictions",
                             content=frame.drop(columns=["defect"]).to_csv(index=False),
                             headers={"Content-Type": "text/csv"})
    import hashlib

    assert hashlib.sha256(file.content).hexdigest() == model["sha256"]
    path = tmp_path / "model.txt"
    path.write_bytes(file.content)
    # Reference: LightGBM's own predict on the downloaded file (lightgbm.Booster docs), on a
    # frame built here with plain pandas: LightGBM maps category levels by value through
    # the pandas_categorical list saved in the model file.
    booster = lgb.Booster(model_file=str(path))
    plain = pd.DataFrame(index=frame.index)
    for feature in model["feature_schema"]["features"]:
        column = frame[feature["name"]]
        if feature["kind"] == "categorical":
            plain[feature["name"]] = pd.Categorical(column.astype(object))
        elif feature.get("parts"):
            # A date's calendar parts, from pandas' own .dt accessors (UTC).
            stamps = pd.to_datetime(column, utc=True)
            values = {"weekday": stamps.dt.day_of_week, "day": stamps.dt.day,
                      "month": stamps.dt.month, "hour": stamps.dt.hour,
                      "elapsed_days": (stamps - pd.Timestamp(0, tz="UTC")).dt.total_seconds()
                      / 86400}
            for part, name in zip(feature["parts"], feature["model_columns"], strict=True):
                plain[name] = values[part].astype(float)
        else:
            plain[feature["name"]] = column.astype(float)
    expected = booster.predict(plain)
    probs = np.array(served["probabilities"])[:, 1]
    np.testing.assert_allclose(probs, expected, rtol=0, atol=1e-9)
    assert served["classes"] == [0, 1]
    assert set(served["predictions"]) <= {0, 1}
    assert served["ignored_columns"] == ["firing_id"]  # an identifier: not a feature
    csv_rows = pd.read_csv(io.StringIO(as_csv.text))
    np.testing.assert_allclose(csv_rows["probability_1"], expected, atol=1e-9)


def test_holdout_scores_match_sklearn(server: Server, kiln_job: dict) -> None:
    job, frame = kiln_job["job"], kiln_job["frame"]
    with server.client() as client:
        model = client.get(f"/v1/models/{job['model_id']}").json()
        text = client.get(f"/v1/models/{job['model_id']}/file").text
    # Rebuild the hold-out the way the job's manifest describes (seeded, deterministic).
    data = tuner.prepare(frame, target="defect")
    plan = tuner.plan_validation(data, strategy=job["spec"]["cv"]["strategy"], n_folds=5,
                                 holdout_fraction=0.2, seed=5)
    assert model["holdout_rows"] == len(plan.holdout_idx) == job["spec"]["rows"]["holdout"]
    booster = lgb.Booster(model_str=text)
    proba = booster.predict(data.X.iloc[plan.holdout_idx])
    y = data.y[plan.holdout_idx]
    # References: sklearn.metrics.roc_auc_score and log_loss.
    assert model["holdout"]["roc_auc"] == pytest.approx(roc_auc_score(y, proba), abs=1e-12)
    assert model["holdout"]["log_loss"] == pytest.approx(log_loss(y, proba), abs=1e-12)


def test_regression_job_and_rmse_matches_sklearn(server: Server) -> None:
    frame = greenhouse(n_rows=500, seed=4)
    with server.client() as client:
        dataset = upload_csv(client, frame, "greenhouse")
        response = client.post("/v1/jobs", json={"dataset_id": dataset["id"],
                                                 "target": "yield_kg_per_m2",
                                                 "budget": {"trials": 4}, "seed": 1})
        job = wait_for_job(client, response.json()["id"])
        assert job["status"] == "succeeded", job
        model = client.get(f"/v1/models/{job['model_id']}").json()
        text = client.get(f"/v1/models/{job['model_id']}/file").text
        board = client.get(f"/v1/jobs/{job['id']}/leaderboard").json()
    assert job["task"] == "regression" and job["metric"] == "rmse"
    scores = [r["score"] for r in board["items"]]
    assert scores == sorted(scores)  # RMSE: smaller is better
    data = tuner.prepare(frame, target="yield_kg_per_m2")
    plan = tuner.plan_validation(data, strategy="kfold", n_folds=5, holdout_fraction=0.2,
                                 seed=1)
    pred = lgb.Booster(model_str=text).predict(data.X.iloc[plan.holdout_idx])
    # Reference: sklearn.metrics.mean_squared_error (RMSE is its square root).
    rmse = float(np.sqrt(mean_squared_error(data.y[plan.holdout_idx], pred)))
    assert model["holdout"]["rmse"] == pytest.approx(rmse, rel=1e-12)


def test_restart_keeps_everything(server: Server, kiln_job: dict) -> None:
    job = kiln_job["job"]
    with server.client() as client:
        before = client.get(f"/v1/jobs/{job['id']}/trials").json()
    server.stop()
    server.start()
    with server.client() as client:
        assert client.get(f"/v1/datasets/{kiln_job['dataset']['id']}").status_code == 200
        again = client.get(f"/v1/jobs/{job['id']}").json()
        assert again["status"] == "succeeded" and again["model_id"] == job["model_id"]
        assert client.get(f"/v1/jobs/{job['id']}/trials").json() == before
        assert client.get(f"/v1/models/{job['model_id']}/file").status_code == 200

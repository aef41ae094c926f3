"""Evaluation, explanations, plots and the report page on a real ``grovekeeper serve``."""

from __future__ import annotations

import io
import re
import xml.etree.ElementTree as ET

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
from sklearn.calibration import calibration_curve
from sklearn.metrics import brier_score_loss

import tuner
from examples.demo_data import greenhouse, kilns
from tests.conftest import Server, wait_for_job

pytestmark = pytest.mark.e2e
SVG = {"s": "http://www.w3.org/2000/svg"}
KILN_CATEGORICALS = ("kiln", "clay_body", "shelf_position")


def _run_job(client, frame: pd.DataFrame, target: str, trials: int, seed: int) -> dict:
    up = client.post("/v1/datasets", params={"name": target},
                     content=frame.to_csv(index=False).encode(),
                     headers={"Content-Type": "text/csv"})
    assert up.status_code == 201, up.text
    sub = client.post("/v1/jobs", json={"dataset_id": up.json()["id"], "target": target,
                                        "budget": {"trials": trials}, "seed": seed})
    assert sub.status_code == 202, sub.text
    return wait_for_job(client, sub.json()["id"])


@pytest.fixture(scope="module")
def jobs(server: Server) -> dict:
    kiln_frame, green_frame = kilns(n_rows=400, seed=4), greenhouse(n_rows=300, seed=4)
    with server.client() as client:
        kiln = _run_job(client, kiln_frame, "defect", 5, seed=2)
        green = _run_job(client, green_frame, "yield_kg_per_m2", 4, seed=2)
        out = {"kiln": kiln, "green": green, "kiln_frame": kiln_frame}
        for name in ("kiln", "green"):
            assert out[name]["status"] == "succeeded", (out[name], server.log())
            out[f"{name}_model"] = client.get(f"/v1/models/{out[name]['model_id']}").json()
            out[f"{name}_trials"] = client.get(f"/v1/jobs/{out[name]['id']}/trials").json()
    return out


def _plain_kiln_frame(frame: pd.DataFrame, features: list[dict]) -> pd.DataFrame:
    """The kiln features as LightGBM sees them, built with plain pandas (a date's calendar
    parts from pandas' own .dt accessors, in UTC)."""
    plain = pd.DataFrame(index=frame.index)
    for feature in features:
        name = feature["name"]
        if name in KILN_CATEGORICALS:
            plain[name] = pd.Categorical(frame[name].astype(object))
        elif feature.get("parts"):
            stamps = pd.to_datetime(frame[name], utc=True)
            values = {"weekday": stamps.dt.day_of_week, "day": stamps.dt.day,
                      "month": stamps.dt.month, "hour": stamps.dt.hour,
                      "elapsed_days": (stamps - pd.Timestamp(0, tz="UTC")).dt.total_seconds()
                      / 86400}
            for part, column in zip(feature["parts"], feature["model_columns"], strict=True):
                plain[column] = values[part].astype(float)
        else:
            plain[name] = frame[name].astype(float)
    return plain


def test_model_reports_intervals_and_diagnostics(jobs: dict) -> None:
    model = jobs["kiln_model"]
    ev = model["details"]["evaluation"]
    intervals = ev["holdout_intervals"]
    assert set(intervals) == set(model["holdout"])
    for name, iv in intervals.items():
        assert iv["low"] <= model["holdout"][name] <= iv["high"]
        assert iv["estimate"] == pytest.approx(model["holdout"][name])
        assert iv["level"] == 0.95 and iv["resamples"] > 900
    gap = ev["optimism"]
    assert gap["cv_mean"] == pytest.approx(model["cv"]["mean"])
    assert gap["worse_by"] == pytest.approx(model["cv"]["mean"] - model["holdout"]["roc_auc"])
    curve = ev["learning_curve"]
    best_trial = next(t for t in jobs["kiln_trials"]["items"]
                      if t["number"] == model["trial_number"])
    # The curve refits fold 0 exactly as the search did, so it stops at the same round.
    assert curve["best_round"] == best_trial["best_iterations"][0]
    assert len(curve["train"]) == len(curve["valid"]) >= curve["best_round"]
    assert ev["leaves"]["leaves"] > 0
    importances = ev["hyperparameter_importance"]["importances"]
    assert importances and sum(importances.values()) == pytest.approx(1.0, abs=1e-6)


def test_calibration_matches_sklearn(server: Server, jobs: dict) -> None:
    model, frame, job = jobs["kiln_model"], jobs["kiln_frame"], jobs["kiln"]
    with server.client() as client:
        text = client.get(f"/v1/models/{model['id']}/file").text
    data = tuner.prepare(frame, target="defect")
    plan = tuner.plan_validation(data, strategy=job["spec"]["cv"]["strategy"], n_folds=5,
                                 holdout_fraction=0.2, seed=2)
    proba = lgb.Booster(model_str=text).predict(data.X.iloc[plan.holdout_idx])
    y = data.y[plan.holdout_idx]
    cal = model["details"]["evaluation"]["calibration"]
    # References: sklearn.calibration.calibration_curve (uniform bins) and brier_score_loss.
    observed, predicted = calibration_curve(y, proba, n_bins=10, strategy="uniform")
    np.testing.assert_allclose(cal["observed"], observed, atol=1e-12)
    np.testing.assert_allclose(cal["mean_predicted"], predicted, atol=1e-12)
    assert cal["brier"] == pytest.approx(brier_score_loss(y, proba), abs=1e-12)
    assert sum(cal["counts"]) == len(y)


def test_served_probabilities_are_the_model_files(server: Server, jobs: dict,
                                                 tmp_path) -> None:
    model, frame = jobs["kiln_model"], jobs["kiln_frame"].head(60)
    features = frame.drop(columns=["defect"])
    rows = [{k: (None if pd.isna(v) else v) for k, v in r.items()}
            for r in features.to_dict(orient="records")]
    with server.client() as client:
        served = client.post(f"/v1/models/{model['id']}/predictions",
                             json={"rows": rows}).json()
        (tmp_path / "m.txt").write_bytes(client.get(f"/v1/models/{model['id']}/file").content)
    calibration = model["details"]["calibration"]
    assert isinstance(calibration["applied"], bool)
    assert set(calibration["oof_log_loss"]) == {"before", "after"}
    # Reference: LightGBM's own predict on the downloaded file, nothing of ours.
    own = lgb.Booster(model_file=str(tmp_path / "m.txt")).predict(
        _plain_kiln_frame(frame, model["feature_schema"]["features"]))
    got = np.array([p[1] for p in served["probabilities"]])
    np.testing.assert_allclose(got, own, rtol=0, atol=1e-9)


def test_job_warnings_stay_silent_on_demo_data(jobs: dict) -> None:
    for name in ("kiln", "green"):
        assert not [w for w in jobs[name]["warnings"] if "leakage" in w or "copy of" in w]


def test_explain_contributions_sum_to_raw_score(server: Server, jobs: dict, tmp_path) -> None:
    model, frame = jobs["kiln_model"], jobs["kiln_frame"].head(30)
    features = frame.drop(columns=["defect"])
    rows = [{k: (None if pd.isna(v) else v) for k, v in r.items()}
            for r in features.to_dict(orient="records")]
    with server.client() as client:
        served = client.post(f"/v1/models/{model['id']}/predictions",
                             params={"explain": "true"}, json={"rows": rows}).json()
        plain_json = client.post(f"/v1/models/{model['id']}/predictions",
                                 json={"rows": rows}).json()
        as_csv = client.post(f"/v1/models/{model['id']}/predictions?explain=true",
                             content=features.to_csv(index=False),
                             headers={"Content-Type": "text/csv"})
        (tmp_path / "m.txt").write_bytes(client.get(f"/v1/models/{model['id']}/file").content)
    assert plain_json.get("contributions") is None  # only on request
    schema = model["feature_schema"]["features"]
    names = [n for f in schema for n in f.get("model_columns", [f["name"]])]
    booster = lgb.Booster(model_file=str(tmp_path / "m.txt"))
    plain = _plain_kiln_frame(frame, schema)
    # References: LightGBM's own Booster.predict with raw_score and pred_contrib.
    raw = booster.predict(plain, raw_score=True)
    contrib = booster.predict(plain, pred_contrib=True)
    got = np.array([[r["features"][n] for n in names] + [r["bias"]]
                    for r in served["contributions"]])
    assert len(got) == len(frame)
    np.testing.assert_allclose(got.sum(axis=1), raw, atol=1e-9)  # TreeSHAP: sum = raw score
    np.testing.assert_allclose(got, contrib, atol=1e-12)
    assert served["contribution_scale"].startswith("log-odds")
    table = pd.read_csv(io.StringIO(as_csv.text))
    np.testing.assert_allclose(table[[f"contribution_{n}" for n in [*names, "bias"]]], contrib,
                               atol=1e-9)


def _plot(server: Server, job_id: str, name: str) -> ET.Element:
    with server.client() as client:
        response = client.get(f"/v1/jobs/{job_id}/plots/{name}.svg")
    assert response.status_code == 200, response.text
    assert response.headers["content-type"].startswith("image/svg+xml")
    root = ET.fromstring(response.content)  # well-formed XML or this raises
    assert root.tag == "{http://www.w3.org/2000/svg}svg"
    return root


def _texts(root: ET.Element) -> str:
    return " ".join(t.text or "" for t in root.iter("{http://www.w3.org/2000/svg}text"))


def _path_points(root: ET.Element, gid: str) -> int:
    d = root.find(f".//s:g[@id='{gid}']//s:path", SVG).get("d")
    return len(re.findall(r"[ML]", d))


def _bars(root: ET.Element) -> int:
    return sum(1 for e in root.iter() if (e.get("id") or "").startswith("bar-"))


def test_plots_are_svg_with_one_mark_per_datum(server: Server, jobs: dict) -> None:
    job, model = jobs["kiln"], jobs["kiln_model"]
    ev = model["details"]["evaluation"]
    trials = jobs["kiln_trials"]["items"]
    complete = [t for t in trials if t["state"] == "complete"]

    root = _plot(server, job["id"], "history")
    assert len(root.findall(".//s:g[@id='trials']//s:use", SVG)) == len(complete)
    assert "trial number" in _texts(root) and "roc_auc" in _texts(root)

    root = _plot(server, job["id"], "hyperparameters")
    assert _bars(root) == min(15, len(ev["hyperparameter_importance"]["importances"]))
    assert "fANOVA" in _texts(root)

    root = _plot(server, job["id"], "features")
    assert _bars(root) == min(15, len(model["feature_importance"]))

    root = _plot(server, job["id"], "learning")
    assert _path_points(root, "valid") == len(ev["learning_curve"]["valid"])
    assert _path_points(root, "train") == len(ev["learning_curve"]["train"])
    assert "boosting round" in _texts(root)

    root = _plot(server, job["id"], "calibration")
    assert len(root.findall(".//s:g[@id='bins']//s:use", SVG)) == len(ev["calibration"]["counts"])

    root = _plot(server, job["id"], "gains")  # the origin plus one point per share
    assert _path_points(root, "gains") == len(ev["outcomes"]["gains"]["share"]) + 1
    root = _plot(server, job["id"], "confusion")
    cells = [e for e in root.iter() if (e.get("id") or "").startswith("cell-")]
    assert len(cells) == 4


def test_plot_errors_are_problem_documents(server: Server, jobs: dict) -> None:
    with server.client() as client:
        missing = client.get(f"/v1/jobs/{jobs['green']['id']}/plots/calibration.svg")
        unknown = client.get(f"/v1/jobs/{jobs['green']['id']}/plots/pie.svg")
        nojob = client.get("/v1/jobs/job_nothere/plots/history.svg")
    assert missing.status_code == 404  # regression has no calibration curve
    assert missing.headers["content-type"].startswith("application/problem+json")
    assert unknown.status_code == 422 and nojob.status_code == 404


def test_report_page_is_self_contained(server: Server, jobs: dict) -> None:
    job = jobs["green"]
    with server.client() as client:
        page = client.get(f"/v1/jobs/{job['id']}/report")
        board = client.get(f"/v1/jobs/{job['id']}/leaderboard").json()
    assert page.status_code == 200 and page.headers["content-type"].startswith("text/html")
    html = page.text
    # No external requests: every src/href is relative, and no scripts at all.
    assert not re.findall(r"""(?:src|href)=["'](?:https?:)?//""", html)
    assert "<script" not in html
    assert 'http-equiv="refresh"' not in html  # finished: nothing left to watch
    body = html.split("<table id='leaderboard'>")[1].split("</table>")[0]
    assert body.count("<tr") - 1 == min(20, board["total"])
    for name in ("history", "hyperparameters", "features", "learning"):
        assert f'src="plots/{name}.svg"' in html
    assert "calibration.svg" not in html  # regression


def test_report_refreshes_while_a_job_waits(server: Server, jobs: dict) -> None:
    frame = greenhouse(n_rows=200, seed=9)
    with server.client() as client:
        up = client.post("/v1/datasets", content=frame.to_csv(index=False).encode(),
                         headers={"Content-Type": "text/csv"}).json()
        job = client.post("/v1/jobs", json={"dataset_id": up["id"], "target": "yield_kg_per_m2",
                                            "budget": {"trials": 50}}).json()
        html = client.get(f"/v1/jobs/{job['id']}/report").text
        client.post(f"/v1/jobs/{job['id']}/cancel")
        wait_for_job(client, job["id"])
    assert 'http-equiv="refresh"' in html


def test_report_page_shows_calibration(server: Server, jobs: dict) -> None:
    model = jobs["kiln_model"]
    with server.client() as client:
        html = client.get(f"/v1/jobs/{jobs['kiln']['id']}/report").text
    cal = model["details"]["calibration"]
    paragraph = html.split("id='calibration'>")[1].split("</p>")[0]
    assert ("Probabilities calibrated" in paragraph) == cal["applied"]
    assert "out-of-fold log loss" in paragraph and "hold-out log loss" in paragraph


def test_gain_over_defaults_is_reported(server: Server, jobs: dict) -> None:
    for name in ("kiln", "green"):
        model = jobs[f"{name}_model"]
        gain = model["details"]["gain_over_defaults"]
        assert gain["available"] and gain["baseline_trial"] == 0
        assert gain["low"] <= gain["gain"] <= gain["high"]
        assert gain["tuned"] == pytest.approx(model["holdout"][model["metric"]], rel=1e-9)
        with server.client() as client:
            html = client.get(f"/v1/jobs/{jobs[name]['id']}/report").text
        sentence = html.split("id='gain'")[1].split("</p>")[0]
        assert ("Tuning gained" in sentence) == (gain["helped"] and not gain["same_trial"])
        assert ("did not help" in sentence) == (not gain["helped"] and not gain["same_trial"])

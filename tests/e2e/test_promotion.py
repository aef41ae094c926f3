"""Champion and challenger on a real server: jobs that ask to be promoted move a channel
only when their model is better beyond noise (or the channel is empty, or the rule is
'always'); comparisons of any two models computed by a worker."""

from __future__ import annotations

import time
from collections.abc import Iterator

import lightgbm as lgb
import numpy as np
import pytest
from sklearn.metrics import roc_auc_score

from examples.demo_data import kilns
from tests.conftest import Server, wait_for_job
from tests.e2e.servingkit import features_frame, upload

pytestmark = pytest.mark.e2e
# Stumps at a slow rate: no interaction between clay body and temperature can be learnt.
POOR = {"num_leaves": 2, "learning_rate": 0.01, "min_data_in_leaf": 100,
        "feature_fraction": 0.4}


@pytest.fixture(scope="module")
def promoted(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict]:
    home = tmp_path_factory.mktemp("promote") / "home"
    server = Server(home=home, workers=1).start()
    try:
        with server.client() as client:
            ds = upload(client, kilns(n_rows=2000, seed=21), "kilns")
            fresh = upload(client, kilns(n_rows=1500, seed=99), "kilns-fresh")

            def job(rule: str, space: dict | None, trials: int) -> dict:
                body = {"dataset_id": ds, "target": "defect", "exclude": ["firing_id"],
                        "budget": {"trials": trials}, "cv": {"folds": 3}, "seed": 3,
                        "promote": {"channel": "kilns", "rule": rule},
                        **({"search_space": space} if space else {})}
                made = client.post("/v1/jobs", json=body)
                assert made.status_code == 202, made.text
                return wait_for_job(client, made.json()["id"])

            jobs = {"first_poor": job("if_better", POOR, 2), "good": job("if_better", None, 6),
                    "worse": job("if_better", POOR, 2), "forced": job("always", POOR, 2)}
            assert all(j["status"] == "succeeded" for j in jobs.values()), server.log()[-3000:]
            channel = client.get("/v1/channels/kilns").json()
            yield {"server": server, "jobs": jobs, "channel": channel, "dataset": ds,
                   "fresh": fresh}
    finally:
        server.stop()


def test_promotion_rules(promoted: dict) -> None:
    jobs = promoted["jobs"]
    first, good, worse, forced = (jobs[k] for k in ("first_poor", "good", "worse", "forced"))
    assert first["promotion"]["moved"] is True
    assert first["promotion"]["reason"] == "the channel was empty"
    # The better job moves the channel: its model beats the poor one beyond noise on the
    # job's own hold-out, which neither model was trained on (same split).
    p = good["promotion"]
    assert p["moved"] is True, p
    assert p["comparison"]["comparable"] is True and p["comparison"]["better"] == good[
        "model_id"]
    low, high = p["comparison"]["interval"]
    assert 0 < low <= p["comparison"]["difference"] <= high
    # A worse one does not.
    w = worse["promotion"]
    assert w["moved"] is False and w["previous_model_id"] == good["model_id"], w
    assert w["comparison"]["better"] != worse["model_id"]
    # 'always' moves whatever the comparison says.
    assert forced["promotion"]["moved"] is True
    history = promoted["channel"]["history"]
    assert [h["model_id"] for h in history] == [forced["model_id"], good["model_id"],
                                               first["model_id"]]
    assert all(h["action"] == "promote" for h in history)
    assert [h["job_id"] for h in history] == [forced["id"], good["id"], first["id"]]
    assert promoted["channel"]["model_id"] == forced["model_id"]


def test_comparison_of_two_models_matches_sklearn(promoted: dict) -> None:
    server: Server = promoted["server"]
    a, b = promoted["jobs"]["first_poor"]["model_id"], promoted["jobs"]["good"]["model_id"]
    with server.client() as client:
        made = client.post("/v1/comparisons", json={"models": [a, b],
                                                    "dataset_id": promoted["fresh"]})
        assert made.status_code == 202, made.text
        on_training = client.post("/v1/comparisons", json={"models": [a, b],
                                                           "dataset_id": promoted["dataset"]})
        same = client.post("/v1/comparisons", json={"models": [a, a],
                                                    "dataset_id": promoted["fresh"]})
        deadline = time.monotonic() + 120
        while True:
            got = client.get(f"/v1/comparisons/{made.json()['id']}").json()
            seen = client.get(f"/v1/comparisons/{on_training.json()['id']}").json()
            if got["status"] != "queued" and got["status"] != "running" and seen[
                    "status"] not in ("queued", "running"):
                break
            assert time.monotonic() < deadline
            time.sleep(0.3)
        models = {m: client.get(f"/v1/models/{m}").json() for m in (a, b)}
        texts = {m: client.get(f"/v1/models/{m}/file").text for m in (a, b)}
    assert got["status"] == "succeeded", got
    result = got["result"]
    # Reference: sklearn's roc_auc_score on LightGBM's own Booster.predict of the rows.
    rows = kilns(n_rows=1500, seed=99)
    for m in (a, b):
        booster = lgb.Booster(model_str=texts[m])
        prob = booster.predict(features_frame(booster, models[m], rows))
        assert result["scores"][m] == pytest.approx(roc_auc_score(rows["defect"], prob),
                                                    abs=1e-9)
    assert result["difference"] == pytest.approx(result["scores"][b] - result["scores"][a])
    low, high = result["interval"]
    assert low <= result["difference"] <= high
    assert result["comparable"] is True and result["rows"] == 1500
    assert np.isfinite(low) and result["resamples"] > 900
    assert seen["status"] == "succeeded" and seen["result"]["comparable"] is False
    assert any("trained on some of these rows" in r for r in seen["result"]["reasons"])
    assert same.status_code == 422


def test_models_behind_a_channel_cannot_be_deleted(promoted: dict) -> None:
    server: Server = promoted["server"]
    serving, spare = promoted["jobs"]["forced"]["model_id"], promoted["jobs"]["worse"][
        "model_id"]
    with server.client() as client:
        refused = client.delete(f"/v1/models/{serving}")
        still = client.get(f"/v1/models/{serving}/file")
        deleted = client.delete(f"/v1/models/{spare}")
        gone = client.get(f"/v1/models/{spare}")
        listed = [m["id"] for m in client.get("/v1/models").json()["items"]]
    assert refused.status_code == 409
    assert [e["channel"] for e in refused.json()["errors"]] == ["kilns"]
    assert still.status_code == 200
    assert deleted.status_code == 204 and gone.status_code == 404
    assert spare not in listed and serving in listed
    assert not list(server.home.rglob(f"{spare}.txt"))


def test_the_report_page_shows_the_comparison(promoted: dict) -> None:
    good = promoted["jobs"]["good"]
    with promoted["server"].client() as client:
        page = client.get(f"/v1/jobs/{good['id']}/report").text
    c = good["promotion"]["comparison"]
    assert 'id="promotion"' in page and "moved to this job" in page
    assert f"{c['interval'][0]:.4g}" in page and f"{c['interval'][1]:.4g}" in page

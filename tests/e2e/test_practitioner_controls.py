"""Declared column kinds, fixed parameters and constraints through a real server and
worker: upload, job, model file and predictions."""

from __future__ import annotations

import json
import re

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest

import tuner
from tests.conftest import Server, wait_for_job

pytestmark = pytest.mark.e2e


def _stores(n: int = 400, seed: int = 8) -> pd.DataFrame:
    """Weekly sales of a bakery chain's stores; ids are digits with leading zeros."""
    rng = np.random.default_rng(seed)
    stores = np.array(["0007", "0042", "0100", "0013", "0301", "0099"])
    effect = dict(zip(stores, [2.0, -1.0, 1.5, -2.0, 0.5, 0.0], strict=True))
    store = rng.choice(stores, n)
    price = rng.uniform(1, 5, n)
    sales = (np.array([effect[s] for s in store]) - 0.8 * price + np.sin(3 * price)
             + rng.normal(0, 0.3, n))
    return pd.DataFrame({"store_id": store, "price": price, "note": "x", "sales": sales})


def _upload(client, frame: pd.DataFrame, **params) -> dict:
    response = client.post("/v1/datasets", params={"name": "stores", **params},
                           content=frame.to_csv(index=False).encode(),
                           headers={"Content-Type": "text/csv"})
    assert response.status_code == 201, response.text
    return response.json()


def test_bad_upload_kinds_are_422s_and_store_nothing(server: Server) -> None:
    body = _stores().to_csv(index=False).encode()
    with server.client() as client:
        before = client.get("/v1/datasets").json()["total"]
        for kinds, field in (("store_id:colour", "kinds.store_id"),
                             ("nope:numeric", "kinds.nope"),
                             ("note:numeric", "kinds.note"),
                             ("store_id", "kinds")):
            response = client.post("/v1/datasets", params={"kinds": kinds}, content=body,
                                   headers={"Content-Type": "text/csv"})
            assert response.status_code == 422, response.text
            assert field in [e["field"] for e in response.json()["errors"]]
        assert client.get("/v1/datasets").json()["total"] == before


def test_multipart_kinds_field_is_the_same_map(server: Server) -> None:
    with server.client() as client:
        response = client.post("/v1/datasets", files={
            "file": ("stores.csv", _stores().to_csv(index=False).encode(), "text/csv")},
            data={"kinds": "store_id:categorical,note:ignore"})
        assert response.status_code == 201, response.text
    columns = {c["name"]: c for c in response.json()["columns"]}
    assert columns["store_id"]["kind"] == "categorical"
    assert columns["store_id"]["declared"] == "categorical"
    assert columns["note"]["declared"] == "ignore"


def test_declared_store_ids_train_and_predict_as_categories(server: Server) -> None:
    frame = _stores()
    with server.client() as client:
        dataset = _upload(client, frame, kinds="store_id:categorical")
        columns = {c["name"]: c for c in dataset["columns"]}
        assert columns["store_id"]["kind"] == "categorical"
        assert columns["store_id"]["distinct"] == 6
        response = client.post("/v1/jobs", json={
            "dataset_id": dataset["id"], "target": "sales", "budget": {"trials": 3},
            "column_kinds": {"note": "ignore"}, "monotone": {"price": -1},
            "fixed": {"min_data_in_bin": 4}, "max_rounds": 80, "early_stopping_rounds": 10})
        assert response.status_code == 202, response.text
        job = wait_for_job(client, response.json()["id"])
        assert job["status"] == "succeeded", (job, server.log())
        assert job["spec"]["column_kinds"] == {"store_id": "categorical", "note": "ignore"}
        model_id = job["model_id"]
        model = client.get(f"/v1/models/{model_id}").json()
        kinds = {f["name"]: f["kind"] for f in model["feature_schema"]["features"]}
        assert kinds == {"store_id": "categorical", "price": "numeric"}
        text = client.get(f"/v1/models/{model_id}/file").text
        csv_rows = frame.head(5).to_csv(index=False)
        as_csv = client.post(f"/v1/models/{model_id}/predictions", content=csv_rows,
                             headers={"Content-Type": "text/csv"})
        as_json = client.post(f"/v1/models/{model_id}/predictions", json={
            "rows": frame.head(5)[["store_id", "price"]].to_dict(orient="records")})
        unseen = client.post(f"/v1/models/{model_id}/predictions",
                             json={"rows": [{"store_id": 7, "price": 2.0}]})
        plots = {name: client.get(f"/v1/jobs/{job['id']}/plots/{name}.svg")
                 for name in ("predicted", "residuals", "gains")}
    assert plots["predicted"].status_code == 200 and 'id="points"' in plots["predicted"].text
    assert plots["residuals"].status_code == 200
    assert plots["gains"].status_code == 404  # binary only
    regression = model["details"]["evaluation"]["outcomes"]["regression"]
    assert len(regression["actual"]) == model["holdout_rows"]
    # LightGBM's own model file: the parameters section lists store_id as categorical, and
    # the job's fixed parameter is recorded there too.
    names = re.search(r"^feature_names=(.*)$", text, re.M).group(1).split(" ")
    found = re.search(r"^\[categorical_feature: (.*)\]$", text, re.M).group(1)
    assert [names[int(i)] for i in found.split(",")] == ["store_id"]
    assert "[min_data_in_bin: 4]" in text
    assert re.search(r"^\[monotone_constraints: (.*)\]$", text, re.M).group(1) == "0,-1"
    assert as_csv.status_code == 200, as_csv.text
    assert as_json.status_code == 200, as_json.text
    # "0007" stays text: the number 7 is not one of the store ids the model knows.
    assert unseen.status_code == 422 and "0007" in unseen.text
    # Reference: LightGBM's own predict on the same rows, categories as trained.
    booster = lgb.Booster(model_str=text)
    levels = model["feature_schema"]["features"][0]["levels"]
    X = pd.DataFrame({"store_id": pd.Categorical(frame.head(5)["store_id"], categories=levels),
                      "price": frame.head(5)["price"]})
    expected = booster.predict(X)
    got = [float(line.split(",")[-1]) for line in as_csv.text.strip().splitlines()[1:]]
    np.testing.assert_allclose(got, expected, rtol=1e-9)
    np.testing.assert_allclose(as_json.json()["predictions"], expected, rtol=1e-9)


def test_binary_job_reports_gains_confusion_and_segments(server: Server, tmp_path) -> None:
    from sklearn.metrics import confusion_matrix

    from examples.demo_data import kilns

    frame = kilns(n_rows=500, seed=6)
    with server.client() as client:
        dataset = _upload(client, frame)
        body = {"dataset_id": dataset["id"], "target": "defect", "budget": {"trials": 3},
                "exclude": ["firing_id", "kiln"], "segments": ["kiln", "clay_body"],
                "max_rounds": 100,
                "decision": {"false_positive_cost": 1, "false_negative_cost": 4}}
        response = client.post("/v1/jobs", json=body)
        assert response.status_code == 202, response.text
        job = wait_for_job(client, response.json()["id"])
        assert job["status"] == "succeeded", (job, server.log())
        model = client.get(f"/v1/models/{job['model_id']}").json()
        svgs = {name: client.get(f"/v1/jobs/{job['id']}/plots/{name}.svg")
                for name in ("gains", "confusion", "segments", "predicted")}
        report = client.get(f"/v1/jobs/{job['id']}/report").text
        text = client.get(f"/v1/models/{job['model_id']}/file").text
    outcomes = model["details"]["evaluation"]["outcomes"]
    assert svgs["gains"].status_code == 200 and 'id="gains"' in svgs["gains"].text
    assert svgs["confusion"].status_code == 200 and 'id="cell-1-1"' in svgs["confusion"].text
    assert svgs["segments"].status_code == 200 and 'id="segment-0"' in svgs["segments"].text
    assert svgs["predicted"].status_code == 404  # a regression plot, not for binary
    assert "By segment" in report and "plots/gains.svg" in report
    columns = {c["column"]: c for c in outcomes["segments"]["columns"]}
    assert set(columns) == {"kiln", "clay_body"}
    assert sum(s["rows"] for s in columns["kiln"]["segments"]) == model["holdout_rows"]
    assert "kiln" not in [f["name"] for f in model["feature_schema"]["features"]]
    # Reference: the same hold-out rows (the job's own request, replayed), LightGBM's own
    # predict of the served model file, scikit-learn's confusion_matrix at the threshold
    # the model serves labels with (class 1 when its probability exceeds it).
    from service.api.schemas import JobCreate
    from service.jobspec import build_run

    path = tmp_path / "kilns.csv"
    frame.to_csv(path, index=False)
    run = build_run(JobCreate(**body).model_dump(mode="json"), tuner.read_table(path, "csv"))
    rows = run.plan.holdout_idx
    prob = lgb.Booster(model_str=text).predict(run.data.X.iloc[rows])
    threshold = model["decision"]["threshold"]
    assert outcomes["confusion"]["threshold"] == threshold != 0.5
    assert outcomes["confusion"]["matrix"] == confusion_matrix(
        run.data.y[rows], (prob > threshold).astype(int), labels=[0, 1]).tolist()
    assert lgb.Booster(model_str=text).num_trees() >= 1


def test_every_control_is_reachable_from_the_command_line(server: Server, tmp_path) -> None:
    from tests.e2e.test_practitioner import gk

    path = tmp_path / "stores.csv"
    _stores().to_csv(path, index=False)
    upload = gk(server, "upload", str(path), "--kind", "store_id=categorical", "-f", "json")
    assert upload.returncode == 0, upload.stderr
    dataset = json.loads(upload.stdout)
    columns = {c["name"]: c for c in dataset["columns"]}
    assert columns["store_id"]["declared"] == "categorical"
    tune = gk(server, "tune", dataset["id"], "--target", "sales", "--trials", "2",
              "--kind", "note=ignore", "--monotone", "price=-1",
              "--interaction", "store_id,price", "--fixed", "min_data_in_bin=4",
              "--fixed", "boosting=gbdt", "--max-rounds", "70",
              "--early-stopping-rounds", "7", "--segment", "store_id", "-f", "json")
    assert tune.returncode == 0, tune.stderr
    spec = json.loads(tune.stdout)["spec"]
    assert spec["column_kinds"] == {"store_id": "categorical", "note": "ignore"}
    assert spec["monotone"] == {"price": -1}
    assert spec["interaction_constraints"] == [["store_id", "price"]]
    assert spec["fixed"] == {"min_data_in_bin": 4, "boosting": "gbdt"}
    assert spec["max_rounds"] == 70 and spec["early_stopping_rounds"] == 7
    assert spec["segments"] == ["store_id"]
    refused = gk(server, "tune", dataset["id"], "--target", "sales", "--fixed", "seed=3")
    assert refused.returncode == 4 and "fixed.seed" in refused.stderr

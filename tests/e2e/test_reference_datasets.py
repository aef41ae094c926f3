"""Tuning on published datasets that scikit-learn ships, through the real service."""

from __future__ import annotations

import lightgbm as lgb
import numpy as np
import pandas as pd
import pytest
from sklearn.datasets import load_breast_cancer, load_diabetes
from sklearn.metrics import mean_squared_error, roc_auc_score

import tuner
from tests.conftest import Server, wait_for_job

pytestmark = [pytest.mark.e2e, pytest.mark.slow]


def run_job(server: Server, frame: pd.DataFrame, body: dict) -> tuple[dict, dict, str]:
    with server.client() as client:
        dataset = client.post("/v1/datasets", params={"name": "reference"},
                              content=frame.to_csv(index=False).encode(),
                              headers={"Content-Type": "text/csv"}).json()
        job = client.post("/v1/jobs", json={"dataset_id": dataset["id"], **body}).json()
        job = wait_for_job(client, job["id"], timeout=600)
        assert job["status"] == "succeeded", (job, server.log()[-3000:])
        model = client.get(f"/v1/models/{job['model_id']}").json()
        text = client.get(f"/v1/models/{job['model_id']}/file").text
    return job, model, text


def test_breast_cancer_reaches_auc_097(server: Server) -> None:
    # Breast Cancer Wisconsin (Diagnostic), Wolberg et al., UCI; bundled with scikit-learn.
    frame = load_breast_cancer(as_frame=True).frame
    job, model, text = run_job(server, frame, {"target": "target", "budget": {"trials": 20},
                                               "seed": 0})
    assert job["progress"]["trials_completed"] + job["progress"]["trials_pruned"] == 20
    data = tuner.prepare(frame, target="target")
    plan = tuner.plan_validation(data, strategy="stratified", n_folds=5, holdout_fraction=0.2,
                                 seed=0)
    proba = lgb.Booster(model_str=text).predict(data.X.iloc[plan.holdout_idx])
    # Reference: sklearn.metrics.roc_auc_score on the stored model's hold-out predictions.
    auc = roc_auc_score(data.y[plan.holdout_idx], proba)
    assert model["holdout"]["roc_auc"] == pytest.approx(auc, abs=1e-12)
    # The bar is the service's own requirement. Source for what is reachable: gradient-
    # boosted and other standard classifiers score a ROC AUC of about 0.99 on this set in
    # common practice (scikit-learn's examples and many published comparisons; a value
    # from memory), so 0.97 leaves room for a short search without hiding a broken one.
    assert auc >= 0.97


def test_diabetes_tuned_is_no_worse_than_defaults(server: Server) -> None:
    # Diabetes data of Efron, Hastie, Johnstone & Tibshirani (2004); bundled with scikit-learn.
    frame = load_diabetes(as_frame=True).frame
    job, model, text = run_job(server, frame, {"target": "target", "budget": {"trials": 20},
                                               "seed": 0})
    data = tuner.prepare(frame, target="target")
    plan = tuner.plan_validation(data, strategy="kfold", n_folds=5, holdout_fraction=0.2,
                                 seed=0)
    X_train, y_train = data.X.iloc[plan.train_idx], data.y[plan.train_idx]
    X_hold, y_hold = data.X.iloc[plan.holdout_idx], data.y[plan.holdout_idx]
    # Doing nothing: LightGBM's default parameters (100 rounds) on the same rows.
    default = lgb.train({"objective": "regression", "verbosity": -1, "seed": 0},
                        lgb.Dataset(X_train, y_train), num_boost_round=100)
    rmse_default = float(np.sqrt(mean_squared_error(y_hold, default.predict(X_hold))))
    tuned = lgb.Booster(model_str=text).predict(X_hold)
    rmse_tuned = float(np.sqrt(mean_squared_error(y_hold, tuned)))
    assert model["holdout"]["rmse"] == pytest.approx(rmse_tuned, rel=1e-12)
    assert rmse_tuned <= rmse_default, (rmse_tuned, rmse_default)

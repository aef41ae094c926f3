"""Job options through the HTTP layer (no worker): search-space, objective, selection,
warm-start checks as 422 problem documents, and what the effective spec records."""

from __future__ import annotations

import lightgbm
import numpy
import optuna
import pandas as pd
import pytest

from examples.demo_data import greenhouse
from tests.service.conftest import LiveApi, prepared
from tests.service.test_api import assert_problem, kiln_csv, upload

# Each payload is wrong in exactly one parameter, which the problem document must name.
BAD_SPACES = [
    ({"num_leaves": {"low": 64, "high": 8}}, "search_space.num_leaves"),  # inverted range
    ({"learning_rate": {"low": 0, "high": 0.3, "log": True}}, "search_space.learning_rate"),
    ({"learning_rate": -0.1}, "search_space.learning_rate"),  # LightGBM wants > 0
    ({"feature_fraction": {"low": 0.5, "high": 1.5}}, "search_space.feature_fraction"),
    ({"bagging_fraction": 0}, "search_space.bagging_fraction"),  # (0, 1] in LightGBM
    ({"num_leaves": 1}, "search_space.num_leaves"),  # LightGBM needs at least 2
    ({"num_leaves": {"low": 8.5, "high": 64}}, "search_space.num_leaves"),  # not an integer
    ({"min_data_in_leaf": {"choices": []}}, "search_space.min_data_in_leaf"),
    ({"lambda_l1": {"low": 1, "high": 2, "log": "yes"}}, "search_space.lambda_l1"),
    ({"extra_trees": {"low": 0, "high": 1}}, "search_space.extra_trees"),
    ({"tweedie_variance_power": 2.5}, "search_space.tweedie_variance_power"),
    ({"num_trees": 100}, "search_space.num_trees"),  # unknown: rounds come from CV
    ({"max_bin": {"choices": [255, "many"]}}, "search_space.max_bin"),
]


@pytest.mark.parametrize(("space", "field"), BAD_SPACES)
def test_bad_search_space_is_a_422_naming_the_parameter(api: LiveApi, space, field) -> None:
    with api.client() as client:
        ds = upload(client, kiln_csv()).json()["id"]
        response = client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                                 "search_space": space})
        assert_problem(response, 422, field)
        assert client.get("/v1/jobs").json()["total"] == 0


def _greenhouse_csv() -> bytes:
    return greenhouse(n_rows=150, seed=1).to_csv(index=False).encode()


def test_objective_and_metric_mismatches_name_the_fields(api: LiveApi) -> None:
    with api.client() as client:
        kiln = upload(client, kiln_csv()).json()["id"]
        green = upload(client, _greenhouse_csv(), name="greenhouse").json()["id"]
        job = {"dataset_id": green, "target": "yield_kg_per_m2"}
        body = assert_problem(client.post("/v1/jobs", json={**job, "objective": "hinge"}),
                              422, "objective")
        assert "tweedie" in body["detail"]  # lists what is available
        both = assert_problem(client.post("/v1/jobs", json={
            **job, "objective": "huber", "metric": "poisson_deviance"}), 422, "objective")
        assert "metric" in [e["field"] for e in both["errors"]]
        assert_problem(client.post("/v1/jobs", json={"dataset_id": kiln, "target": "defect",
                                                     "objective": "poisson"}), 422, "objective")
        metric = assert_problem(client.post("/v1/jobs", json={**job, "metric": "roc_auc"}),
                                422, "metric")
        assert "regression" in metric["detail"]
        assert_problem(client.post("/v1/jobs", json={**job, "objective": "quantile",
                                                     "search_space": {"alpha": 1.5}}),
                       422, "search_space.alpha")
        assert_problem(client.post("/v1/jobs", json={**job, "selection": "simplest"}),
                       422, "selection")
        assert_problem(client.post("/v1/jobs", json={**job, "max_parallel_trials": 0}),
                       422, "max_parallel_trials")
        assert_problem(client.post("/v1/jobs", json={**job, "num_threads": 0}),
                       422, "num_threads")
        assert_problem(client.post("/v1/jobs", json={**job, "warm_start_job_id": "job_nope"}),
                       422, "warm_start_job_id")
        # Parallel trials or workers finish in an order that depends on timing.
        both = assert_problem(client.post("/v1/jobs", json={
            **job, "reproducible": True, "max_parallel_trials": 2, "max_workers": 3}),
            422, "max_parallel_trials")
        assert [e["field"] for e in both["errors"]] == ["max_parallel_trials", "max_workers"]
        assert_problem(client.post("/v1/jobs", json={**job, "reproducible": True,
                                                     "max_workers": 2}), 422, "max_workers")
        assert client.get("/v1/jobs").json()["total"] == 0


def test_effective_spec_has_objective_space_and_manifest(api: LiveApi) -> None:
    with api.client() as client:
        dataset = upload(client, _greenhouse_csv(), name="greenhouse").json()
        response = client.post("/v1/jobs", json={
            "dataset_id": dataset["id"], "target": "yield_kg_per_m2", "objective": "tweedie",
            "seed": 3, "selection": "one_se", "final_refit": "all",
            "search_space": {"num_leaves": {"low": 8, "high": 64},
                             "tweedie_variance_power": {"low": 1.1, "high": 1.9}}})
        assert response.status_code == 202, response.text
    job = prepared(api, response.json()["id"])
    spec = job["spec"]
    assert spec["objective"] == "tweedie" and spec["metric"] == "poisson_deviance"
    assert spec["selection"] == "one_se" and spec["final_refit"] == "all"
    assert spec["search_space"]["num_leaves"] == {"type": "int", "low": 8, "high": 64,
                                                  "log": True}
    # 150 rows, 20% held out, 5 folds: 96 fitting rows, so min_data_in_leaf tops out at
    # max(5, 96 // 10) = 9 in the space actually sampled.
    assert spec["search_space"]["min_data_in_leaf"]["high"] == 9
    manifest = spec["manifest"]
    assert manifest["dataset_sha256"] == dataset["sha256"]
    assert manifest["search_space"] == spec["search_space"] and manifest["seed"] == 3
    assert manifest["cv"] == {"folds": 5, "partition_folds": 5, "strategy": "kfold",
                              "group_column": None, "time_column": None}
    assert manifest["versions"]["lightgbm"] == lightgbm.__version__
    assert manifest["versions"]["optuna"] == optuna.__version__
    assert manifest["versions"]["numpy"] == numpy.__version__
    assert manifest["versions"]["pandas"] == pd.__version__


def test_serve_starts_a_worker_per_four_cores() -> None:
    from service.cli import build_parser, default_workers

    assert [default_workers(c) for c in (1, 2, 4, 7, 8, 16)] == [1, 1, 1, 1, 2, 4]
    assert build_parser().parse_args(["serve"]).workers is None  # chosen at start
    assert build_parser().parse_args(["serve", "--workers", "3"]).workers == 3

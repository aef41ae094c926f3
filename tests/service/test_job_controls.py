"""The practitioner's job fields through the HTTP layer (no worker): fixed parameters,
round controls and constraints, refused as 422s naming the field, recorded in the spec."""

from __future__ import annotations

import pytest

from tests.service.conftest import LiveApi, prepared
from tests.service.test_api import assert_problem, kiln_csv, upload

BAD = [
    ({"fixed": {"objective": "binary"}}, "fixed.objective"),
    ({"fixed": {"random_state": 3}}, "fixed.random_state"),
    ({"fixed": {"n_estimators": 10}}, "fixed.n_estimators"),
    ({"fixed": {"device": "gpu"}}, "fixed.device"),
    ({"fixed": {"no_such_parameter": 1}}, "fixed.no_such_parameter"),
    ({"fixed": {"num_leaves": 1}}, "fixed.num_leaves"),
    ({"fixed": {"num_leaves": 15}, "search_space": {"num_leaves": {"low": 8, "high": 16}}},
     "fixed.num_leaves"),
    ({"max_rounds": 0}, "max_rounds"),
    ({"early_stopping_rounds": 0}, "early_stopping_rounds"),
    ({"monotone": {"peak_temp_c": 2}}, "monotone.peak_temp_c"),
    ({"monotone": {"no_such_column": 1}}, "monotone.no_such_column"),
    ({"monotone": {"clay_body": 1}}, "monotone.clay_body"),  # categorical: no order
    ({"interaction_constraints": [["peak_temp_c", "nope"]]}, "interaction_constraints[0]"),
    ({"column_kinds": {"nope": "numeric"}}, "column_kinds.nope"),
    ({"column_kinds": {"kiln": "colour"}}, "column_kinds.kiln"),
    ({"column_kinds": {"defect": "categorical"}}, "column_kinds.defect"),  # the target
    ({"segments": ["no_such_column"]}, "segments"),
    ({"segments": ["kiln"], "holdout_fraction": 0}, "segments"),  # nothing to report on
]


# Only the rows (or LightGBM itself) can tell: the API queues the job, and the worker fails
# it with the problem document submission would have answered.
LATER = [
    ({"fixed": {"boosting": "sideways"}}, "fixed"),  # LightGBM's own refusal
    ({"column_kinds": {"clay_body": "numeric"}}, "column_kinds.clay_body"),  # its values
]


@pytest.mark.parametrize(("extra", "field"), LATER)
def test_problems_only_the_rows_show_fail_the_job_with_a_problem_document(
        api: LiveApi, extra, field) -> None:
    from service.worker.process import Worker

    with api.client() as client:
        ds = upload(client, kiln_csv()).json()["id"]
        response = client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                                 "exclude": ["firing_id"], **extra})
        assert response.status_code == 202, response.text
        assert Worker(api.settings).run_once()
        job = client.get(f"/v1/jobs/{response.json()['id']}").json()
    assert job["status"] == "failed" and job["model_id"] is None
    problem = job["problem"]
    assert problem["status"] == 422 and problem["code"] == "invalid_input"
    assert problem["type"].endswith("/invalid_input") and problem["title"]
    assert field in [e["field"] for e in problem["errors"]], problem
    assert job["error"] == problem["detail"]


@pytest.mark.parametrize(("extra", "field"), BAD)
def test_bad_controls_are_422s_naming_the_field(api: LiveApi, extra, field) -> None:
    with api.client() as client:
        ds = upload(client, kiln_csv()).json()["id"]
        response = client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                                 "exclude": ["firing_id"], **extra})
        assert_problem(response, 422, field)
        assert client.get("/v1/jobs").json()["total"] == 0


def test_controls_are_recorded_in_the_effective_spec(api: LiveApi) -> None:
    with api.client() as client:
        ds = upload(client, kiln_csv()).json()["id"]
        response = client.post("/v1/jobs", json={
            "dataset_id": ds, "target": "defect", "exclude": ["firing_id"],
            "fixed": {"max_bin": 63, "min_data_in_bin": 5, "reg_alpha": 0.5},
            "max_rounds": 300, "early_stopping_rounds": 20,
            "monotone": {"peak_temp_c": 1, "humidity_pct": -1},
            "interaction_constraints": [["peak_temp_c", "hold_minutes"]]})
        assert response.status_code == 202, response.text
    spec = prepared(api, response.json()["id"])["spec"]
    assert spec["max_rounds"] == 300 and spec["early_stopping_rounds"] == 20
    # Tunable ones are fixed points of the space; reg_alpha is LightGBM's lambda_l1.
    assert spec["search_space"]["max_bin"] == {"value": 63}
    assert spec["search_space"]["lambda_l1"] == {"value": 0.5}
    fixed = spec["lightgbm_fixed"]
    assert fixed["min_data_in_bin"] == 5
    features = spec["features"]
    directions = dict(zip(features, fixed["monotone_constraints"], strict=True))
    assert directions["peak_temp_c"] == 1 and directions["humidity_pct"] == -1
    assert sum(abs(d) for d in directions.values()) == 2
    assert fixed["interaction_constraints"] == [
        sorted([features.index("peak_temp_c"), features.index("hold_minutes")])]

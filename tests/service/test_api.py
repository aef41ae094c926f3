"""The HTTP layer without a worker: uploads, job validation, problem documents."""

from __future__ import annotations

import io

import numpy as np
import pandas as pd
import pytest

from examples.demo_data import kilns
from tests.service.conftest import LiveApi, prepared

PROBLEM = "application/problem+json"


def kiln_csv(n: int = 120) -> bytes:
    return kilns(n_rows=n, seed=2).to_csv(index=False).encode()


def upload(client, body: bytes, ctype: str = "text/csv", name: str = "kilns"):
    return client.post("/v1/datasets", params={"name": name}, content=body,
                       headers={"Content-Type": ctype})


def assert_problem(response, status: int, field: str | None = None) -> dict:
    assert response.status_code == status, response.text
    assert response.headers["content-type"].startswith(PROBLEM)
    body = response.json()
    assert body["status"] == status and body["title"] and body["detail"] and body["type"]
    if field is not None:
        assert field in [e["field"] for e in body["errors"]], body
    return body


def test_upload_raw_multipart_and_parquet(api: LiveApi) -> None:
    with api.client() as client:
        raw = upload(client, kiln_csv())
        assert raw.status_code == 201, raw.text
        assert raw.headers["location"] == f"/v1/datasets/{raw.json()['id']}"
        multi = client.post("/v1/datasets", files={"file": ("firings.csv", kiln_csv())},
                            data={"name": "firings"})
        assert multi.status_code == 201, multi.text
        assert multi.json()["name"] == "firings"
        buffer = io.BytesIO()
        kilns(n_rows=120, seed=2).to_parquet(buffer, index=False)
        parquet = upload(client, buffer.getvalue(), "application/vnd.apache.parquet")
        assert parquet.status_code == 201, parquet.text
        assert parquet.json()["source_format"] == "parquet"
        listed = client.get("/v1/datasets").json()
    assert listed["total"] == 3
    assert raw.json()["sha256"] == multi.json()["sha256"]  # same bytes, same digest
    # The same table parsed from CSV and Parquet profiles the same way.
    kinds = lambda d: [(c["name"], c["kind"]) for c in d["columns"]]  # noqa: E731
    assert kinds(raw.json()) == kinds(parquet.json())


def test_delete_dataset_removes_its_file(api: LiveApi) -> None:
    with api.client() as client:
        dataset = upload(client, kiln_csv()).json()
        assert len(api.files()) == 1
        assert client.delete(f"/v1/datasets/{dataset['id']}").status_code == 204
        assert_problem(client.get(f"/v1/datasets/{dataset['id']}"), 404)
    assert api.files() == []


def test_oversized_upload_is_413_and_leaves_nothing(api: LiveApi) -> None:
    big = kilns(n_rows=20_000, seed=1).to_csv(index=False).encode()
    assert len(big) > 1 << 20  # the fixture's limit is 1 MB
    with api.client() as client:
        assert_problem(upload(client, big), 413)

        def chunks():
            for i in range(0, len(big), 65536):
                yield big[i:i + 65536]

        # Chunked (no Content-Length): refused while streaming.
        chunked = client.post("/v1/datasets", content=chunks(),
                              headers={"Content-Type": "text/csv"})
        assert_problem(chunked, 413)
        assert client.get("/v1/datasets").json()["total"] == 0
    assert api.files() == []


@pytest.mark.parametrize(
    ("body", "ctype", "status"),
    [
        (b"PK\x03\x04rest-of-a-zip", "text/csv", 415),
        (b"\x89PNG\r\n\x1a\n....", "text/csv", 415),
        (b"a,b\n1,2\n", "application/json", 415),
        (b"", "text/csv", 422),
        (b"a,b,c\n", "text/csv", 422),
    ],
)
def test_unreadable_uploads(api: LiveApi, body: bytes, ctype: str, status: int) -> None:
    with api.client() as client:
        assert_problem(upload(client, body, ctype), status)
        assert client.get("/v1/datasets").json()["total"] == 0
    assert api.files() == []


def test_job_validation_names_the_field(api: LiveApi) -> None:
    with api.client() as client:
        ds = upload(client, kiln_csv()).json()["id"]
        missing = client.post("/v1/jobs", json={"dataset_id": ds, "target": "defects"})
        body = assert_problem(missing, 422, "target")
        assert "defect" in body["detail"] or "defect" in str(body["errors"])  # lists columns
        assert_problem(client.post("/v1/jobs", json={"dataset_id": "ds_nope", "target": "x"}),
                       422, "dataset_id")
        assert_problem(client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                                     "metric": "rmse"}), 422)
        assert_problem(client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                                     "budget": {"trials": 0}}),
                       422, "budget.trials")
        assert_problem(client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect",
                                                     "colour": "blue"}), 422, "colour")
        bad_space = client.post("/v1/jobs", json={
            "dataset_id": ds, "target": "defect",
            "search_space": {"num_leaves": {"low": 64, "high": 8}}})
        assert_problem(bad_space, 422, "search_space.num_leaves")
        assert client.get("/v1/jobs").json()["total"] == 0  # nothing was queued


def test_job_is_queued_with_effective_spec_and_can_be_cancelled(api: LiveApi) -> None:
    with api.client() as client:
        ds = upload(client, kiln_csv()).json()["id"]
        job = client.post("/v1/jobs", json={"dataset_id": ds, "target": "defect"})
        assert job.status_code == 202, job.text
        body = job.json()
        assert body["status"] == "queued" and body["task"] == "binary"
        assert body["spec"]["cv"]["strategy"] == "stratified"
        assert body["progress"]["trials_budget"] == 40
        # Judged from the profile only; the worker writes the rest from the rows.
        assert body["spec"]["prepared"] is False and "features" not in body["spec"]
        spec = prepared(api, body["id"])["spec"]
        assert spec["prepared"] is True and spec["cv"]["strategy"] == "stratified"
        assert "num_leaves" in spec["search_space"]
        assert "firing_id" not in spec["features"]  # an identifier, not a feature
        assert client.get("/v1/jobs", params={"status": "queued"}).json()["total"] == 1
        assert_problem(client.delete(f"/v1/datasets/{ds}"), 409)  # a queued job uses it
        cancelled = client.post(f"/v1/jobs/{body['id']}/cancel").json()
        assert cancelled["status"] == "cancelled"
        assert_problem(client.post(f"/v1/jobs/{body['id']}/cancel"), 409)
        assert_problem(client.get("/v1/jobs/job_missing"), 404)
        assert_problem(client.get("/v1/jobs", params={"status": "sleeping"}), 422, "status")


def test_health_and_openapi(api: LiveApi) -> None:
    with api.client() as client:
        assert client.get("/healthz").json() == {"status": "ok"}
        assert client.get("/readyz").json() == {"status": "ready"}
        spec = client.get("/openapi.json").json()
        assert "/v1/jobs/{job_id}/leaderboard" in spec["paths"]
        assert client.get("/docs").status_code == 200
        assert_problem(client.get("/v1/nowhere"), 404)


def test_tables_read_back_identically(api: LiveApi) -> None:
    frame = kilns(n_rows=50, seed=9)
    with api.client() as client:
        dataset = upload(client, frame.to_csv(index=False).encode()).json()
    stored = pd.read_parquet(api.settings.home / "datasets" / f"{dataset['id']}.parquet")
    assert list(stored.columns) == list(frame.columns)
    assert len(stored) == len(frame)
    # The values too, column by column, against what pandas reads from the same CSV text.
    # Reference: pandas.read_csv (whole numbers as int64, decimals as float64, text as
    # strings); dtype details may differ, values may not.
    expected = pd.read_csv(io.StringIO(frame.to_csv(index=False)))
    for column in frame.columns:
        ours, theirs = stored[column], expected[column]
        if pd.api.types.is_datetime64_any_dtype(ours):  # dates are typed at upload
            assert ours.tolist() == pd.to_datetime(theirs).tolist(), column
        elif pd.api.types.is_numeric_dtype(theirs) and not pd.api.types.is_bool_dtype(theirs):
            np.testing.assert_allclose(ours.astype(float), theirs.astype(float), rtol=1e-12,
                                       err_msg=column)
        else:
            assert ours.astype(str).tolist() == theirs.astype(str).tolist(), column


def test_upload_and_job_warnings_name_the_doubtful_data(api: LiveApi) -> None:
    frame = kilns(n_rows=200, seed=4)
    frame["inspected_defect"] = frame["defect"] + np.random.default_rng(0).normal(0, 0.01, 200)
    doubled = pd.concat([frame, frame.head(10)], ignore_index=True)
    with api.client() as client:
        dataset = upload(client, doubled.to_csv(index=False).encode()).json()
        queued = client.post("/v1/jobs", json={"dataset_id": dataset["id"],
                                               "target": "defect", "budget": {"trials": 1}})
    assert queued.json()["warnings"] == []  # the rows are read by the worker, not the API
    job = prepared(api, queued.json()["id"])
    assert any("10 row(s) are exact duplicates" in w for w in dataset["warnings"])
    leaks = [w for w in job["warnings"] if "leakage" in w]
    assert len(leaks) == 1 and "'inspected_defect'" in leaks[0]
    assert any("hold-out row(s) also appear among the search rows" in w
               for w in job["warnings"])

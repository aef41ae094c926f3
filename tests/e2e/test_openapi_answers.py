"""The OpenAPI examples against real answers: every JSON example of a success response
(service/api/openapi_examples.py) has the keys of the real answer of the same route on a
real server after real jobs, recursively, so an example cannot drift from the API."""

from __future__ import annotations

import time
from collections.abc import Iterator
from typing import Any

import pytest

from examples.demo_data import kilns
from service.api.openapi_examples import EXAMPLES, JSON
from tests.e2e.servingkit import Served, job_body, served

pytestmark = pytest.mark.e2e

# Maps keyed by names from the data, not by the API: a job's effective spec and a model's
# details (documented field by field in README), LightGBM parameters, scores keyed by
# model id; trials per fidelity keyed by the rungs a job used. Only their being maps is
# compared.
OPEN = {"spec", "details", "params", "scores", "trials_by_fidelity"}


def differences(example: Any, real: Any, where: str = "$") -> list[str]:
    """Where the example's keys differ from the real answer's, recursively."""
    if isinstance(example, dict):
        if not isinstance(real, dict):
            return [f"{where}: the example is an object, the answer {type(real).__name__}"]
        out = []
        if set(example) != set(real):
            missing, extra = sorted(set(real) - set(example)), sorted(set(example) - set(real))
            out.append(f"{where}: example lacks {missing}, has extra {extra}")
        for key in set(example) & set(real):
            if key not in OPEN:
                out += differences(example[key], real[key], f"{where}.{key}")
        return out
    if isinstance(example, list) and any(isinstance(e, dict) for e in example):
        if not isinstance(real, list) or not real:
            return [f"{where}: the example lists objects, the answer has none"]
        out = []
        for i, item in enumerate(example):
            # Items differ by kind (a numeric vs a categorical column): an example item
            # must match one real item.
            tries = [differences(item, r, f"{where}[{i}]") for r in real]
            if all(tries):
                out += min(tries, key=len)
        return out
    return []


@pytest.fixture(scope="module")
def answers(tmp_path_factory: pytest.TempPathFactory) -> Iterator[dict[tuple[str, str], Any]]:
    """A real answer for every route that has a JSON success example."""
    with served("sqlite", tmp_path_factory.mktemp("answers")) as env:
        yield _collect(env)


def _collect(env: Served) -> dict[tuple[str, str], Any]:
    a, b, costly = (env.models[k] for k in ("a", "b", "costly"))
    job = env.jobs["a"]
    rows = env.rows.head(3).to_dict(orient="records")
    out: dict[tuple[str, str], Any] = {}

    def got(method: str, path: str, response: Any, status: int) -> None:
        assert response.status_code == status, (method, path, response.text)
        out[(method, path)] = response.json()

    with env.client() as client:
        got("get", "/healthz", client.get("/healthz"), 200)
        got("get", "/readyz", client.get("/readyz"), 200)
        body = kilns(n_rows=120, seed=2).to_csv(index=False).encode()
        got("post", "/v1/datasets", client.post(
            "/v1/datasets", params={"name": "kilns"}, content=body,
            headers={"Content-Type": "text/csv"}), 201)
        got("get", "/v1/datasets", client.get("/v1/datasets", params={"limit": 1}), 200)
        got("get", "/v1/datasets/{dataset_id}", client.get(f"/v1/datasets/{env.dataset_id}"),
            200)
        fresh = client.post("/v1/jobs", json=job_body(env.dataset_id, seed=9))
        got("post", "/v1/jobs", fresh, 202)
        got("post", "/v1/jobs/{job_id}/cancel",
            client.post(f"/v1/jobs/{fresh.json()['id']}/cancel"), 202)
        got("get", "/v1/jobs", client.get("/v1/jobs", params={"limit": 1}), 200)
        got("get", "/v1/jobs/{job_id}", client.get(f"/v1/jobs/{job['id']}"), 200)
        got("get", "/v1/jobs/{job_id}/trials",
            client.get(f"/v1/jobs/{job['id']}/trials", params={"limit": 1}), 200)
        got("post", "/v1/jobs/{job_id}/report-links", client.post(
            f"/v1/jobs/{job['id']}/report-links", json={"expires_in": 3600}), 200)
        got("get", "/v1/jobs/{job_id}/leaderboard",
            client.get(f"/v1/jobs/{job['id']}/leaderboard", params={"limit": 1}), 200)
        got("get", "/v1/models", client.get("/v1/models", params={"limit": 1}), 200)
        # The example is a binary model with decision costs: the "costly" one.
        got("get", "/v1/models/{model_id}", client.get(f"/v1/models/{costly['id']}"), 200)
        got("post", "/v1/models/{model_id}/predictions", client.post(
            f"/v1/models/{a['id']}/predictions", params={"keep": "firing_id"},
            json={"rows": rows}), 200)
        got("get", "/v1/models/{model_id}/drift", client.get(f"/v1/models/{a['id']}/drift"),
            200)
        got("put", "/v1/channels/{name}", client.put("/v1/channels/kilns",
                                                     json={"model_id": b["id"]}), 200)
        client.put("/v1/channels/kilns", json={"model_id": a["id"]}).raise_for_status()
        got("get", "/v1/channels/{name}", client.get("/v1/channels/kilns"), 200)
        got("get", "/v1/channels", client.get("/v1/channels", params={"limit": 1}), 200)
        got("post", "/v1/channels/{name}/predictions", client.post(
            "/v1/channels/kilns/predictions", params={"keep": "firing_id"}, json={"rows": rows}),
            200)
        got("post", "/v1/channels/{name}/rollback",
            client.post("/v1/channels/kilns/rollback"), 200)
        got("post", "/v1/models/{model_id}/scorings", client.post(
            f"/v1/models/{a['id']}/scorings",
            json={"dataset_id": env.dataset_id, "keep": ["firing_id"]}), 202)
        scoring = out[("post", "/v1/models/{model_id}/scorings")]["id"]
        cancelled = client.post(f"/v1/scorings/{scoring}/cancel")
        if cancelled.status_code == 409:  # it finished first: the same shape, read back
            cancelled = client.get(f"/v1/scorings/{scoring}")
        got("post", "/v1/scorings/{scoring_id}/cancel", cancelled,
            200 if cancelled.request.method == "GET" else 202)
        got("post", "/v1/channels/{name}/scorings", client.post(
            "/v1/channels/kilns/scorings",
            json={"dataset_id": env.dataset_id, "keep": ["firing_id"]}), 202)
        got("get", "/v1/scorings/{scoring_id}", client.get(f"/v1/scorings/{scoring}"), 200)
        got("post", "/v1/comparisons", client.post("/v1/comparisons", json={
            "models": [a["id"], b["id"]], "dataset_id": env.dataset_id}), 202)
        comparison = out[("post", "/v1/comparisons")]["id"]
        for _ in range(600):  # a worker computes it
            done = client.get(f"/v1/comparisons/{comparison}")
            if done.json()["status"] in ("succeeded", "failed"):
                break
            time.sleep(0.5)
        assert done.json()["status"] == "succeeded", done.text
        got("get", "/v1/comparisons/{comparison_id}", done, 200)
        got("get", "/v1/audit", client.get(
            "/v1/audit", params={"limit": 1, "action": "channel.set"}), 200)
    return out


def _json_examples() -> dict[tuple[str, str], Any]:
    found = {}
    for route, entry in EXAMPLES.items():
        for status, by_media in entry.get("responses", {}).items():
            if status.startswith("2") and JSON in by_media:
                found[route] = by_media[JSON]
    return found


def test_every_json_example_has_a_real_answer(answers: dict) -> None:
    assert set(_json_examples()) - set(answers) == set()


@pytest.mark.parametrize("route", sorted(_json_examples()),
                         ids=[f"{m} {p}" for m, p in sorted(_json_examples())])
def test_example_keys_are_the_real_answers_keys(answers: dict, route: tuple) -> None:
    assert differences(_json_examples()[route], answers[route]) == []


def test_the_comparison_notices_a_drifted_example() -> None:
    # The check itself can fail: a key too many, a key missing, a nested object, a list.
    real = {"cv": {"metric": "auc", "mean": 0.8}, "items": [{"a": 1}, {"a": 1, "b": 2}]}
    assert differences(real, real) == []
    assert differences({"cv": {"metric": "auc"}, "items": [{"a": 1}]}, real)
    assert differences({**real, "extra": 1}, real)
    assert differences({**real, "items": [{"c": 3}]}, real)
    assert differences({**real, "cv": {"roc_auc": 0.8, "roc_auc_std": 0.01}}, real)
    assert not differences({**real, "items": [{"a": 1, "b": 5}]}, real)

"""Serving for calling systems, on a real server and database (SQLite and PostgreSQL):
the model list and its paging, and predictions that keep the caller's ids."""

from __future__ import annotations

import csv
import io
import json
from collections.abc import Iterator
from pathlib import Path

import numpy as np
import pytest

from tests.conftest import DB_KINDS
from tests.e2e.servingkit import ORDER, Served, lightgbm_positive, served

pytestmark = pytest.mark.e2e


@pytest.fixture(scope="module", params=DB_KINDS)
def env(request: pytest.FixtureRequest,
        tmp_path_factory: pytest.TempPathFactory) -> Iterator[Served]:
    with served(request.param, tmp_path_factory.mktemp(request.param)) as s:
        yield s


def test_models_list_newest_first_filtered_and_paged(env: Served) -> None:
    ids = {k: m["id"] for k, m in env.models.items()}
    with env.server.client() as client:
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
    assert everything["total"] == 3 and everything["next"] is None
    listed = [m["id"] for m in everything["items"]]
    assert sorted(listed) == sorted(ids.values())
    stamps = [m["created_at"] for m in everything["items"]]
    assert stamps == sorted(stamps, reverse=True)  # newest first
    # Paging one at a time walks the same list, each model once.
    assert [p["items"][0]["id"] for p in pages] == listed
    assert all(p["total"] == 3 for p in pages)
    assert {m["id"] for m in by_dataset["items"]} == {ids["a"], ids["b"]}
    assert by_dataset["total"] == 2
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
    with env.server.client() as client:
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
    with env.server.client() as client:
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
    with env.server.client() as client:
        response = client.post(f"/v1/models/{model['id']}/predictions",
                               params={"keep": ORDER}, json={"rows": records})
    assert response.status_code == 200, response.text
    assert [k[ORDER] for k in response.json()["kept"]] == ["x", "", "2026-13-45", "00", "NaN"]

"""Each malformed or hostile request gets its 4xx problem document, writes nothing and
leaves the server healthy."""

from __future__ import annotations

import json

import pytest

from tests.bad_inputs.cases import CASES, Case
from tests.bad_inputs.conftest import PROBLEM, Seeded


def test_the_corpus_is_large_and_unique() -> None:
    assert len(CASES) >= 30
    assert len({c.id for c in CASES}) == len(CASES)


@pytest.mark.parametrize("case", CASES, ids=[c.id for c in CASES])
def test_bad_request(seeded: Seeded, case: Case) -> None:
    before = seeded.snapshot()
    path = case.path.format(ds=seeded.dataset_id, job=seeded.job_id, model=seeded.model_id)
    with seeded.api.client() as client:
        response = client.request(case.method, path, **case.build(seeded))
        assert response.status_code == case.status, response.text
        assert response.headers["content-type"].startswith(PROBLEM), response.headers
        body = response.json()
        assert body["status"] == case.status and body["title"] and body["type"] and body["code"]
        text = (body["detail"] + " " + json.dumps(body.get("errors", []))).lower()
        assert case.mention.lower() in text, body
        if case.field is not None:
            assert case.field in [e["field"] for e in body.get("errors", [])], body
        # No server paths in what the client reads (temporary files, the home folder).
        assert str(seeded.api.settings.home) not in response.text
        assert seeded.snapshot() == before  # nothing in the database, no file left behind
        assert client.get("/healthz").status_code == 200
        assert client.get("/readyz").status_code == 200

"""Every route under every scope (none, a wrong key, read, write, admin) gives the status
CONTRACT.md documents: read may GET, write may also POST, admin may also DELETE; health
and the API description need no key. Also: CORS stays closed unless configured."""

from __future__ import annotations

from collections.abc import Iterator

import pytest

from service import repository
from service.auth import SCOPES, create_key
from service.db import init_db, session_scope
from service.settings import Settings
from tests.bad_inputs.conftest import LIMITS, Seeded, seed
from tests.service.conftest import live_api

# (method, path, scope needed or None, status when allowed)
ROUTES = [
    ("GET", "/v1/datasets", "read", 200),
    ("POST", "/v1/datasets", "write", 201),
    ("GET", "/v1/datasets/{ds}", "read", 200),
    ("DELETE", "/v1/datasets/{spare_ds}", "admin", 204),
    ("GET", "/v1/jobs", "read", 200),
    ("POST", "/v1/jobs", "write", 202),
    ("GET", "/v1/jobs/{job}", "read", 200),
    ("POST", "/v1/jobs/{queued_job}/cancel", "write", 202),
    ("GET", "/v1/jobs/{job}/trials", "read", 200),
    ("GET", "/v1/jobs/{job}/leaderboard", "read", 200),
    ("GET", "/v1/models", "read", 200),
    ("GET", "/v1/models/{model}/drift", "read", 200),
    # The seeded channel serves the seeded model: allowed, then refused for that (409).
    ("DELETE", "/v1/models/{model}", "admin", 409),
    ("GET", "/v1/models/{model}", "read", 200),
    ("PUT", "/v1/channels/{channel}", "write", 200),
    ("GET", "/v1/channels/{channel}", "read", 200),
    ("GET", "/v1/channels", "read", 200),
    # The seeded channel has had one model only: allowed, then refused for that (409).
    ("POST", "/v1/channels/{channel}/rollback", "write", 409),
    ("POST", "/v1/channels/{channel}/predictions", "write", 200),
    ("POST", "/v1/models/{model}/scorings", "write", 202),
    ("POST", "/v1/channels/{channel}/scorings", "write", 202),
    ("GET", "/v1/scorings/{scoring}", "read", 200),
    ("POST", "/v1/scorings/{queued_scoring}/cancel", "write", 202),
    # No worker runs it here: allowed, then refused as not finished (409).
    ("GET", "/v1/scorings/{scoring}/result", "read", 409),
    # One model twice: allowed, then refused as a bad request (422).
    ("POST", "/v1/comparisons", "write", 422),
    ("GET", "/v1/comparisons/{comparison}", "read", 200),
    ("GET", "/v1/models/{model}/file", "read", 200),
    ("GET", "/v1/models/{model}/bundle", "read", 200),
    ("GET", "/v1/jobs/{job}/watch", "read", 200),
    ("GET", "/v1/jobs/{job}/events", "read", 308),  # the old stream path, for one release
    ("GET", "/v1/jobs/{job}/report", "read", 200),
    ("GET", "/v1/jobs/{job}/plots/history.svg", "read", 200),
    # A POST that stores nothing: any key may mint a signed report link.
    ("POST", "/v1/jobs/{job}/report-links", "read", 200),
    ("POST", "/v1/models/{model}/predictions", "write", 200),
    ("GET", "/v1/audit", "admin", 200),  # who changed what: admin keys only
    ("GET", "/healthz", None, 200),
    ("GET", "/readyz", None, 200),
    ("GET", "/metrics", None, 200),  # scrapers hold no key; see README
    ("GET", "/openapi.json", None, 200),
    ("GET", "/docs", None, 200),
]
CALLERS = [None, "bogus", *SCOPES]


class Keyed:
    def __init__(self, seeded: Seeded, keys: dict[str, str]) -> None:
        self.s, self.keys = seeded, keys

    def auth(self, who: str | None) -> dict[str, str]:
        if who is None:
            return {}
        secret = self.keys.get(who, "gk_" + "x" * 43)  # "bogus": well-formed, unknown
        return {"Authorization": f"Bearer {secret}"}

    def admin(self):  # type: ignore[no-untyped-def]
        return self.s.api.client(headers=self.auth("admin"))


@pytest.fixture(scope="module")
def keyed(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Keyed]:
    settings = Settings(home=tmp_path_factory.mktemp("scopes") / "home", **LIMITS)
    settings.ensure_dirs()
    init_db(settings.db_url)
    keys = {scope: create_key(settings.db_url, scope=scope)[1] for scope in SCOPES}
    with live_api(settings) as api:
        yield Keyed(seed(api, headers={"Authorization": f"Bearer {keys['admin']}"}), keys)


def _request(k: Keyed, method: str, path: str) -> dict:  # type: ignore[type-arg]
    s = k.s
    if method == "POST" and path == "/v1/datasets":
        return {"content": b"x,y\n1,0\n2,1\n", "headers": {"Content-Type": "text/csv"}}
    if method == "POST" and path == "/v1/jobs":
        return {"json": {"dataset_id": s.dataset_id, "target": "defect"}}
    if method == "PUT" and path.startswith("/v1/channels/"):
        return {"json": {"model_id": s.model_id}}
    if path == "/v1/comparisons":
        return {"json": {"models": [s.model_id, s.model_id], "dataset_id": s.dataset_id}}
    if path.endswith("/scorings"):
        return {"json": {"dataset_id": s.dataset_id}}
    if path.endswith("/predictions"):
        return {"json": {"rows": [s.row]}}
    return {}


def _fill(k: Keyed, path: str) -> str:
    ids = {"ds": k.s.dataset_id, "job": k.s.job_id, "model": k.s.model_id,
           "channel": "scoped"}
    with k.admin() as client:  # fresh resources for the calls that use them up
        if "scoring}" in path:
            made = client.post(f"/v1/models/{k.s.model_id}/scorings",
                               json={"dataset_id": k.s.dataset_id})
            ids["scoring"] = ids["queued_scoring"] = made.json()["id"]
        if "{comparison}" in path:
            with session_scope(k.s.api.settings.db_url) as session:
                ids["comparison"] = repository.add_comparison(
                    session, id=repository.new_id("cmp"), model_ids=[k.s.model_id] * 2,
                    dataset_id=k.s.dataset_id).id
        if "{channel}" in path or path == "/v1/models/{model}":
            client.put("/v1/channels/scoped",
                       json={"model_id": k.s.model_id}).raise_for_status()
        if "{spare_ds}" in path:
            made = client.post("/v1/datasets", content=b"x,y\n1,0\n2,1\n",
                               headers={"Content-Type": "text/csv"})
            ids["spare_ds"] = made.json()["id"]
        if "{queued_job}" in path:
            made = client.post("/v1/jobs", json={"dataset_id": k.s.dataset_id,
                                                 "target": "defect"})
            ids["queued_job"] = made.json()["id"]
    return path.format(**ids)


def test_the_table_covers_every_route(keyed: Keyed) -> None:
    with keyed.admin() as client:
        spec = client.get("/openapi.json").json()
    documented = {(m.upper(), p) for p, item in spec["paths"].items() for m in item}
    listed = {(m, p.replace("{ds}", "{dataset_id}").replace("{spare_ds}", "{dataset_id}")
               .replace("{queued_job}", "{job_id}").replace("{job}", "{job_id}")
               .replace("{model}", "{model_id}").replace("{channel}", "{name}")
               .replace("{queued_scoring}", "{scoring_id}").replace("{scoring}", "{scoring_id}")
               .replace("{comparison}", "{comparison_id}")
               .replace("history.svg", "{name}.svg"))
              for m, p, _, _ in ROUTES}
    assert documented <= listed, documented - listed


@pytest.mark.parametrize("who", CALLERS, ids=[str(c) for c in CALLERS])
@pytest.mark.parametrize(("method", "path", "needed", "ok"), ROUTES,
                         ids=[f"{m} {p}" for m, p, _, _ in ROUTES])
def test_scope(keyed: Keyed, method: str, path: str, needed: str | None, ok: int,
               who: str | None) -> None:
    if needed is None:
        expected = ok
    elif who not in SCOPES:
        expected = 401
    else:
        expected = ok if SCOPES.index(who) >= SCOPES.index(needed) else 403
    url = _fill(keyed, path)
    with keyed.s.api.client(headers=keyed.auth(who)) as client:
        response = client.request(method, url, **_request(keyed, method, path))
    assert response.status_code == expected, response.text
    if expected in (401, 403):
        body = response.json()
        assert body["code"] == ("unauthorized" if expected == 401 else "forbidden")
        assert response.headers["content-type"].startswith("application/problem+json")


def test_malformed_authorization_headers(keyed: Keyed) -> None:
    with keyed.s.api.client() as client:
        for header in ("Basic dXNlcjpwYXNz", "Bearer", keyed.keys["admin"],
                       "Bearer " + keyed.keys["admin"][:-1], "Bearer " + "x" * 10_000):
            response = client.get("/v1/datasets", headers={"Authorization": header})
            assert response.status_code == 401, (header[:20], response.text)


@pytest.mark.parametrize("configured", ["", "https://app.example"])
def test_cors_is_closed_unless_configured(tmp_path, configured: str) -> None:
    settings = Settings(home=tmp_path / "home", cors_origins=configured)
    with live_api(settings) as api, api.client() as client:
        preflight = client.options("/v1/datasets", headers={
            "Origin": "https://app.example", "Access-Control-Request-Method": "POST"})
        plain = client.get("/v1/datasets", headers={"Origin": "https://app.example"})
        other = client.get("/v1/datasets", headers={"Origin": "https://elsewhere.example"})
    allowed = plain.headers.get("access-control-allow-origin")
    if configured:
        assert preflight.status_code == 200
        assert preflight.headers["access-control-allow-origin"] == configured
        assert allowed == configured
    else:
        assert "access-control-allow-origin" not in preflight.headers
        assert allowed is None
    assert "access-control-allow-origin" not in other.headers

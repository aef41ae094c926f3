"""API keys and scopes (CONTRACT.md: read may GET, write may also POST, admin may DELETE)."""

from __future__ import annotations

import subprocess
import sys

import sqlalchemy as sa

from service.auth import create_key, hash_key
from service.db import session_scope
from service.tables import ApiKey
from tests.conftest import ROOT, child_env, free_port
from tests.service.conftest import LiveApi

CSV = b"x,y\n1,0\n2,1\n3,0\n4,1\n"


def test_scopes_are_enforced(api: LiveApi) -> None:
    url = api.settings.db_url
    keys = {scope: create_key(url, scope=scope)[1] for scope in ("read", "write", "admin")}
    with session_scope(url) as session:
        stored = session.scalars(sa.select(ApiKey.key_hash)).all()
    assert sorted(stored) == sorted(hash_key(k) for k in keys.values())  # hashes only
    assert not any(k in stored for k in keys.values())

    def call(method: str, path: str, key: str | None, **kw):
        headers = {"Authorization": f"Bearer {key}"} if key else {}
        headers.update(kw.pop("headers", {}))
        with api.client() as client:
            return client.request(method, path, headers=headers, **kw).status_code

    upload = {"content": CSV, "headers": {"Content-Type": "text/csv"}}
    assert call("GET", "/v1/datasets", None) == 401
    assert call("GET", "/v1/datasets", "gk_wrong") == 401
    assert call("GET", "/v1/datasets", keys["read"]) == 200
    assert call("POST", "/v1/datasets", keys["read"], **upload) == 403
    assert call("POST", "/v1/datasets", keys["write"], **upload) == 201
    with api.client() as client:
        ds = client.get("/v1/datasets", headers={"Authorization": f"Bearer {keys['read']}"})
    dataset_id = ds.json()["items"][0]["id"]
    assert call("DELETE", f"/v1/datasets/{dataset_id}", keys["write"]) == 403
    assert call("DELETE", f"/v1/datasets/{dataset_id}", keys["admin"]) == 204
    assert call("GET", "/healthz", None) == 200  # health needs no key
    assert call("GET", "/readyz", None) == 200


def test_serve_refuses_public_bind_without_a_key(tmp_path) -> None:
    env = child_env(tmp_path / "home")
    result = subprocess.run(
        [sys.executable, "-m", "service", "serve", "--host", "0.0.0.0",
         "--port", str(free_port()), "--workers", "0"],
        env=env, cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert result.returncode == 2
    assert "no API key" in result.stderr


def test_keys_create_prints_the_key_once(tmp_path) -> None:
    env = child_env(tmp_path / "home")
    result = subprocess.run([sys.executable, "-m", "service", "keys", "create", "--scope", "read"],
                            env=env, cwd=ROOT, capture_output=True, text=True, timeout=60)
    assert result.returncode == 0, result.stderr
    secret = result.stdout.strip()
    assert secret.startswith("gk_") and len(secret) > 40
    url = f"sqlite:///{tmp_path / 'home' / 'grovekeeper.db'}"
    with session_scope(url) as session:
        row = session.scalar(sa.select(ApiKey))
    assert row.scope == "read" and row.key_hash == hash_key(secret)

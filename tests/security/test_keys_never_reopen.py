"""Authentication never switches itself off.

A server that has ever had keys, or that listens on a non-loopback address, refuses
requests while no key is active; and a key created or revoked in another process counts
from the very next request, with no cache window in between.
"""

from __future__ import annotations

import subprocess
import sys
from pathlib import Path

import sqlalchemy as sa

from service.db import session_scope
from service.tables import ApiKey
from tests.conftest import ROOT, Server, child_env


def _keys(home: Path, *args: str) -> subprocess.CompletedProcess[str]:
    return subprocess.run([sys.executable, "-m", "service", "keys", *args],
                          env=child_env(home), cwd=ROOT, capture_output=True, text=True,
                          timeout=60, check=True)


def _db_url(home: Path) -> str:
    return f"sqlite:///{home / 'grovekeeper.db'}"


def test_revoking_every_key_closes_a_loopback_server(tmp_path: Path) -> None:
    home = tmp_path / "home"
    server = Server(home=home, workers=0).start()
    try:
        with server.client() as client:
            assert client.get("/v1/datasets").status_code == 200  # never had a key: open

            secret = _keys(home, "create", "--scope", "admin").stdout.strip()
            # The very next request sees the new key: no grace period without one.
            assert client.get("/v1/datasets").status_code == 401
            auth = {"Authorization": f"Bearer {secret}"}
            assert client.get("/v1/datasets", headers=auth).status_code == 200

            key_id = _keys(home, "list").stdout.splitlines()[1].split()[0]
            _keys(home, "revoke", key_id)
            assert client.get("/v1/datasets", headers=auth).status_code == 401
            refused = client.get("/v1/datasets")
            assert refused.status_code == 401
            assert "no active API key" in refused.json()["detail"]
            assert client.post("/v1/datasets", content=b"x,y\n1,2\n",
                               headers={"Content-Type": "text/csv"}).status_code == 401
            assert client.get("/healthz").status_code == 200
    finally:
        server.stop()


def test_deleting_every_key_row_keeps_a_public_server_closed(tmp_path: Path) -> None:
    home = tmp_path / "home"
    secret = _keys(home, "create", "--scope", "admin").stdout.strip()
    # Bound to every interface (as in the container); the test talks to it on loopback.
    server = Server(home=home, workers=0, host="0.0.0.0").start()
    try:
        with server.client() as client:
            auth = {"Authorization": f"Bearer {secret}"}
            assert client.get("/v1/datasets", headers=auth).status_code == 200
            with session_scope(_db_url(home)) as session:
                session.execute(sa.delete(ApiKey))  # rows gone, not just revoked
            assert client.get("/v1/datasets").status_code == 401
            assert client.delete("/v1/datasets/ds_0000000000000000").status_code == 401
    finally:
        server.stop()

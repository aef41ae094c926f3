"""Huge bodies, foreign Host names and cross-site posts against a real server.

FastAPI reads a route's JSON body before its dependencies run; the guard middleware
(service/api/guard.py) refuses oversized bodies and unauthenticated writes before any
body is read. These tests send 200 MB and read the server's peak memory (VmHWM) before
and after.
"""

from __future__ import annotations

from collections.abc import Iterator
from pathlib import Path

import pytest

from tests.conftest import Server
from tests.security.attack import MB, create_key, send_big_body, vm_hwm_mb

pytestmark = pytest.mark.e2e
TOTAL = 200 * MB
MAX_RISE_MB = 50


@pytest.fixture(scope="module")
def open_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    """No key has ever existed: the loopback, no-key mode."""
    srv = Server(home=tmp_path_factory.mktemp("open") / "home", workers=0).start()
    try:
        yield srv
    finally:
        srv.stop()


@pytest.fixture(scope="module")
def keyed_server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[tuple[Server, str]]:
    home = tmp_path_factory.mktemp("keyed") / "home"
    secret = create_key(home, "write")
    srv = Server(home=home, workers=0).start()
    try:
        yield srv, secret
    finally:
        srv.stop()


@pytest.mark.parametrize("chunked", [False, True], ids=["content-length", "chunked"])
def test_huge_job_body_without_a_key_is_refused_unread(
        keyed_server: tuple[Server, str], chunked: bool) -> None:
    server, _ = keyed_server
    assert server.proc is not None
    before = vm_hwm_mb(server.proc.pid)
    status, sent = send_big_body(server.port, "/v1/jobs", total=TOTAL, chunked=chunked)
    after = vm_hwm_mb(server.proc.pid)
    # A declared size over the limit is refused before the key is even looked up; a
    # chunked body has no declared size, so the missing key refuses it.
    assert status == (413 if not chunked else 401), (status, sent)
    assert sent < 20 * MB
    assert after - before < MAX_RISE_MB, f"peak RSS rose {after - before:.0f} MB"
    with server.client() as client:  # still serving
        assert client.get("/healthz").status_code == 200


@pytest.mark.parametrize("chunked", [False, True], ids=["content-length", "chunked"])
def test_huge_job_body_in_no_key_mode_is_413(open_server: Server, chunked: bool) -> None:
    assert open_server.proc is not None
    before = vm_hwm_mb(open_server.proc.pid)
    status, sent = send_big_body(open_server.port, "/v1/jobs", total=TOTAL, chunked=chunked)
    after = vm_hwm_mb(open_server.proc.pid)
    assert status == 413, (status, sent)
    assert sent < 20 * MB  # refused long before the end (1 MB limit plus socket buffers)
    assert after - before < MAX_RISE_MB, f"peak RSS rose {after - before:.0f} MB"


def test_huge_upload_with_a_key_stops_at_the_upload_limit(tmp_path: Path) -> None:
    home = tmp_path / "home"
    secret = create_key(home, "write")
    server = Server(home=home, workers=0, extra_env={"GROVEKEEPER_MAX_UPLOAD_MB": "2"}).start()
    try:
        assert server.proc is not None
        auth = {"Authorization": f"Bearer {secret}", "Content-Type": "text/csv"}
        for chunked in (False, True):
            status, sent = send_big_body(server.port, "/v1/datasets", total=TOTAL,
                                         chunked=chunked, headers=auth)
            assert status == 413, (chunked, status, sent)
            assert sent < 30 * MB
        leftovers = [p for p in (home / "tmp").rglob("*") if p.is_file()]
        assert leftovers == []
    finally:
        server.stop()


def test_a_write_key_still_gets_its_job_answered(keyed_server: tuple[Server, str]) -> None:
    server, secret = keyed_server
    with server.client(headers={"Authorization": f"Bearer {secret}"}) as client:
        # Small bodies pass the guard and reach the route: it names the unknown dataset.
        got = client.post("/v1/jobs", json={"dataset_id": "ds_missing", "target": "y"})
        assert got.status_code == 422, got.text
        assert got.json()["errors"][0]["field"] == "dataset_id"
        too_long = client.post("/v1/jobs", json={"dataset_id": "ds_x", "target": "y" * 5000})
        assert too_long.status_code == 422
        assert too_long.json()["errors"][0]["field"] == "target"


@pytest.mark.parametrize("host", ["evil.example", "127.0.0.1.nip.io:8000", "10.0.0.5",
                                  "localhost.evil.example"])
def test_no_key_mode_refuses_foreign_host_names(open_server: Server, host: str) -> None:
    with open_server.client() as client:
        got = client.get("/v1/datasets", headers={"Host": host})
        assert got.status_code == 421, got.text
        assert got.json()["code"] == "misdirected_host"
        for good in ("localhost", f"127.0.0.1:{open_server.port}", "[::1]:80"):
            assert client.get("/v1/datasets", headers={"Host": good}).status_code == 200


def test_keyed_server_serves_any_host_name_to_key_holders(
        keyed_server: tuple[Server, str]) -> None:
    server, secret = keyed_server
    with server.client() as client:
        got = client.get("/v1/datasets", headers={"Host": "grovekeeper.internal",
                                                  "Authorization": f"Bearer {secret}"})
        assert got.status_code == 200


@pytest.mark.parametrize("headers", [
    {"Origin": "https://evil.example"},
    {"Origin": "null"},
    {"Sec-Fetch-Site": "cross-site"},
    {"Origin": "http://localhost:1", "Sec-Fetch-Site": "same-site"},
])
def test_no_key_mode_refuses_cross_site_writes(open_server: Server,
                                               headers: dict[str, str]) -> None:
    with open_server.client() as client:
        upload = client.post("/v1/datasets", files={"file": ("a.csv", b"x,y\n1,2\n")},
                             headers=headers)
        assert upload.status_code == 403, upload.text
        assert upload.json()["code"] == "cross_site_request"
        cancel = client.post("/v1/jobs/job_missing/cancel", headers=headers)
        assert cancel.status_code == 403
        assert client.get("/v1/datasets").json()["total"] == 0  # nothing was stored
        # Reading is not changing anything: a GET with the same headers is answered.
        assert client.get("/v1/datasets", headers=headers).status_code == 200


def test_no_key_mode_accepts_same_machine_writes(open_server: Server) -> None:
    with open_server.client() as client:
        got = client.post("/v1/jobs/job_missing/cancel",
                          headers={"Origin": f"http://127.0.0.1:{open_server.port}",
                                   "Sec-Fetch-Site": "same-origin"})
        assert got.status_code == 404  # through the guard, to the route


def test_text_plain_is_not_an_upload_type(open_server: Server) -> None:
    with open_server.client() as client:
        got = client.post("/v1/datasets?name=t", content=b"x,y\n1,2\n",
                          headers={"Content-Type": "text/plain"})
        assert got.status_code == 415

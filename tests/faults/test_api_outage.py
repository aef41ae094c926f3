"""The API with its database out of reach: a real uvicorn server whose PostgreSQL URL
points at a loopback port nothing listens on. Every request that needs the database
answers 503 with Retry-After, at once; /readyz says why; /healthz still answers."""

from __future__ import annotations

import socket
import time
from pathlib import Path

from service.api.app import create_app
from service.settings import Settings
from tests.service.conftest import LiveApi


def _closed_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])  # closed again when the block ends


def test_unreachable_database_answers_503_with_retry_after(tmp_path: Path) -> None:
    import threading

    import uvicorn

    from tests.conftest import free_port

    url = f"postgresql+psycopg://127.0.0.1:{_closed_port()}/nothing"
    settings = Settings(home=tmp_path / "home", database_url=url)
    settings.ensure_dirs()
    port = free_port()
    server = uvicorn.Server(uvicorn.Config(create_app(settings, init=False), host="127.0.0.1",
                                           port=port, log_level="warning"))
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started and time.monotonic() < deadline:
        time.sleep(0.02)
    live = LiveApi(settings=settings, base=f"http://127.0.0.1:{port}")
    try:
        with live.client() as client:
            assert client.get("/healthz").status_code == 200
            ready = client.get("/readyz")
            assert ready.status_code == 503 and ready.headers["retry-after"] == "5"
            assert "refuses connections" in ready.json()["detail"], ready.json()
            for method, path in (("GET", "/v1/jobs"), ("GET", "/v1/datasets/ds_x"),
                                 ("POST", "/v1/jobs")):
                started = time.monotonic()
                r = client.request(method, path, json={} if method == "POST" else None)
                assert r.status_code == 503, (path, r.status_code, r.text)
                assert r.headers["retry-after"] == "5"
                assert r.headers["content-type"].startswith("application/problem+json")
                body = r.json()
                assert body["code"] == "database_unavailable"
                # Words, not the server's address.
                assert "127.0.0.1" not in r.text and str(port) not in body["detail"]
                assert time.monotonic() - started < 10  # no hang
    finally:
        server.should_exit = True
        thread.join(timeout=10)

"""An in-process API on a real uvicorn server (loopback port, own thread), for tests
that need the HTTP layer but no worker."""

from __future__ import annotations

import contextlib
import threading
import time
from collections.abc import Iterator
from dataclasses import dataclass
from pathlib import Path

import httpx
import pytest
import uvicorn

from service.api.app import create_app
from service.db import dispose_engines, init_db
from service.settings import Settings
from tests.conftest import free_port


@dataclass
class LiveApi:
    settings: Settings
    base: str

    def client(self, **kwargs: object) -> httpx.Client:
        return httpx.Client(base_url=self.base, timeout=30, **kwargs)  # type: ignore[arg-type]

    def files(self) -> list[Path]:
        """Every file under the home except the database files."""
        return sorted(p for p in self.settings.home.rglob("*")
                      if p.is_file() and not p.name.startswith("grovekeeper.db"))


@contextlib.contextmanager
def live_api(settings: Settings) -> Iterator[LiveApi]:
    settings.ensure_dirs()
    init_db(settings.db_url)
    port = free_port()
    config = uvicorn.Config(create_app(settings, init=False), host="127.0.0.1", port=port,
                            log_level="warning", lifespan="on")
    server = uvicorn.Server(config)
    thread = threading.Thread(target=server.run, daemon=True)
    thread.start()
    deadline = time.monotonic() + 20
    while not server.started:
        if time.monotonic() > deadline:
            raise RuntimeError("uvicorn did not start")
        time.sleep(0.02)
    try:
        yield LiveApi(settings=settings, base=f"http://127.0.0.1:{port}")
    finally:
        server.should_exit = True
        thread.join(timeout=10)
        dispose_engines()


@pytest.fixture
def api(tmp_path: Path) -> Iterator[LiveApi]:
    with live_api(Settings(home=tmp_path / "home", max_upload_mb=1)) as live:
        yield live


def prepared(api: LiveApi, job_id: str) -> dict:
    """The job as GET answers it once a worker has prepared its rows (what the lead does
    first when it takes a job; the API wrote only the spec the profile allows)."""
    from service.worker.context import WorkerContext
    from service.worker.lead import prepare_job

    prepare_job(WorkerContext(api.settings), job_id)
    with api.client() as client:
        return client.get(f"/v1/jobs/{job_id}").json()

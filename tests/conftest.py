"""Shared fixtures: databases (SQLite and the real PostgreSQL) and live servers."""

from __future__ import annotations

import contextlib
import os
import secrets
import socket
import subprocess
import sys
import time
from collections.abc import Iterator
from dataclasses import dataclass, field
from pathlib import Path

import httpx
import pytest

ROOT = Path(__file__).resolve().parents[1]
PG_ADMIN_URL = os.environ.get("GROVEKEEPER_TEST_PG", "postgresql://127.0.0.1:5432/test")
DB_KINDS = ["sqlite", "postgres"]


def free_port() -> int:
    with socket.socket() as s:
        s.bind(("127.0.0.1", 0))
        return int(s.getsockname()[1])


def _pg_connect():  # type: ignore[no-untyped-def]
    import psycopg

    return psycopg.connect(PG_ADMIN_URL, autocommit=True, connect_timeout=3)


@contextlib.contextmanager
def fresh_database(kind: str, tmp_path: Path) -> Iterator[str]:
    """A new, empty database of ``kind``; PostgreSQL gets a throw-away database."""
    if kind == "sqlite":
        yield f"sqlite:///{tmp_path / 'grovekeeper.db'}"
        return
    try:
        admin = _pg_connect()
    except Exception as exc:  # noqa: BLE001
        if os.environ.get("CI"):
            raise  # CI starts PostgreSQL; not reaching it there is a failure, not a skip
        pytest.skip(f"PostgreSQL at {PG_ADMIN_URL} cannot be reached: {exc}")
    name = f"gk_test_{secrets.token_hex(4)}"
    admin.execute(f'CREATE DATABASE "{name}"')
    base = PG_ADMIN_URL.split("://", 1)[1].rsplit("/", 1)[0]
    try:
        yield f"postgresql+psycopg://{base}/{name}"
    finally:
        from service import db

        # Pooled connections would keep the database open; close them before DROP.
        db.dispose_engines()
        admin.execute(f'DROP DATABASE IF EXISTS "{name}" WITH (FORCE)')
        admin.close()


@pytest.fixture(params=DB_KINDS)
def db_url(request: pytest.FixtureRequest, tmp_path: Path) -> Iterator[str]:
    with fresh_database(request.param, tmp_path) as url:
        yield url


def child_env(home: Path, db_url: str | None = None, **extra: str) -> dict[str, str]:
    env = dict(os.environ)
    env["PYTHONPATH"] = str(ROOT) + os.pathsep + env.get("PYTHONPATH", "")
    env["GROVEKEEPER_HOME"] = str(home)
    env.pop("GROVEKEEPER_DATABASE_URL", None)
    if db_url:
        env["GROVEKEEPER_DATABASE_URL"] = db_url
    env["OMP_WAIT_POLICY"] = "passive"
    env.update(extra)
    return env


@dataclass
class Server:
    """A real ``grovekeeper serve`` on a loopback port."""

    home: Path
    db_url: str | None = None
    workers: int = 1
    host: str = "127.0.0.1"
    extra_env: dict[str, str] = field(default_factory=dict)
    port: int = 0
    proc: subprocess.Popen[bytes] | None = None
    log_path: Path | None = None
    _log_file: object = None

    @property
    def base(self) -> str:
        return f"http://127.0.0.1:{self.port}"

    def start(self) -> Server:
        self.port = free_port()
        self.log_path = self.home.parent / f"server-{self.port}.log"
        log = self._log_file = open(self.log_path, "ab")  # noqa: SIM115 - closed in stop()
        self.proc = subprocess.Popen(
            [sys.executable, "-m", "service", "serve", "--host", self.host,
             "--port", str(self.port), "--workers", str(self.workers)],
            env=child_env(self.home, self.db_url, **self.extra_env),
            stdout=log, stderr=subprocess.STDOUT, cwd=ROOT,
        )
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            if self.proc.poll() is not None:
                raise RuntimeError(f"server exited early:\n{self.log()}")
            try:
                if httpx.get(f"{self.base}/readyz", timeout=2).status_code == 200:
                    return self
            except httpx.HTTPError:
                pass
            time.sleep(0.2)
        raise RuntimeError(f"server not ready:\n{self.log()}")

    def stop(self) -> None:
        if self.proc and self.proc.poll() is None:
            self.proc.terminate()
            try:
                self.proc.wait(timeout=60)
            except subprocess.TimeoutExpired:
                self.proc.kill()
                self.proc.wait()
        if self._log_file is not None:
            self._log_file.close()  # type: ignore[attr-defined]
            self._log_file = None

    def log(self) -> str:
        return self.log_path.read_text(errors="replace") if self.log_path else ""

    def client(self, **kwargs: object) -> httpx.Client:
        return httpx.Client(base_url=self.base, timeout=60, **kwargs)  # type: ignore[arg-type]


def wait_for_job(client: httpx.Client, job_id: str, timeout: float = 300) -> dict:
    deadline = time.monotonic() + timeout
    while time.monotonic() < deadline:
        job = client.get(f"/v1/jobs/{job_id}").json()
        if job["status"] in ("succeeded", "failed", "cancelled"):
            return job
        time.sleep(0.5)
    raise AssertionError(f"job {job_id} did not finish in {timeout} s: {job}")


@pytest.fixture(scope="module")
def server(tmp_path_factory: pytest.TempPathFactory) -> Iterator[Server]:
    home = tmp_path_factory.mktemp("gk") / "home"
    srv = Server(home=home).start()
    try:
        yield srv
    finally:
        srv.stop()
